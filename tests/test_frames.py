"""Velocity axis, LSRK correction and sky frames against astropy and an independent calculation."""

import contextlib
import logging
import socket
import urllib.request
import warnings

import lsrk_lowprec
import numpy as np
import pytest
from astropy import units as u
from astropy.coordinates import ICRS, AltAz, EarthLocation, Galactic, SkyCoord, SpectralCoord
from astropy.time import Time
from astropy.utils import iers
from astropy.utils.exceptions import AstropyWarning
from erfa import ErfaWarning

from spinflip.daemon.sky import coordinates
from spinflip.daemon.sky.hi_line import (
    C_M_S,
    HI_REST_FREQ_HZ,
    radio_frequency_hz,
    radio_velocity_m_s,
)

ARCSEC_DEG = 1.0 / 3600.0


@contextlib.contextmanager
def _reference_quietly():
    """Astropy's own accuracy warnings (times past the bundled IERS table) in reference code;
    frames silences its own, which test_offline_beyond_and_inside_the_bundled_tables checks."""
    with warnings.catch_warnings():
        warnings.simplefilter("ignore", AstropyWarning)
        warnings.simplefilter("ignore", ErfaWarning)
        yield


@pytest.fixture
def quiet():
    with _reference_quietly():
        yield


def test_rest_frequency():
    # Hellwig et al. 1970 (value from memory): 1420.405751768 MHz
    assert HI_REST_FREQ_HZ == pytest.approx(1420.405751768e6, abs=1e-3)


def test_radio_velocity_matches_astropy_doppler_radio():
    # FITS WCS paper III (Greisen et al. 2006) radio convention, as astropy's doppler_radio
    f = np.linspace(1419.0e6, 1421.5e6, 101)
    ref = (f * u.Hz).to(u.m / u.s, equivalencies=u.doppler_radio(HI_REST_FREQ_HZ * u.Hz)).value
    np.testing.assert_allclose(radio_velocity_m_s(f), ref, rtol=0, atol=1e-6)
    np.testing.assert_allclose(radio_frequency_hz(ref), f, rtol=1e-13)


# (UTC, site latitude deg, site east longitude deg, site height m, l deg, b deg): years
# 2020..2030, latitudes -70..+70, site longitudes and Galactic longitudes in all four quadrants,
# every season and time of day.
LSRK_CASES = [
    ("2020-01-15T03:00:00", -70.0, 11.8, 50.0, 15.0, 2.0),
    ("2020-07-04T18:30:00", 52.2, -1.3, 80.0, 95.0, -3.0),
    ("2021-03-21T12:00:00", 19.8, -155.5, 4200.0, 170.0, 30.0),
    ("2021-10-30T23:59:00", -33.9, 18.4, 10.0, 265.0, -45.0),
    ("2022-05-01T06:00:00", 67.9, 21.1, 400.0, 300.0, 0.0),
    ("2022-12-24T15:00:00", -45.0, 170.3, 300.0, 45.0, 60.0),
    ("2023-08-10T09:45:00", 0.0, 100.0, 0.0, 135.0, -70.0),
    ("2024-02-29T21:00:00", 38.4, -79.8, 800.0, 220.0, 10.0),
    ("2025-06-21T00:00:00", -25.0, -70.4, 2600.0, 330.0, 40.0),
    ("2025-12-24T23:30:00", 60.1, -150.0, 100.0, 200.0, -10.0),
    ("2026-03-01T02:00:00", 46.82, 8.37, 640.0, 30.0, 0.0),
    ("2026-09-15T20:00:00", -33.9, 18.4, 300.0, 120.0, 5.0),
    ("2027-06-21T12:00:00", 10.0, -60.0, 300.0, 250.0, -20.0),
    ("2028-11-05T07:00:00", -60.0, 130.0, 20.0, 350.0, -5.0),
    ("2029-04-18T16:20:00", 30.0, -110.0, 1500.0, 75.0, 85.0),
    ("2030-09-30T10:10:00", 70.0, -20.0, 5.0, 185.0, -60.0),
]


