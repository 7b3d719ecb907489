"""Running a plan (issue 14, items 4 and 5): ``spinflip run --plan`` with a real ``rotctld -m 1``
(Hamlib's dummy rotator, a general-purpose tool from Debian's libhamlib-utils, moving about
6 deg/s in real time), the manual driver through the control socket, a fixed dish, bad plans,
and resuming after a restart.

Positions are checked against astropy's AltAz frame (the reference; no refraction, as the
daemon commands the geometric position) at each row's DATE-OBS.
"""

from __future__ import annotations

import json
import threading
import time
from pathlib import Path

import numpy as np
import pytest
from astropy import units as u
from astropy.coordinates import AltAz, EarthLocation, SkyCoord
from astropy.io import fits
from astropy.time import Time
from cli_runner import NO_PORTS, run_cli_inprocess
from rotctld_server import Rotctld

from spinflip.daemon import config as config_mod
from spinflip.daemon.live.control import request
from spinflip.daemon.live.ports import free_loopback_port
from spinflip.daemon.mount.rotctld import RotctldClient
from spinflip.daemon.run.observation import Daemon
from spinflip.daemon.run.plan_file import load_plan

pytestmark = pytest.mark.live

SITE = dict(lat=46.82, lon=8.37, height_m=640.0)
#: At this time l = 50..90 on the plane are rising in the north-east (el 10-18 deg) and
#: l = 10..40 are below 8 deg; the 15-minute window ends before those rise.
START = "2026-03-01T02:00:00"
END = "2026-03-01T02:15:00"
TOLERANCE_DEG = 1.0
#: Near the targets: the dummy rotator moves 6 deg/s in real time, and the suite waits for it.
PARK = (60.0, 15.0)


def station_config(tmp: Path, driver: str, endpoint: str = "", publish: str = NO_PORTS,
                   extra: str = "", park: tuple[float, float] = PARK) -> Path:
    rot = f'[rotator]\nendpoint = "{endpoint}"\ntolerance_deg = {TOLERANCE_DEG}\n' \
          f'timeout_s = 60\nanswer_s = 1.0\npoll_s = 0.2\naz_range = [-180.0, 450.0]\n' \
          f'park = [{park[0]}, {park[1]}]\n' if endpoint else ""
    text = (f'[sim]\nstart = "{START}"\n'
            f'[spectrometer]\nintegration_s = 2.0\n'
            f'[pointing]\ndriver = "{driver}"\nmin_elevation = 8.0\nslew_deg_s = 6.0\n'
            f'settle_s = 0.3\n{rot}{publish}\n{extra}')
    path = tmp / "station.toml"
    path.write_text(text)
    return path


def plane_plan(tmp: Path, seconds: float = 6.0) -> Path:
    path = tmp / "plane.toml"
    path.write_text(f'name = "plane-test"\nstart = "{START}"\nend = "{END}"\n'
                    f'[[survey]]\nkind = "galactic-plane"\nlon_from = 10.0\nlon_to = 90.0\n'
                    f'lon_step = 10.0\nlat = 0.0\nseconds = {seconds}\n')
    return path


def scans(out: Path) -> list[tuple[dict, np.ndarray]]:
    """(primary+table header, rows) of every scan in ``out``, in file-name order."""
    found = []
    for f in sorted(out.glob("scan-*.fits")):
        with fits.open(f) as hdul:
            hdu = hdul["SINGLE DISH"]
            found.append((dict(hdu.header), hdu.data.copy()))
    return found


@pytest.fixture(scope="module")
def rotator():
    rot = Rotctld().start()
    try:
        yield rot
    finally:
        rot.kill()


@pytest.fixture(scope="module")
def plane_night(tmp_path_factory, rotator):
    """One plan run shared by the checks below: the plane survey with the real rotator."""
    tmp = tmp_path_factory.mktemp("plane-night")
    cfg = station_config(tmp, "rotator", rotator.endpoint)
    plan = plane_plan(tmp)
    out = tmp / "out"
    t0 = time.monotonic()
    res = run_cli_inprocess(["run", "--config", str(cfg), "--plan", str(plan), "--fast",
                             "--out", str(out)])
    wall = time.monotonic() - t0
    sched = run_cli_inprocess(["plan", str(plan), "--config", str(cfg), "--start", START,
                               "--json"])
    return {"res": res, "out": out, "wall": wall, "schedule": json.loads(sched.stdout),
            "cfg": cfg, "plan": plan}


