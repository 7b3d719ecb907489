"""Time, site and sky frames: LSRK velocity correction and az/el <-> l/b, offline.

The LSRK correction is computed from the observer's velocity: astropy gives the site's GCRS
position and velocity at the time (Earth rotation and orbit), transforms it to the LSRK frame
(the Sun moving at 20 km/s toward RA 18h, Dec +30 deg, B1900: the standard solar motion), and
the correction is the projection of that velocity on the line of sight,

    VFRAME = v_obs,LSRK . n_hat,    v_LSRK = v_topocentric + VFRAME,

since an observer moving toward the source at speed u sees it approach faster by u.

Horizontal coordinates (azimuth from north through east, elevation above the horizon) come
from astropy's AltAz frame with the air pressure set to zero, i.e. without refraction. At
21 cm refraction lifts a source by some arcminutes at 10 deg elevation and less above (common
practice), small against a small dish's beam of several degrees, and it would depend on the
weather, which the daemon does not know.

Offline Earth orientation. A dish often has no internet, so nothing here ever downloads:
the Earth-orientation table (UT1-UTC, polar motion: the IERS-A "finals" file with about a
year of predictions) and the leap-second table are the ones bundled in the
``astropy-iers-data`` package. Beyond the table astropy holds UT1-UTC at its last value and
uses a mean polar motion; UT1-UTC drifts by some tenths of a second a year, so positions
degrade by a few arcseconds a year (15 arcsec per second of time), and VFRAME not measurably.
:func:`check_eop` says so in one line (logged once per kind by every function here); the
accuracy warnings that astropy and ERFA raise themselves in that case are silenced inside
this module so that a ``-W error`` setting cannot stop the daemon over them.

References
----------
Gordon, M. A. 1976, in Methods of Experimental Physics 12C (the standard solar motion).
Astropy Collaboration 2022, ApJ 935, 167 (astropy.coordinates, LSRK and AltAz frames).
IERS Conventions 2010, IERS Technical Note 36 (UT1-UTC, polar motion, the finals tables).
"""

from __future__ import annotations

import contextlib
import functools
import logging
import threading
import warnings
from collections.abc import Iterator
from dataclasses import dataclass

import numpy as np
import numpy.typing as npt
from astropy import units as u
from astropy.coordinates import ICRS, LSRK, AltAz, EarthLocation, Galactic, SkyCoord, get_sun
from astropy.time import Time
from astropy.utils import iers
from astropy.utils.exceptions import AstropyWarning
from erfa import ErfaWarning

from spinflip.daemon.sky import eop_cache

# Never try to download Earth-orientation tables; use the bundled astropy-iers-data tables.
iers.conf.auto_download = False
# No age limit on the bundled table's predictions (astropy would refuse times past them).
iers.conf.auto_max_age = None
# Should the IERS-B table alone be in use, extrapolate with a warning instead of raising.
iers.conf.iers_degraded_accuracy = "warn"

#: The fix for an out-of-date table, quoted in :func:`check_eop`'s line.
EOP_FIX = ("upgrade the astropy-iers-data package when the computer is online: "
           "pip install -U astropy-iers-data")

log = logging.getLogger("spinflip.frames")

# warnings.catch_warnings changes process-wide state: one thread at a time in this module.
_ASTROPY_LOCK = threading.RLock()
_REPORTED: set = set()


@contextlib.contextmanager
def _quiet() -> Iterator[None]:
    """Silence astropy's and ERFA's out-of-table accuracy warnings, one thread at a time.

    Only accuracy warnings are silenced (IERS range/staleness, astropy's default polar motion
    and UT1-UTC, ERFA's "dubious year"): deprecations and other warnings still show.
    """
    with _ASTROPY_LOCK, warnings.catch_warnings():
        eop_cache.install()   # the parsed table from the per-user cache (milliseconds)
        warnings.filterwarnings("ignore", category=iers.IERSWarning)
        warnings.filterwarnings("ignore", category=iers.IERSDegradedAccuracyWarning)
        warnings.filterwarnings("ignore", category=AstropyWarning,
                                message=r".*(IERS|polar motion|UT1-UTC|leap.second)")
        warnings.filterwarnings("ignore", category=ErfaWarning, message=r".*dubious year")
        yield


@contextlib.contextmanager
def _offline(time: Time) -> Iterator[None]:
    """:func:`_quiet`, and what astropy would have warned about logged once per kind."""
    with _quiet():
        _report_eop(time)
        yield


def _report_eop(time: Time) -> None:
    cov = eop_coverage(time)
    kind = (cov["beyond_eop"], cov["beyond_leap"])
    if any(kind) and kind not in _REPORTED:
        _REPORTED.add(kind)
        log.warning(check_eop(time))