def _galactic(l_deg, b_deg):
    return SkyCoord(l=l_deg * u.deg, b=b_deg * u.deg, frame=Galactic())


@pytest.mark.parametrize("iso, lat, lon, height, l, b", LSRK_CASES)
def test_vframe_against_astropy_spectralcoord(quiet, iso, lat, lon, height, l, b):
    """VFRAME from our velocity projection vs astropy's SpectralCoord LSRK transform."""
    t = Time(iso, scale="utc")
    loc = coordinates.site_location(lat, lon, height)
    target = SkyCoord(l=l * u.deg, b=b * u.deg, frame=Galactic(), distance=1 * u.kpc,
                      radial_velocity=0 * u.km / u.s, pm_l_cosb=0 * u.mas / u.yr, pm_b=0 * u.mas / u.yr)
    # Reference: astropy's SpectralCoord moved to an observer at rest in its LSRK frame.
    sc = SpectralCoord(HI_REST_FREQ_HZ * u.Hz, observer=loc.get_itrs(t), target=target)
    f_lsrk = sc.with_observer_stationary_relative_to("lsrk").to_value(u.Hz)
    v_ref = C_M_S * (HI_REST_FREQ_HZ - f_lsrk) / HI_REST_FREQ_HZ
    ours = coordinates.vframe_lsrk_m_s(_galactic(l, b), loc, t)
    assert abs(ours - v_ref) < 10.0   # m/s, i.e. 0.01 km/s
    assert abs(ours) < 60e3           # Earth orbit + rotation + solar motion stay below ~50 km/s


@pytest.mark.parametrize("iso, lat, lon, height, l, b", LSRK_CASES)
def test_vframe_against_independent_low_precision(quiet, iso, lat, lon, height, l, b):
    """VFRAME vs tests/lsrk_lowprec.py: numpy only, no astropy coordinates.

    Astronomical Almanac section C low-precision Sun (Earth's orbital velocity), omega x r with
    USNO's approximate GMST (rotation), Gordon 1976 solar motion precessed with Lieske et al.
    1977; the target's RA/Dec from the Hipparcos Galactic pole and node (ESA 1997), not astropy.
    The helper's neglected terms add up to some tens of m/s (see its docstring).
    """
    t = Time(iso, scale="utc")
    ra, dec = lsrk_lowprec.galactic_to_radec_deg(l, b)
    expected = lsrk_lowprec.vframe_lsrk_m_s(t.jd, lat, lon, height, ra, dec)
    ours = coordinates.vframe_lsrk_m_s(_galactic(l, b), coordinates.site_location(lat, lon, height), t)
    assert abs(ours - expected) < 100.0   # m/s, i.e. 0.1 km/s


def test_vframe_is_vectorised_over_time(quiet):
    times = Time([c[0] for c in LSRK_CASES[:4]], scale="utc")
    loc = coordinates.site_location(46.82, 8.37, 640.0)
    many = coordinates.vframe_lsrk_m_s(_galactic(30.0, 0.0), loc, times)
    one_by_one = [coordinates.vframe_lsrk_m_s(_galactic(30.0, 0.0), loc, t) for t in times]
    assert many.shape == (4,)
    np.testing.assert_allclose(many, one_by_one, rtol=0, atol=1e-6)