def test_the_plane_survey_gives_one_scan_per_target_that_is_up(plane_night):
    res = plane_night["res"]
    assert res.returncode == 0, res.stderr[-2000:]
    observed = [h["OBJECT"] for h, _ in scans(plane_night["out"])]
    planned = [e["object"] for e in plane_night["schedule"] if e["status"] == "scheduled"]
    assert sorted(observed) == sorted(planned)
    assert len(observed) == len(set(observed)) >= 4
    for h, rows in scans(plane_night["out"]):
        assert h["PLANNAME"] == "plane-test" and h["PLANSIZE"] == 9
        assert 1 <= h["PLANSTEP"] <= 9 and h["MOUNT"] == "rotator"
        assert len(rows) >= 1


def test_reached_positions_are_within_tolerance_of_the_target_at_date_obs(plane_night):
    """AZIMUTH/ELEVATIO (reported by rotctld) against astropy's AltAz of the target's l, b at
    each row's DATE-OBS; PNTERR is that angle."""
    site = EarthLocation(lat=SITE["lat"] * u.deg, lon=SITE["lon"] * u.deg,
                         height=SITE["height_m"] * u.m)
    n = 0
    for h, rows in scans(plane_night["out"]):
        for row in rows:
            t = Time(row["DATE-OBS"], scale="utc")
            target = SkyCoord(l=h["PNTLON"] * u.deg, b=h["PNTLAT"] * u.deg, frame="galactic")
            aa = target.transform_to(AltAz(obstime=t, location=site))
            reached = SkyCoord(az=row["AZIMUTH"] * u.deg, alt=row["ELEVATIO"] * u.deg,
                               frame=AltAz(obstime=t, location=site))
            sep = reached.separation(aa).deg
            assert sep <= TOLERANCE_DEG, (h["OBJECT"], row["DATE-OBS"], sep)
            assert row["PNTERR"] == pytest.approx(sep, abs=0.02)
            assert abs(row["GLON"] - h["PNTLON"]) < 1e-6 and abs(row["GLAT"]) < 1e-6
            n += 1
    assert n >= 8


def test_skipped_targets_are_said_and_their_reason_is_true(plane_night):
    """Every visit `spinflip plan` skips is below the elevation limit (8 deg) at the start
    and at the end of the window (astropy AltAz): the reason it gives is true."""
    site = EarthLocation(lat=SITE["lat"] * u.deg, lon=SITE["lon"] * u.deg,
                         height=SITE["height_m"] * u.m)
    skipped = [e for e in plane_night["schedule"] if e["status"] == "skipped"]
    assert skipped
    for e in skipped:
        assert "below the elevation limit of 8 deg" in e["reason"]
        c = SkyCoord(l=e["lon_deg"] * u.deg, b=e["lat_deg"] * u.deg, frame="galactic")
        for when in (START, END):
            alt = c.transform_to(AltAz(obstime=Time(when), location=site)).alt.deg
            assert alt < 8.0, (e["object"], when, alt)
    observed = {h["OBJECT"] for h, _ in scans(plane_night["out"])}
    assert not observed & {e["object"] for e in skipped}


def test_the_run_parks_and_says_what_it_did(plane_night, rotator):
    res = plane_night["res"]
    assert "plan 'plane-test' finished" in res.stderr
    assert "skipped" in res.stderr
    at = RotctldClient(rotator.endpoint, 2.0).get_position()
    assert abs(at.az_deg - PARK[0]) < TOLERANCE_DEG and abs(at.el_deg - PARK[1]) < TOLERANCE_DEG
    progress = list(plane_night["out"].glob("plan-plane-test-*.progress.json"))
    assert len(progress) == 1
    visits = json.loads(progress[0].read_text())["visits"]
    assert {v["outcome"] for v in visits.values()} == {"done"}


def test_a_finished_plan_run_again_observes_nothing_more(plane_night):
    """Resume: every visit is recorded done, so the same plan in the same folder ends at once
    without a new scan."""
    before = sorted(p.name for p in plane_night["out"].glob("scan-*.fits"))
    res = run_cli_inprocess(["run", "--config", str(plane_night["cfg"]), "--plan",
                             str(plane_night["plan"]), "--fast", "--out",
                             str(plane_night["out"])])
    assert res.returncode == 0, res.stderr[-2000:]
    assert "resuming plan 'plane-test'" in res.stderr
    assert sorted(p.name for p in plane_night["out"].glob("scan-*.fits")) == before


# -- faults ---------------------------------------------------------------------------------

def _wait(pred, timeout_s: float, what: str) -> None:
    deadline = time.monotonic() + timeout_s
    while time.monotonic() < deadline:
        if pred():
            return
        time.sleep(0.1)
    raise AssertionError(f"timed out waiting for {what}")