def _float_or_array(x: npt.ArrayLike) -> float | np.ndarray:
    a = np.asarray(x, dtype=float)
    return float(a) if a.ndim == 0 else a


# ----------------------------------------------------------------------------------------------
# Earth-orientation coverage
# ----------------------------------------------------------------------------------------------
@functools.lru_cache(maxsize=1)
def _eop_limits() -> dict:
    """Last MJD with UT1-UTC and polar motion, leap-second expiry MJD, their dates, table file.

    Read once, offline (the tables cannot change while nothing is downloaded).
    """
    with _quiet():
        table = iers.earth_orientation_table.get()
        # Flags: B = bulletin B (final), I = IERS-A measured, P = IERS-A prediction; a row
        # without a flag has no value.
        has = (np.isin(np.asarray(table["UT1Flag"]), ["B", "I", "P"])
               & np.isin(np.asarray(table["PolPMFlag"]), ["B", "I", "P"])
               & np.isfinite(np.asarray(table["UT1_UTC"].value, dtype=float)))
        end_mjd = float(np.asarray(table["MJD"].value)[has][-1])
        leap_mjd = float(iers.LeapSeconds.auto_open().expires.mjd)
    return {"eop_end_mjd": end_mjd, "eop_end_date": _mjd_date(end_mjd),
            "leap_expires_mjd": leap_mjd, "leap_expires_date": _mjd_date(leap_mjd),
            "eop_file": str(table.meta.get("data_path", "?"))}


def _mjd_date(mjd: float) -> str:
    with _quiet():
        return Time(mjd, format="mjd", scale="utc").iso[:10]


def eop_coverage(time: Time) -> dict:
    """How far the bundled Earth-orientation and leap-second tables reach, and ``time``.

    Parameters
    ----------
    time : an instant or an array of instants (the latest one is judged)

    Returns
    -------
    dict with ``eop_end_mjd`` / ``eop_end_date`` (last day with UT1-UTC and polar motion,
    IERS-A predictions included), ``leap_expires_mjd`` / ``leap_expires_date`` (expiry of the
    leap-second table), ``time_mjd`` (latest instant asked, UTC), ``beyond_eop`` and
    ``beyond_leap`` (bool), ``eop_file`` (path of the table read).

    Notes
    -----
    Nothing is downloaded (``iers.conf.auto_download`` is False in this module).
    """
    limits = _eop_limits()
    with _quiet():
        t_mjd = float(np.max(np.atleast_1d(time.utc.mjd)))
    return {**limits, "time_mjd": t_mjd, "beyond_eop": t_mjd > limits["eop_end_mjd"],
            "beyond_leap": t_mjd > limits["leap_expires_mjd"]}


def check_eop(time: Time) -> str | None:
    """One line of warning when ``time`` lies beyond the bundled tables, else None.

    Parameters
    ----------
    time : an instant or an array of instants (the latest one is judged)

    Returns
    -------
    str or None : names the table's last date, what degrades, and the fix (:data:`EOP_FIX`).

    Notes
    -----
    Past the Earth-orientation table astropy keeps UT1-UTC at its last value; UT1-UTC changes
    by some tenths of a second a year and one second of time is 15 arcsec of sky, so az/el
    drift by a few arcseconds a year (common practice). Past the leap-second table's expiry a
    leap second may have been inserted that this computer does not know: times would be one
    second off (15 arcsec). Both are small against a 21 cm beam; VFRAME is unaffected at the
    m/s level.
    """
    cov = eop_coverage(time)
    parts = []
    if cov["beyond_eop"]:
        parts.append(f"Earth-orientation predictions end {cov['eop_end_date']} (bundled IERS-A "
                     f"table), so az/el for {_mjd_date(cov['time_mjd'])} use extrapolated "
                     "UT1-UTC and mean polar motion (a few arcsec per year past the end)")
    if cov["beyond_leap"]:
        parts.append(f"the leap-second table expired {cov['leap_expires_date']}, so a later "
                     "leap second would be missed (1 s = 15 arcsec)")
    if not parts:
        return None
    return "; ".join(parts) + "; " + EOP_FIX


# ----------------------------------------------------------------------------------------------
# site, velocity, positions
# ----------------------------------------------------------------------------------------------
@functools.lru_cache(maxsize=8)
def site_location(lat_deg: float, lon_deg: float, height_m: float) -> EarthLocation:
    """Geodetic site (WGS84) as an astropy EarthLocation."""
    return EarthLocation.from_geodetic(lon_deg * u.deg, lat_deg * u.deg, height_m * u.m)