def test_low_precision_helper_constants():
    """The helper's from-memory values against each other and against astropy."""
    # Hipparcos Galactic frame (ESA 1997, from memory): the pole-and-node construction
    # reproduces the printed rotation matrix.
    np.testing.assert_allclose(lsrk_lowprec.icrs_to_galactic_matrix(),
                               lsrk_lowprec.ICRS_TO_GALACTIC_PRINTED, rtol=0, atol=1e-9)
    # Galactic centre at RA 266.405 deg, Dec -28.936 deg (from memory).
    ra, dec = lsrk_lowprec.galactic_to_radec_deg(0.0, 0.0)
    assert ra == pytest.approx(266.405, abs=1e-3) and dec == pytest.approx(-28.936, abs=1e-3)
    # Solar apex (RA 18h, Dec +30, B1900) precessed by Lieske et al. 1977 vs astropy's FK4
    # B1900 -> ICRS (astropy's LSRK definition): within 1 arcmin (FK4 E-terms and the
    # FK4/FK5 equinox difference are not in the helper).
    apex = SkyCoord(ra=270 * u.deg, dec=30 * u.deg, frame="fk4", equinox="B1900").icrs
    v = lsrk_lowprec.solar_motion_m_s()
    assert np.linalg.norm(v) == pytest.approx(20e3, rel=1e-12)
    sep_deg = np.degrees(np.arccos(v @ lsrk_lowprec.unit_vector(apex.ra.deg, apex.dec.deg) / 20e3))
    assert sep_deg < 1 / 60
    # Earth's orbital speed from the Almanac Sun: 29.3 (aphelion) .. 30.3 (perihelion) km/s
    # (common practice).
    speeds = np.linalg.norm(lsrk_lowprec.earth_velocity_m_s(2451545.0 + np.arange(0, 366, 5.0)),
                            axis=0)
    assert 29.2e3 < speeds.min() < 29.4e3 and 30.2e3 < speeds.max() < 30.4e3


# --------------------------------------------------------------------------------------------
# az/el <-> sky
# --------------------------------------------------------------------------------------------
N_DRAWS = 60


@pytest.fixture(scope="module")
def draws():
    """Random (time, site, az, el): years 2020..2030, latitudes -70..+70, el 5..89 deg."""
    rng = np.random.default_rng(20261202)
    with _reference_quietly():
        t = Time("2020-01-01T00:00:00", scale="utc") + rng.uniform(0, 11 * 365.25, N_DRAWS) * u.day
    lat = rng.uniform(-70, 70, N_DRAWS)
    lon = rng.uniform(-180, 180, N_DRAWS)
    height = rng.uniform(0, 3000, N_DRAWS)
    az = rng.uniform(0, 360, N_DRAWS)
    el = rng.uniform(5, 89, N_DRAWS)
    loc = EarthLocation.from_geodetic(lon * u.deg, lat * u.deg, height * u.m)
    return t, loc, az, el


def _sep_deg(lon1, lat1, lon2, lat2):
    """Great-circle angle between two directions, deg (Vincenty's formula)."""
    l1, b1, l2, b2 = (np.radians(x) for x in (lon1, lat1, lon2, lat2))
    dl = l2 - l1
    num = np.hypot(np.cos(b2) * np.sin(dl),
                   np.cos(b1) * np.sin(b2) - np.sin(b1) * np.cos(b2) * np.cos(dl))
    den = np.sin(b1) * np.sin(b2) + np.cos(b1) * np.cos(b2) * np.cos(dl)
    return np.degrees(np.arctan2(num, den))


def test_azel_to_sky_against_astropy(quiet, draws):
    t, loc, az, el = draws
    got = coordinates.azel_to_sky(az, el, loc, t)
    # Reference: astropy's AltAz (no refraction: pressure 0) built here, to Galactic and ICRS.
    aa = SkyCoord(az=az * u.deg, alt=el * u.deg,
                  frame=AltAz(obstime=t, location=loc, pressure=0 * u.hPa))
    gal, icrs = aa.transform_to(Galactic()), aa.transform_to(ICRS())
    assert got["GLON"].shape == (N_DRAWS,)
    assert np.max(_sep_deg(got["GLON"], got["GLAT"], gal.l.deg, gal.b.deg)) < ARCSEC_DEG
    assert np.max(_sep_deg(got["RA"], got["DEC"], icrs.ra.deg, icrs.dec.deg)) < ARCSEC_DEG