def _daemon(cfg_path: Path, plan_path: Path | None, out: Path) -> tuple[Daemon, threading.Thread,
                                                                         dict]:
    cfg = config_mod.load(cfg_path)
    config_mod.merge(cfg, {"output": {"dir": str(out)}})
    plan = load_plan(plan_path) if plan_path is not None else None
    d = Daemon(cfg, fast=True, plan=plan, log=lambda m: None)
    box: dict = {}

    def body():
        try:
            box["result"] = d.run()
        except BaseException as exc:  # noqa: BLE001 - reported by the test
            box["error"] = exc
    th = threading.Thread(target=body, daemon=True)
    th.start()
    return d, th, box


def test_rotctld_killed_mid_plan_abandons_the_target_and_goes_on_when_it_returns(tmp_path):
    rot = Rotctld().start()
    try:
        cfg = station_config(tmp_path, "rotator", rot.endpoint, park=(0.0, 20.0))
        plan = tmp_path / "two.toml"
        plan.write_text(f'name = "two"\nstart = "{START}"\norder = "as-written"\n'
                        '[[target]]\nframe = "galactic"\nlon = 120\nlat = 0\nseconds = 600\n'
                        '[[target]]\nframe = "galactic"\nlon = 130\nlat = 0\nseconds = 4\n')
        # at START both are near the north (az 5 and 354 deg, el 20 and 19: astropy AltAz),
        # a short slew from where the dummy rotator starts (0, 0)
        d, th, box = _daemon(cfg, plan, tmp_path / "out")
        try:
            _wait(lambda: d.visit is not None and d.row_index >= 1, 60, "the first rows")
            rot.kill()
            _wait(lambda: any("abandoned" in t for _, t in d.events), 20, "the abandon event")
            assert d.state.value == "waiting" and th.is_alive()
            rot.start()
            _wait(lambda: any("answers again" in t for _, t in d.events), 20, "the rotator back")
            _wait(lambda: not th.is_alive(), 90, "the plan's end")
        finally:
            d.stop_event.set()
            th.join(10)
    finally:
        rot.kill()
    assert "error" not in box, box.get("error")
    found = scans(tmp_path / "out")
    assert [h["OBJECT"] for h, _ in found] == ["G120.0+00.0", "G130.0+00.0"]
    # the abandoned visit keeps only integrations finished while the rotator answered
    (h1, rows1), (_, rows2) = found
    assert 1 <= len(rows1) and len(rows2) >= 1
    assert all(r["PNTERR"] <= TOLERANCE_DEG for _, rows in found for r in rows)
    visits = json.loads(next((tmp_path / "out").glob("plan-two-*.json")).read_text())
    outcomes = sorted(v["outcome"] for v in visits["visits"].values())
    assert outcomes == ["abandoned", "done"]


def test_a_target_outside_the_rotators_limits_is_refused(tmp_path, rotator):
    """az_range = [0, 180] leaves out the north-west: `plan` says so and the run skips it."""
    cfg = station_config(tmp_path, "rotator", rotator.endpoint)
    cfg.write_text(cfg.read_text().replace("az_range = [-180.0, 450.0]", "az_range = [0.0, 180.0]"))
    plan = tmp_path / "west.toml"
    # at START l = 150 is in the north-west (az 334 deg, el 16 deg: astropy AltAz)
    plan.write_text(f'name = "west"\nstart = "{START}"\nend = "{END}"\n'
                    '[[target]]\nframe = "galactic"\nlon = 150\nlat = 0\nseconds = 4\n')
    res = run_cli_inprocess(["plan", str(plan), "--config", str(cfg), "--json"])
    entry = json.loads(res.stdout)[0]
    assert entry["status"] == "skipped" and "outside the rotator's limits" in entry["reason"]
    run = run_cli_inprocess(["run", "--config", str(cfg), "--plan", str(plan), "--fast",
                             "--out", str(tmp_path / "out")])
    assert run.returncode == 0, run.stderr[-1500:]
    assert not list((tmp_path / "out").glob("scan-*.fits"))
    assert "outside the rotator's limits" in run.stderr