def _altaz(location: EarthLocation, time: Time) -> AltAz:
    """Horizontal frame at a site and time, without refraction (zero air pressure)."""
    return AltAz(obstime=time, location=location, pressure=0 * u.hPa)


def vframe_lsrk_m_s(target: SkyCoord, location: EarthLocation,
                    time: Time) -> float | np.ndarray:
    """LSRK radio velocity (m/s) of something at rest relative to the telescope.

    Parameters
    ----------
    target : direction observed (any frame)
    location : the site
    time : UTC instant (mid-integration); an array of instants gives an array

    Returns
    -------
    float (or ndarray for array input) : VFRAME in m/s, so that v_LSRK = v_topocentric + VFRAME.

    Notes
    -----
    v_obs,LSRK is the site's GCRS velocity (rotation + orbit) carried into astropy's LSRK
    frame; n_hat = (cos d cos a, cos d sin a, sin d) from the ICRS right ascension a and
    declination d; VFRAME = v_obs,LSRK . n_hat.
    """
    with _offline(time):
        lsrk = location.get_gcrs(time).transform_to(LSRK())
        v_m_s = lsrk.velocity.d_xyz.to_value(u.m / u.s)   # (3, ...) in ICRS-aligned axes
        icrs = target.transform_to(ICRS())
    ra, dec = icrs.ra.rad, icrs.dec.rad
    n = np.array([np.cos(dec) * np.cos(ra), np.cos(dec) * np.sin(ra), np.sin(dec)])
    ndim = max(v_m_s.ndim, n.ndim)   # broadcast times against directions
    v_m_s = v_m_s.reshape(v_m_s.shape + (1,) * (ndim - v_m_s.ndim))
    n = n.reshape(n.shape + (1,) * (ndim - n.ndim))
    return _float_or_array(np.sum(v_m_s * n, axis=0))


def _sky_coord(frame: str, lon_deg: npt.ArrayLike, lat_deg: npt.ArrayLike) -> SkyCoord:
    if frame == "galactic":
        return SkyCoord(l=np.asarray(lon_deg) * u.deg, b=np.asarray(lat_deg) * u.deg,
                        frame=Galactic())
    if frame == "radec":
        return SkyCoord(ra=np.asarray(lon_deg) * u.deg, dec=np.asarray(lat_deg) * u.deg,
                        frame=ICRS())
    raise ValueError(f"sky frame {frame!r} is not one of 'galactic', 'radec'")


def sky_to_azel(frame: str, lon_deg: npt.ArrayLike, lat_deg: npt.ArrayLike,
                location: EarthLocation,
                time: Time) -> tuple[float | np.ndarray, float | np.ndarray]:
    """(azimuth, elevation) in deg of a sky position at a site and time; no refraction.

    Parameters
    ----------
    frame : "galactic" (lon, lat = l, b) or "radec" (ICRS right ascension, declination)
    lon_deg, lat_deg : the position, deg (scalars, or arrays broadcasting with ``time``)
    location : the site (an EarthLocation, possibly an array)
    time : UTC instant(s)

    Returns
    -------
    (az_deg, el_deg) : azimuth from north through east and elevation, deg (floats for
    scalar input).

    Raises
    ------
    ValueError : for a frame other than "galactic" or "radec".
    """
    coord = _sky_coord(frame, lon_deg, lat_deg)
    with _offline(time):
        aa = coord.transform_to(_altaz(location, time))
    return _float_or_array(aa.az.deg), _float_or_array(aa.alt.deg)


def sun_azel(location: EarthLocation,
             time: Time) -> tuple[float | np.ndarray, float | np.ndarray]:
    """(azimuth, elevation) in deg of the Sun at a site and time(s); no refraction
    (astropy's ``get_sun``, GCRS, carried into the horizontal frame)."""
    with _offline(time):
        aa = get_sun(time).transform_to(_altaz(location, time))
    return _float_or_array(aa.az.deg), _float_or_array(aa.alt.deg)