def test_sky_to_azel_against_astropy(quiet, draws):
    t, loc, az, el = draws
    l_deg = np.linspace(0, 360, N_DRAWS, endpoint=False)
    b_deg = np.linspace(-80, 80, N_DRAWS)
    got_az, got_el = coordinates.sky_to_azel("galactic", l_deg, b_deg, loc, t)
    ref = _galactic(l_deg, b_deg).transform_to(
        AltAz(obstime=t, location=loc, pressure=0 * u.hPa))   # astropy, as reference
    assert np.max(_sep_deg(got_az, got_el, ref.az.deg, ref.alt.deg)) < ARCSEC_DEG
    ra, dec = np.linspace(0, 360, N_DRAWS, endpoint=False), np.linspace(-85, 85, N_DRAWS)
    got_az, got_el = coordinates.sky_to_azel("radec", ra, dec, loc, t)
    ref = SkyCoord(ra=ra * u.deg, dec=dec * u.deg).transform_to(
        AltAz(obstime=t, location=loc, pressure=0 * u.hPa))
    assert np.max(_sep_deg(got_az, got_el, ref.az.deg, ref.alt.deg)) < ARCSEC_DEG


def test_galactic_azel_galactic_round_trip(quiet, draws):
    t, loc, _az, _el = draws
    rng = np.random.default_rng(7)
    l_deg, b_deg = rng.uniform(0, 360, N_DRAWS), np.degrees(np.arcsin(rng.uniform(-1, 1, N_DRAWS)))
    az, el = coordinates.sky_to_azel("galactic", l_deg, b_deg, loc, t)
    back = coordinates.azel_to_sky(az, el, loc, t)
    assert np.max(_sep_deg(l_deg, b_deg, back["GLON"], back["GLAT"])) < 1e-6


def test_sky_to_azel_against_spherical_trigonometry():
    """One case by hand: sin el = sin d sin phi + cos d cos phi cos H, az from north to east,
    tan az = -sin H / (tan d cos phi - cos H sin phi) (common practice); H = GMST + east
    longitude - RA, USNO's approximate GMST (from memory). At J2000 itself precession is nil;
    nutation, aberration, UT1-UTC and the equation of the equinoxes stay below 0.02 deg."""
    t = Time("2000-01-01T12:00:00", scale="utc")
    lat, lon, ra, dec = 46.82, 8.37, 310.0, 45.0
    gmst_h = 18.697374558 + 24.06570982441908 * (t.jd - 2451545.0)
    h = np.radians(15.0 * gmst_h + lon - ra)
    d, phi = np.radians(dec), np.radians(lat)
    el_deg = np.degrees(np.arcsin(np.sin(d) * np.sin(phi) + np.cos(d) * np.cos(phi) * np.cos(h)))
    az_deg = np.degrees(np.arctan2(-np.sin(h),
                                   np.tan(d) * np.cos(phi) - np.cos(h) * np.sin(phi))) % 360
    got_az, got_el = coordinates.sky_to_azel("radec", ra, dec, coordinates.site_location(lat, lon, 0.0), t)
    assert 20.0 < el_deg < 80.0   # a well-conditioned azimuth
    assert got_el == pytest.approx(el_deg, abs=0.05)
    assert got_az == pytest.approx(az_deg, abs=0.05)


def test_drift_scan_on_the_meridian_moves_at_the_sidereal_rate():
    """At az 180 deg the RA seen is the local sidereal time: it grows 15.0411 deg per UTC hour
    (1.00273790935 sidereal per solar day, from memory)."""
    t = Time("2026-12-02T00:00:00", scale="utc") + np.arange(0, 6) * u.hour
    sky = coordinates.azel_to_sky(180.0, 40.0, coordinates.site_location(46.82, 8.37, 640.0), t)
    step_deg = np.diff(np.unwrap(np.radians(sky["RA"]))) * 180 / np.pi
    np.testing.assert_allclose(step_deg, 15.0 * 1.00273790935, atol=0.005)
    # A meridian at elevation 40 from latitude 46.82 looks at Dec = 40 + 46.82 - 90 (common
    # practice); ICRS vs the equator of date moves it by up to 0.4 deg by 2026.
    np.testing.assert_allclose(sky["DEC"], 40.0 + 46.82 - 90.0, atol=0.5)