def test_manual_driver_is_driven_through_the_control_socket(tmp_path):
    data, control = free_loopback_port(), free_loopback_port()
    publish = (f'[publish]\ndata = "tcp://127.0.0.1:{data}"\n'
               f'control = "tcp://127.0.0.1:{control}"\n')
    cfg = station_config(tmp_path, "manual", publish=publish)
    plan = tmp_path / "hand.toml"
    plan.write_text(f'name = "hand"\nstart = "{START}"\n'
                    '[[target]]\nframe = "galactic"\nlon = 90\nlat = 0\nseconds = 6\n')
    d, th, box = _daemon(cfg, plan, tmp_path / "out")
    ep = f"tcp://127.0.0.1:{control}"
    try:
        _wait(lambda: d.mount.status().state == "waiting", 30, "the prompt")
        st = request(ep, "status", {})["result"]
        assert st["state"] == "waiting" and st["mount"]["driver"] == "manual"
        want_az, want_el = st["mount"]["target_az_deg"], st["mount"]["target_el_deg"]
        assert "point the dish at az" in st["mount"]["detail"]
        assert any("point the dish at az" in t for _, t in d.events)
        # a confirmation needs both angles or none
        bad = request(ep, "pointed", {"az_deg": 10.0})
        assert not bad["ok"] and "both az_deg and el_deg" in bad["error"]
        ok = request(ep, "pointed", {"az_deg": want_az + 0.5, "el_deg": want_el})
        assert ok["ok"], ok
        _wait(lambda: not th.is_alive(), 60, "the plan's end")
    finally:
        d.stop_event.set()
        th.join(10)
    assert "error" not in box, box.get("error")
    (h, rows), = scans(tmp_path / "out")
    assert h["MOUNT"] == "manual" and len(rows) >= 2
    # the confirmed position is what the rows record; the error grows as the sky turns
    assert np.all(np.abs(rows["AZIMUTH"] - (want_az + 0.5)) < 1e-6)
    assert np.all(rows["PNTERR"] >= 0.3)


def test_restart_in_mid_plan_resumes_without_repeating_a_finished_visit(tmp_path):
    """A fixed dish (driver none) with three drift visits; the daemon stopped during the
    second, started again with the same plan: visits 2 and 3 are observed, 1 is not."""
    cfg = station_config(tmp_path, "none")
    plan = tmp_path / "drift.toml"
    plan.write_text('name = "drifts"\norder = "as-written"\n'
                    + "".join(f'[[target]]\nframe = "azel"\nlon = {az}\nlat = 45\nseconds = {s}\n'
                              for az, s in ((100, 4), (150, 30), (200, 4))))
    out = tmp_path / "out"
    d, th, box = _daemon(cfg, plan, out)
    try:
        _wait(lambda: d.visit is not None and d.visit.step == 2 and d.row_index >= 1, 60,
              "the second visit under way")
    finally:
        d.stop_event.set()
        th.join(20)
    assert "error" not in box, box.get("error")
    first = [h["PLANSTEP"] for h, _ in scans(out)]
    assert first == [1, 2]
    d2, th2, box2 = _daemon(cfg, plan, out)
    th2.join(120)
    assert not th2.is_alive() and "error" not in box2, box2.get("error")
    steps = sorted(h["PLANSTEP"] for h, _ in scans(out))
    assert steps == [1, 2, 2, 3]              # visit 2 again (it was cut short), 1 not
    visits = json.loads(next(out.glob("plan-drifts-*.json")).read_text())["visits"]
    assert sorted(visits) == ["0:1", "1:1", "2:1"]


@pytest.mark.parametrize("text, words", [
    ('name = "x"\n[[target]]\nframe = "galactic"\nlon = 30\nlat = 0\nseconds = -5\n',
     "target[1].seconds"),
    ('name = "x"\n[[survey]]\nkind = "galactic-plane"\nlon_from = 10.0\nlon_to = 90.0\n'
     'lon_step = 0.0\nlat = 0.0\nseconds = 30\n', "survey[1].lon_step"),
    ('name = "x"\n[[target]]\nframe = "horizon"\nlon = 30\nlat = 0\nseconds = 5\n',
     "target[1].frame"),
    ('name = 3\n', "name"),
    ("not toml [", "not valid TOML"),
])
def test_bad_plan_files_give_one_line_exit_2_and_write_nothing(tmp_path, text, words):
    plan = tmp_path / "bad.toml"
    plan.write_text(text)
    out = tmp_path / "out"
    res = run_cli_inprocess(["run", "--plan", str(plan), "--fast", "--out", str(out),
                             "--duration", "2"] + ["--config", str(station_config(tmp_path,
                                                                                   "none"))])
    assert res.returncode == 2
    lines = [ln for ln in res.stderr.splitlines() if ln.strip()]
    assert len(lines) == 1 and words in lines[0], res.stderr
    assert not out.exists()


def test_a_fixed_dish_refuses_a_plan_of_moving_targets(tmp_path):
    """With a dongle (the simulator's dish follows any target); refused before it is opened."""
    plan = tmp_path / "p.toml"
    plan.write_text('name = "x"\n[[target]]\nframe = "galactic"\nlon = 30\nlat = 0\n'
                    'seconds = 5\n')
    cfg = station_config(tmp_path, "none", extra='[calibration]\ntsys_from = "fixed"\n')
    res = run_cli_inprocess(["run", "--plan", str(plan), "--source", "rtlsdr", "--config",
                             str(cfg), "--out",
                             str(tmp_path / "out")])
    assert res.returncode == 2
    assert "pointing.driver = 'none' is a fixed dish" in res.stderr
    assert len(res.stderr.strip().splitlines()) == 1

