"""The scheduler of a plan (issue 14, item 2), checked against astropy: elevations and Sun
distances at the scheduled times from astropy's AltAz (no refraction) and get_sun for the same
times; targets that never rise, that stay near the Sun or behind the horizon mask are skipped
with that reason; slew and settle time are in the schedule. Site: the fictional Heron Ridge."""

import numpy as np
import pytest
from astropy import units as u
from astropy.coordinates import AltAz, SkyCoord, get_sun
from astropy.time import Time

from spinflip.daemon.run.plan_file import plan_from_dict
from spinflip.daemon.run.scheduler import Limits, horizon_el_deg, schedule
from spinflip.daemon.sky import coordinates

pytestmark = pytest.mark.filterwarnings(   # separation of a distant source from the Sun
    "ignore::astropy.coordinates.NonRotationTransformationWarning")

SITE = coordinates.site_location(46.82, 8.37, 640.0)
START = Time("2026-10-15T18:00:00", scale="utc")


def _astropy_altaz(entry, when):
    t = entry.target
    frame = "galactic" if t.frame == "galactic" else "icrs"
    c = (SkyCoord(l=t.lon_deg * u.deg, b=t.lat_deg * u.deg, frame="galactic") if frame ==
         "galactic" else SkyCoord(ra=t.lon_deg * u.deg, dec=t.lat_deg * u.deg, frame="icrs"))
    time = Time(when.rstrip("Z"), scale="utc")
    aa = c.transform_to(AltAz(obstime=time, location=SITE, pressure=0 * u.hPa))
    sun = get_sun(time)
    return aa.az.deg, aa.alt.deg, sun.separation(c).deg


@pytest.fixture(scope="module")
def plane_night():
    sun_now = get_sun(START)           # geocentric apparent direction (GCRS); not ICRS, which
    #                                    is barycentric: the Sun sits near its origin
    plan = plan_from_dict({
        "name": "plane", "end": "2026-10-16T06:00:00",
        "target": [
            {"frame": "radec", "lon": 30.0, "lat": -80.0, "seconds": 300, "object": "DEEPSOUTH"},
            {"frame": "radec", "lon": float(sun_now.ra.deg), "lat": float(sun_now.dec.deg),
             "seconds": 300, "object": "SUNWARD"},
        ],
        "survey": [{"kind": "galactic-plane", "lon_from": 20, "lon_to": 200, "lon_step": 20,
                    "lat": 0, "seconds": 600}],
    })
    limits = Limits(min_elevation_deg=20.0, sun_avoid_deg=15.0, slew_deg_s=1.5, settle_s=8.0)
    return plan, limits, schedule(plan, SITE, START, limits, park=(180.0, 45.0))


def test_scheduled_positions_agree_with_astropy_and_respect_the_limits(plane_night):
    _, limits, entries = plane_night
    done = [e for e in entries if e.status == "scheduled"]
    assert len(done) >= 8
    for e in done:
        for when, az, el in ((e.start_utc, e.az_start_deg, e.el_start_deg),
                             (e.end_utc, e.az_end_deg, e.el_end_deg)):
            a_az, a_el, sun = _astropy_altaz(e, when)
            # the schedule rounds its times to the second: 1 s moves a source < 0.005 deg
            assert abs(el - a_el) < 0.01 and abs((az - a_az + 180) % 360 - 180) < 0.05
            assert a_el >= limits.min_elevation_deg - 0.01
            assert sun >= limits.sun_avoid_deg
        assert e.sun_distance_deg >= limits.sun_avoid_deg
        assert Time(e.end_utc.rstrip("Z")) <= Time("2026-10-16T06:00:00")


def test_slew_and_settle_are_part_of_the_schedule(plane_night):
    _, limits, entries = plane_night
    done = [e for e in entries if e.status == "scheduled"]
    for prev, e in zip(done, done[1:], strict=False):   # consecutive pairs
        gap = (Time(e.start_utc.rstrip("Z")) - Time(prev.end_utc.rstrip("Z"))).to_value("s")
        daz = abs((e.az_start_deg - prev.az_end_deg + 180) % 360 - 180)
        # the slew is judged from where the target is when the dish sets off
        assert e.slew_s >= limits.settle_s
        assert gap >= e.slew_s - 1.0
        if gap < e.slew_s + 1.0:         # observed at once: the slew covers the travel
            assert e.slew_s * limits.slew_deg_s + 1.0 >= min(daz, 360 - daz) - 2.0
    starts = [Time(e.start_utc.rstrip("Z")) for e in done]
    assert all(a < b for a, b in zip(starts, starts[1:], strict=False))   # in order