def test_describe_adds_icrs_ra_dec():
    loc = coordinates.site_location(46.82, 8.37, 640.0)
    t = Time("2026-12-02T20:00:00", scale="utc")
    pos = coordinates.describe(SkyCoord(ra=83.6331 * u.deg, dec=22.0145 * u.deg), loc, t)
    assert set(pos) == {"GLON", "GLAT", "RA", "DEC", "AZIMUTH", "ELEVATIO"}
    assert all(isinstance(v, float) for v in pos.values())
    assert pos["RA"] == pytest.approx(83.6331, abs=1e-9)
    assert pos["DEC"] == pytest.approx(22.0145, abs=1e-9)
    # The Galactic centre lies at RA 266.405 deg, Dec -28.936 deg (ESA 1997, from memory).
    gc = coordinates.describe(_galactic(0.0, 0.0), loc, t)
    assert gc["RA"] == pytest.approx(266.405, abs=1e-3)
    assert gc["DEC"] == pytest.approx(-28.936, abs=1e-3)
    # describe's az/el agree with sky_to_azel's
    az, el = coordinates.sky_to_azel("galactic", 0.0, 0.0, loc, t)
    assert (gc["AZIMUTH"], gc["ELEVATIO"]) == pytest.approx((az, el), abs=1e-9)


def test_sky_to_azel_rejects_unknown_frame():
    loc = coordinates.site_location(46.82, 8.37, 640.0)
    with pytest.raises(ValueError, match="'azel'.*'galactic', 'radec'"):
        coordinates.sky_to_azel("azel", 10.0, 10.0, loc, Time("2026-12-02T00:00:00"))


def test_best_plane_longitude_is_above_horizon():
    loc = coordinates.site_location(46.82, 8.37, 640.0)
    for hours in range(0, 24, 3):
        t = Time("2026-12-02T00:00:00") + hours * u.hour
        l = coordinates.best_plane_longitude(loc, t, 10.0)
        az, el = coordinates.galactic_to_altaz(l, 0.0, loc, t)
        assert el > 10.0