def azel_to_sky(az_deg: npt.ArrayLike, el_deg: npt.ArrayLike, location: EarthLocation,
                time: Time) -> dict:
    """GLON, GLAT, RA, DEC (deg) seen at a fixed azimuth and elevation (a drift scan).

    Parameters
    ----------
    az_deg, el_deg : azimuth from north through east and elevation, deg; no refraction
    location : the site (an EarthLocation, possibly an array)
    time : UTC instant(s); arrays give arrays (the sky drifting through the beam)

    Returns
    -------
    dict : ``GLON``, ``GLAT`` (Galactic), ``RA``, ``DEC`` (ICRS), deg.
    """
    aa = SkyCoord(az=np.asarray(az_deg) * u.deg, alt=np.asarray(el_deg) * u.deg,
                  frame=_altaz(location, time))
    with _offline(time):
        icrs = aa.transform_to(ICRS())
        gal = icrs.transform_to(Galactic())
    return {"GLON": _float_or_array(gal.l.deg), "GLAT": _float_or_array(gal.b.deg),
            "RA": _float_or_array(icrs.ra.deg), "DEC": _float_or_array(icrs.dec.deg)}


def galactic_to_altaz(glon_deg: float, glat_deg: float, location: EarthLocation,
                      time: Time) -> tuple[float, float]:
    """(azimuth, elevation) in deg of a Galactic position; no refraction."""
    az, el = sky_to_azel("galactic", glon_deg, glat_deg, location, time)
    return float(az), float(el)     # scalar position and time: already floats


def pointing_coord(frame: str, lon_deg: float, lat_deg: float, location: EarthLocation,
                   time: Time) -> SkyCoord:
    """The sky position observed at ``time`` for a pointing (``azel`` = fixed, drifting)."""
    if frame in ("galactic", "radec"):
        return _sky_coord(frame, lon_deg, lat_deg)
    if frame == "azel":
        aa = SkyCoord(az=lon_deg * u.deg, alt=lat_deg * u.deg, frame=_altaz(location, time))
        with _offline(time):
            return aa.transform_to(ICRS())
    raise ValueError(f"unknown pointing frame {frame!r}: use 'galactic', 'radec' or 'azel'")


def describe(coord: SkyCoord, location: EarthLocation, time: Time) -> dict:
    """Where a position is: GLON, GLAT, RA, DEC, AZIMUTH, ELEVATIO (deg) at a time and site.

    Parameters
    ----------
    coord : the position (any frame)
    location : the site
    time : UTC instant(s)

    Returns
    -------
    dict : ``GLON``, ``GLAT`` (Galactic), ``RA``, ``DEC`` (ICRS), ``AZIMUTH`` (from north
    through east), ``ELEVATIO`` (no refraction), deg; floats for a scalar position and time.
    """
    with _offline(time):
        icrs = coord.transform_to(ICRS())
        gal = icrs.transform_to(Galactic())
        aa = icrs.transform_to(_altaz(location, time))
    return {"GLON": _float_or_array(gal.l.deg), "GLAT": _float_or_array(gal.b.deg),
            "RA": _float_or_array(icrs.ra.deg), "DEC": _float_or_array(icrs.dec.deg),
            "AZIMUTH": _float_or_array(aa.az.deg), "ELEVATIO": _float_or_array(aa.alt.deg)}


@dataclass(frozen=True)
class SkyPosition:
    """Where a position is at one time and site, deg: Galactic, ICRS and horizontal (azimuth
    from north through east, elevation without refraction)."""

    glon_deg: float
    glat_deg: float
    ra_deg: float
    dec_deg: float
    az_deg: float
    el_deg: float


def sky_position(coord: SkyCoord, location: EarthLocation, time: Time) -> SkyPosition:
    """:func:`describe` of a scalar position and time, as a :class:`SkyPosition`."""
    d = describe(coord, location, time)
    return SkyPosition(float(d["GLON"]), float(d["GLAT"]), float(d["RA"]), float(d["DEC"]),
                       float(d["AZIMUTH"]), float(d["ELEVATIO"]))


# ICRS -> Galactic rotation matrix (ESA 1997, The Hipparcos and Tycho Catalogues, ESA SP-1200,
# vol. 1, sec. 1.5.3): r_gal = _ICRS_TO_GAL @ r_icrs. Used only to choose a longitude.
_ICRS_TO_GAL = np.array([[-0.0548755604, -0.8734370902, -0.4838350155],
                         [+0.4941094279, -0.4448296300, +0.7469822445],
                         [-0.8676661490, -0.1980763734, +0.4559837762]])


def _rot(axis: int, angle_rad: float) -> np.ndarray:
    """Rotation of the coordinate frame by ``angle_rad`` about axis 0 (x), 1 (y) or 2 (z)."""
    c, s = np.cos(angle_rad), np.sin(angle_rad)
    i, j = [(1, 2), (2, 0), (0, 1)][axis]
    m = np.eye(3)
    m[i, i] = m[j, j] = c
    m[i, j], m[j, i] = s, -s
    return m


