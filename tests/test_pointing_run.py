"""Pointing on the simulator: drift scans, a target setting during a scan, stale Earth tables."""

import numpy as np
from astropy import units as u
from astropy.coordinates import AltAz, SkyCoord
from astropy.io import fits
from astropy.time import Time
from cli_runner import NO_PORTS, run_cli_inprocess, write_config

from spinflip.daemon.sky import coordinates

START = "2026-03-01T04:00:00"


def _run(tmp_path, text, duration):
    cfg = write_config(tmp_path / "c.toml", text + NO_PORTS)
    r = run_cli_inprocess(["run", "--config", cfg, "--fast", "--duration", duration, "--out",
                           tmp_path / "o"])
    files = sorted((tmp_path / "o").glob("*.fits"))
    return r, files


def test_drift_scan_records_the_sky_position_of_each_row(tmp_path):
    # fixed az/el: the sky drifts through the beam; each row's RA/Dec and l/b must be the
    # position at its DATE-OBS (astropy AltAz -> ICRS/Galactic, built here)
    r, files = _run(tmp_path, f"""[sim]\nstart = "{START}"\n[pointing]\nframe = "azel"
lon = 180.0\nlat = 60.0\n[spectrometer]\nintegration_s = 3.0\n[calibration]\ntsys_from = "fixed"\n""", 12)
    assert r.returncode == 0, r.stderr
    with fits.open(files[0]) as h:
        head, rows = h[1].header, h[1].data
    assert head["PNTFRAME"] == "azel" and rows["OBJECT"][0] == "AZ180.0EL60.0"
    loc = coordinates.site_location(head["SITELAT"], head["SITELONG"], head["SITEELEV"])
    t = Time(list(rows["DATE-OBS"]), scale="utc")
    aa = SkyCoord(az=np.full(len(t), 180.0) * u.deg, alt=np.full(len(t), 60.0) * u.deg,
                  frame=AltAz(obstime=t, location=loc))
    np.testing.assert_allclose(rows["RA"], aa.icrs.ra.deg, atol=1e-5)
    np.testing.assert_allclose(rows["DEC"], aa.icrs.dec.deg, atol=1e-5)
    np.testing.assert_allclose(rows["GLON"], aa.galactic.l.deg, atol=1e-5)
    np.testing.assert_allclose(rows["ELEVATIO"], 60.0, atol=1e-6)
    # on the meridian RA advances at the sidereal rate, 15.041 deg per hour (from memory)
    dra = (rows["RA"][-1] - rows["RA"][0]) / ((t[-1] - t[0]).to_value(u.h))
    assert abs(dra - 15.041) < 0.05


def test_target_setting_during_the_scan_is_flagged_and_said(tmp_path):
    # a target just above the limit in the west sets during the scan: an error event, and
    # the rows from then on are saved fully flagged (never silently)
    loc = coordinates.site_location(46.82, 8.37, 640.0)
    t0 = Time(START, scale="utc")
    c = SkyCoord(az=270 * u.deg, alt=10.03 * u.deg, frame=AltAz(obstime=t0, location=loc)).icrs
    r, files = _run(tmp_path, f"""[sim]\nstart = "{START}"\n[pointing]\nframe = "radec"
lon = {c.ra.deg}\nlat = {c.dec.deg}\nmin_elevation = 10.0\n[spectrometer]\nintegration_s = 3.0
[calibration]\ntsys_from = "fixed"\n""", 30)
    assert r.returncode == 0, r.stderr
    assert "below pointing.min_elevation" in r.stderr
    with fits.open(files[0]) as h:
        rows = h[1].data
    low = rows["ELEVATIO"] < 10.0
    assert low.any() and (~low).any()
    assert np.all(rows["FLAGGED"][low]) and not np.all(rows["FLAGGED"][~low])


def test_beyond_the_earth_orientation_tables_warns_and_works(tmp_path):
    r, files = _run(tmp_path, """[sim]\nstart = "2031-06-01T22:00:00"\n[spectrometer]
integration_s = 2.0\n[calibration]\ntsys_from = "fixed"\n""", 3)
    assert r.returncode == 0, r.stderr
    warn = [l for l in r.stderr.splitlines() if l.startswith("warning:")]
    assert warn and "astropy-iers-data" in warn[0]
    assert len(files) == 1