def test_lowprec_plane_elevations_and_choice_against_astropy():
    """The closed-form Galactic -> horizontal rotation that chooses the 'auto' longitude,
    checked against astropy (reference: astropy.coordinates AltAz, no refraction) over sites,
    seasons and hours; and the longitude chosen is one astropy would choose."""
    grid = np.arange(0.0, 360.0, 5.0)
    chosen_differently = 0
    for lat, lon in ((46.82, 8.37), (-33.9, 18.4), (60.0, -150.0), (0.5, 100.0)):
        loc = coordinates.site_location(lat, lon, 500.0)
        for k in range(8):
            t = Time("2026-12-02T00:00:00") + (k * 7.3) * u.hour + (k * 41) * u.day
            with _reference_quietly():
                az_ref, el_ref = coordinates.sky_to_azel("galactic", grid, 0 * grid, loc, t)
            az, el = coordinates.galactic_azel_lowprec(grid, 0 * grid, lat, lon,
                                                       t.utc.jd1 + t.utc.jd2)
            assert np.max(np.abs(el - el_ref)) < 0.03
            daz = (az - az_ref + 180.0) % 360.0 - 180.0
            assert np.max(np.abs(daz * np.cos(np.radians(el_ref)))) < 0.03
            # the same rule as best_plane_longitude, on astropy's elevations
            first = (grid >= 20) & (grid <= 90)
            ref = (grid[first][np.argmax(el_ref[first])] if np.max(el_ref[first]) > 25.0
                   else grid[np.argmax(el_ref)])
            got = coordinates.best_plane_longitude(loc, t, 10.0)
            if got != ref:   # only a near tie may go the other way
                chosen_differently += 1
                i_got, i_ref = int(got // 5), int(ref // 5)
                assert abs(el_ref[i_got] - el_ref[i_ref]) < 0.05
    assert chosen_differently <= 1


# --------------------------------------------------------------------------------------------
# offline Earth orientation
# --------------------------------------------------------------------------------------------
def test_offline_beyond_and_inside_the_bundled_tables(monkeypatch, caplog):
    """No download is ever tried; past the tables one warning line names the table's end."""
    # astropy's documented switches for offline use (astropy.utils.iers docs)
    assert iers.conf.auto_download is False
    assert iers.conf.iers_degraded_accuracy == "warn"
    attempts = []

    def refuse(*args, **kwargs):
        attempts.append(args)
        raise OSError("network blocked by the test")

    monkeypatch.setattr(socket.socket, "connect", refuse)
    monkeypatch.setattr(socket.socket, "connect_ex", refuse)
    monkeypatch.setattr(urllib.request, "urlopen", refuse)
    # Make astropy and frames read their tables again, with the network blocked.
    monkeypatch.setattr(iers.IERS_Auto, "iers_table", None)
    monkeypatch.setattr(coordinates, "_REPORTED", set())
    coordinates._eop_limits.cache_clear()
    try:
        # Reference ends straight from astropy's bundled tables (astropy-iers-data).
        with warnings.catch_warnings():
            warnings.simplefilter("ignore", AstropyWarning)
            end_mjd = float(iers.IERS_Auto.open()["MJD"][-1].value)
            leap_mjd = float(iers.LeapSeconds.auto_open().expires.mjd)
        beyond = Time(end_mjd + 3 * 365.25, format="mjd", scale="utc")
        inside = Time(min(end_mjd, leap_mjd) - 30.0, format="mjd", scale="utc")
        loc = coordinates.site_location(46.82, 8.37, 640.0)
        target = _galactic(30.0, 0.0)
        with caplog.at_level(logging.WARNING, logger="spinflip.frames"), \
                warnings.catch_warnings():
            warnings.simplefilter("error")   # a warning escaping frames would raise here
            results = {}
            for name, t in (("beyond", beyond), ("inside", inside)):
                results[name] = (coordinates.vframe_lsrk_m_s(target, loc, t),
                                 coordinates.describe(target, loc, t), coordinates.check_eop(t))
            coordinates.vframe_lsrk_m_s(target, loc, beyond)   # a second time: logged only once
    finally:
        coordinates._eop_limits.cache_clear()
    assert attempts == []

    vf, pos, line = results["beyond"]
    end_date = Time(end_mjd, format="mjd").iso[:10]
    assert line is not None and "\n" not in line
    assert end_date in line
    assert "pip install -U astropy-iers-data" in line
    assert np.isfinite(vf) and abs(vf) < 60e3 and np.isfinite(pos["ELEVATIO"])
    # Extrapolated Earth orientation still gives the right VFRAME (independent helper).
    ra, dec = lsrk_lowprec.galactic_to_radec_deg(30.0, 0.0)
    assert vf == pytest.approx(lsrk_lowprec.vframe_lsrk_m_s(beyond.jd, 46.82, 8.37, 640.0,
                                                            ra, dec), abs=100.0)
    assert [r.getMessage() for r in caplog.records if r.name == "spinflip.frames"] == [line]

    vf, pos, line = results["inside"]
    assert line is None
    assert np.isfinite(vf) and np.isfinite(pos["AZIMUTH"])

    cov = coordinates.eop_coverage(beyond)
    assert cov["eop_end_mjd"] == end_mjd and cov["leap_expires_mjd"] == leap_mjd
    assert cov["beyond_eop"] and cov["beyond_leap"]


def test_check_eop_names_an_expired_leap_second_table(monkeypatch):
    # the bundled tables' dates change with the package: put the leap-second table's expiry
    # 100 days before the end of the Earth-orientation table, whatever the bundle says
    real = coordinates._eop_limits()
    leap = real["eop_end_mjd"] - 100.0
    fake = dict(real, leap_expires_mjd=leap, leap_expires_date=coordinates._mjd_date(leap))
    monkeypatch.setattr(coordinates, "_eop_limits", lambda: fake)
    cov = coordinates.eop_coverage(Time(leap + 1.0, format="mjd", scale="utc"))
    assert cov["beyond_leap"] and not cov["beyond_eop"]
    t = Time(cov["leap_expires_mjd"] + 1.0, format="mjd", scale="utc")
    line = coordinates.check_eop(t)
    assert cov["leap_expires_date"] in line and "leap-second" in line
    assert "Earth-orientation" not in line
