"""Time, site and sky frames: LSRK velocity correction and az/el <-> l/b, offline.

The LSRK correction is computed from the observer's velocity: astropy gives the site's GCRS
position and velocity at the time (Earth rotation and orbit), transforms it to the LSRK frame
(the Sun moving at 20 km/s toward RA 18h, Dec +30 deg, B1900: the standard solar motion), and
the correction is the projection of that velocity on the line of sight,

    VFRAME = v_obs,LSRK . n_hat,    v_LSRK = v_topocentric + VFRAME,

since an observer moving toward the source at speed u sees it approach faster by u.

References
----------
Gordon, M. A. 1976, in Methods of Experimental Physics 12C (the standard solar motion).
Astropy Collaboration 2022, ApJ 935, 167 (astropy.coordinates, LSRK frame).
"""

from __future__ import annotations

import functools

import numpy as np
from astropy import units as u
from astropy.coordinates import (AltAz, EarthLocation, Galactic, ICRS,
                                 LSRK, SkyCoord)
from astropy.time import Time
from astropy.utils import iers

# A dish often has no internet: never try to download Earth-orientation tables; the bundled
# astropy-iers-data tables are used, and astropy warns itself when a time lies beyond them.
iers.conf.auto_download = False
iers.conf.auto_max_age = None


@functools.lru_cache(maxsize=8)
def site_location(lat_deg: float, lon_deg: float, height_m: float) -> EarthLocation:
    """Geodetic site (WGS84) as an astropy EarthLocation."""
    return EarthLocation.from_geodetic(lon_deg * u.deg, lat_deg * u.deg, height_m * u.m)


def vframe_lsrk_m_s(target: SkyCoord, location: EarthLocation, time: Time) -> float:
    """LSRK radio velocity (m/s) of something at rest relative to the telescope.

    Parameters
    ----------
    target : direction observed (any frame)
    location : the site
    time : UTC instant (mid-integration)

    Returns
    -------
    float : VFRAME in m/s, so that v_LSRK = v_topocentric + VFRAME.
    """
    gcrs = location.get_gcrs(time)
    lsrk = gcrs.transform_to(LSRK())
    vel = lsrk.velocity  # CartesianDifferential in the LSRK (ICRS-aligned) axes
    v = np.array([vel.d_x.to_value(u.m / u.s), vel.d_y.to_value(u.m / u.s),
                  vel.d_z.to_value(u.m / u.s)])
    icrs = target.transform_to(ICRS())
    ra, dec = icrs.ra.rad, icrs.dec.rad
    n = np.array([np.cos(dec) * np.cos(ra), np.cos(dec) * np.sin(ra), np.sin(dec)])
    return float(v @ n)


def galactic_to_altaz(glon_deg: float, glat_deg: float, location: EarthLocation,
                      time: Time) -> tuple[float, float]:
    """(azimuth, elevation) in deg of a Galactic position; no refraction."""
    aa = SkyCoord(l=glon_deg * u.deg, b=glat_deg * u.deg, frame=Galactic()).transform_to(
        AltAz(obstime=time, location=location))
    return float(aa.az.deg), float(aa.alt.deg)


def pointing_coord(frame: str, lon_deg: float, lat_deg: float, location: EarthLocation,
                   time: Time) -> SkyCoord:
    """The sky position observed at ``time`` for a pointing (``azel`` = fixed, drifting)."""
    if frame == "galactic":
        return SkyCoord(l=lon_deg * u.deg, b=lat_deg * u.deg, frame=Galactic())
    if frame == "radec":
        return SkyCoord(ra=lon_deg * u.deg, dec=lat_deg * u.deg, frame=ICRS())
    if frame == "azel":
        aa = SkyCoord(az=lon_deg * u.deg, alt=lat_deg * u.deg,
                      frame=AltAz(obstime=time, location=location))
        return aa.transform_to(ICRS())
    raise ValueError(f"unknown pointing frame {frame!r}")


def describe(coord: SkyCoord, location: EarthLocation, time: Time) -> dict:
    """GLON, GLAT, AZIMUTH, ELEVATIO (deg) of a position at a time and site."""
    gal = coord.transform_to(Galactic())
    aa = coord.transform_to(AltAz(obstime=time, location=location))
    return {"GLON": float(gal.l.deg), "GLAT": float(gal.b.deg),
            "AZIMUTH": float(aa.az.deg), "ELEVATIO": float(aa.alt.deg)}


def best_plane_longitude(location: EarthLocation, time: Time, min_elevation_deg: float) -> float:
    """A Galactic-plane longitude above the horizon at ``time`` for the default pointing.

    Prefers the first quadrant (l = 20..90 deg: strong, wide lines) when a part of it stands
    higher than ``min_elevation_deg + 15``; otherwise the highest point of the plane.
    """
    grid = np.arange(0.0, 360.0, 5.0)
    aa = SkyCoord(l=grid * u.deg, b=np.zeros_like(grid) * u.deg, frame=Galactic()).transform_to(
        AltAz(obstime=time, location=location))
    el = aa.alt.deg
    first = (grid >= 20) & (grid <= 90)
    if np.max(el[first]) > min_elevation_deg + 15:
        return float(grid[first][np.argmax(el[first])])
    return float(grid[np.argmax(el)])