def test_what_never_rises_or_stays_near_the_sun_is_skipped_with_that_reason(plane_night):
    _, _, entries = plane_night
    by = {e.target.object: e for e in entries}
    assert by["DEEPSOUTH"].status == "skipped"
    assert "below the elevation limit of 20 deg" in by["DEEPSOUTH"].reason
    # near the Sun, it is down all night: the true reason is the elevation
    assert by["SUNWARD"].status == "skipped" and "elevation limit" in by["SUNWARD"].reason
    # astropy: Dec -80 never rises above 20 deg at latitude 46.8 (max el = 90 - 46.8 - 80 < 0)
    assert 90 - 46.82 - 80 < 20


def test_the_horizon_mask_is_honoured():
    plan = plan_from_dict({"name": "m", "survey": [{"kind": "galactic-plane", "lon_from": 20,
                                                    "lon_to": 180, "lon_step": 40, "lat": 0,
                                                    "seconds": 300}]})
    mask = ((0.0, 10.0), (90.0, 10.0), (135.0, 70.0), (225.0, 70.0), (270.0, 10.0))
    limits = Limits(min_elevation_deg=15.0, horizon=mask, max_hours=12.0)
    entries = schedule(plan, SITE, START, limits)
    done = [e for e in entries if e.status == "scheduled"]
    assert done
    for e in done:
        for az, el in ((e.az_start_deg, e.el_start_deg), (e.az_end_deg, e.el_end_deg)):
            assert el >= float(horizon_el_deg(mask, np.array([az]))[0]) - 1e-6
    # the mask is interpolated in azimuth and wraps at 360 deg
    assert horizon_el_deg(mask, np.array([180.0, 112.5, 315.0]))[0] == pytest.approx(70.0)
    assert horizon_el_deg(mask, np.array([112.5]))[0] == pytest.approx(40.0)
    assert horizon_el_deg(mask, np.array([315.0]))[0] == pytest.approx(10.0)


def test_as_written_keeps_the_file_order_of_what_is_up():
    plan = plan_from_dict({"name": "w", "order": "as-written", "target": [
        {"frame": "galactic", "lon": 90.0, "lat": 0.0, "seconds": 120},
        {"frame": "galactic", "lon": 60.0, "lat": 0.0, "seconds": 120},
        {"frame": "galactic", "lon": 120.0, "lat": 0.0, "seconds": 120}]})
    entries = schedule(plan, SITE, START, Limits(min_elevation_deg=10.0, max_hours=2.0))
    assert [e.target.lon_deg for e in entries if e.status == "scheduled"] == [90.0, 60.0, 120.0]


def test_in_daylight_a_target_near_the_sun_is_skipped_for_the_sun():
    noon = Time("2026-10-15T10:00:00", scale="utc")
    sun = get_sun(noon)
    plan = plan_from_dict({"name": "day", "end": "2026-10-15T14:00:00", "target": [
        {"frame": "radec", "lon": float(sun.ra.deg) + 5.0, "lat": float(sun.dec.deg),
         "seconds": 300, "object": "SUNWARD"},
        {"frame": "radec", "lon": float(sun.ra.deg) + 60.0, "lat": float(sun.dec.deg),
         "seconds": 300, "object": "CLEAR"}]})
    limits = Limits(min_elevation_deg=10.0, sun_avoid_deg=15.0)
    by = {e.target.object: e for e in schedule(plan, SITE, noon, limits)}
    assert by["SUNWARD"].status == "skipped"
    assert "within 15 deg of the Sun" in by["SUNWARD"].reason
    assert by["CLEAR"].status == "scheduled"
    _, _, sep = _astropy_altaz(by["CLEAR"], by["CLEAR"].start_utc)
    assert sep >= 15.0 and abs(sep - by["CLEAR"].sun_distance_deg) < 1.0