def galactic_azel_lowprec(glon_deg: npt.ArrayLike, glat_deg: npt.ArrayLike, lat_deg: float,
                          lon_deg: float, jd_utc: float) -> tuple[np.ndarray, np.ndarray]:
    """(azimuth, elevation) in deg of Galactic positions, closed form, to about 0.02 deg.

    Good enough to choose a pointing, never written into data (rows use :func:`describe`).

    Parameters
    ----------
    glon_deg, glat_deg : Galactic longitude and latitude, deg (arrays broadcast)
    lat_deg, lon_deg : geodetic site latitude and east longitude, deg
    jd_utc : Julian date (UTC, taken for UT1: 0.9 s at most, 0.004 deg)

    Returns
    -------
    (az_deg, el_deg) : azimuth from north through east, elevation without refraction.

    Notes
    -----
    r_J2000 = A^T r_gal (Hipparcos matrix above); precession to the date with the IAU 1976
    angles (Lieske et al. 1977, A&A 58, 1): r_date = R3(-z) R2(theta) R3(-zeta) r_J2000,
    T = (JD - 2451545) / 36525,
    zeta = 2306.2181" T + 0.30188" T^2 + 0.017998" T^3, z = 2306.2181" T + 1.09468" T^2
    + 0.018203" T^3, theta = 2004.3109" T - 0.42666" T^2 - 0.041833" T^3;
    mean sidereal time GMST = 280.46061837 + 360.98564736629 d + 0.000387933 T^2 deg
    (d = JD - 2451545; Meeus, Astronomical Algorithms, 2nd ed., eq. 12.4); hour angle
    H = GMST + lon - alpha; sin el = sin phi sin delta + cos phi cos delta cos H,
    az = atan2(-cos delta sin H, sin delta cos phi - cos delta cos H sin phi).
    Left out: nutation (< 20"), annual and diurnal aberration (< 21"), UT1-UTC, polar motion.
    """
    gl, gb = np.broadcast_arrays(np.radians(glon_deg), np.radians(glat_deg))
    r_gal = np.array([np.cos(gb) * np.cos(gl), np.cos(gb) * np.sin(gl), np.sin(gb)])
    d = jd_utc - 2451545.0
    t = d / 36525.0
    arcsec = np.pi / (180.0 * 3600.0)
    zeta = (2306.2181 * t + 0.30188 * t**2 + 0.017998 * t**3) * arcsec
    z = (2306.2181 * t + 1.09468 * t**2 + 0.018203 * t**3) * arcsec
    theta = (2004.3109 * t - 0.42666 * t**2 - 0.041833 * t**3) * arcsec
    prec = _rot(2, -z) @ _rot(1, theta) @ _rot(2, -zeta)
    x, y, zc = np.tensordot(prec @ _ICRS_TO_GAL.T, r_gal, axes=1)
    ra = np.arctan2(y, x)
    dec = np.arcsin(np.clip(zc, -1.0, 1.0))
    gmst = np.radians((280.46061837 + 360.98564736629 * d + 0.000387933 * t**2) % 360.0)
    h = gmst + np.radians(lon_deg) - ra
    phi = np.radians(lat_deg)
    sin_el = np.sin(phi) * np.sin(dec) + np.cos(phi) * np.cos(dec) * np.cos(h)
    el = np.degrees(np.arcsin(np.clip(sin_el, -1.0, 1.0)))
    az = np.degrees(np.arctan2(-np.cos(dec) * np.sin(h),
                               np.sin(dec) * np.cos(phi) - np.cos(dec) * np.cos(h) * np.sin(phi)))
    return az % 360.0, el


def best_plane_longitude(location: EarthLocation, time: Time, min_elevation_deg: float) -> float:
    """A Galactic-plane longitude above the horizon at ``time`` for the default pointing.

    Prefers the first quadrant (l = 20..90 deg: strong, wide lines) when a part of it stands
    higher than ``min_elevation_deg + 15``; otherwise the highest point of the plane.
    Elevations come from :func:`galactic_azel_lowprec` (a closed form, within about 0.02 deg
    of astropy: plenty to choose among longitudes 5 deg apart, and no Earth-orientation table
    to read on the way to the first block); the data rows' positions stay astropy's.
    """
    grid = np.arange(0.0, 360.0, 5.0)
    geo = location.to_geodetic()
    t = time.utc
    _az, el = galactic_azel_lowprec(grid, np.zeros_like(grid), float(geo.lat.deg),
                                    float(geo.lon.deg), float(t.jd1) + float(t.jd2))
    first = (grid >= 20) & (grid <= 90)
    if np.max(el[first]) > min_elevation_deg + 15:
        return float(grid[first][np.argmax(el[first])])
    return float(grid[np.argmax(el)])
