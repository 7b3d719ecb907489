"""``spinflip loads`` on the simulator, and scans that use (or refuse) its record."""

import time

import numpy as np
import pytest
from astropy.io import fits
from cli_runner import NO_PORTS, run_cli, run_cli_inprocess, write_config

from spinflip.daemon.calibration import loads

# spillover 0 and a cold sky equal to calibration.t_cold_k make the simulator's receiver the
# Y-factor's Trx exactly (an absorber over the feed also blocks the spillover it would see)
SIM = """
[sim]
start = "2026-03-01T04:00:00"
seed = 11
spillover_k = 0.0
cold_sky_k = 10.0
[pointing]
frame = "galactic"
lon = 30.0
lat = 0.0
[spectrometer]
integration_s = 5.0
[publish]
data = ""
control = ""
[calibration]
t_cold_k = 10.0
t_hot_k = 290.0
loads_s = 3.0
"""


@pytest.fixture(scope="module")
def record(tmp_path_factory):
    d = tmp_path_factory.mktemp("loads")
    cfg = write_config(d / "c.toml", SIM)
    r = run_cli(["loads", "--config", cfg, "--fast", "--yes", "--out", d / "out"])
    assert r.returncode == 0, r.stderr
    (path,) = list((d / "out" / "calibration").glob("loads-*.json"))
    assert str(path) in r.stdout
    return d, cfg, path


def test_y_factor_on_the_simulator_recovers_its_receiver(record):
    # Trx = (Th - Y Tc)/(Y - 1) (the hot/cold method); the simulator's receiver is 55 K, its
    # noise source 70 K. Clipping of the 8-bit samples on the 345 K hot load lowers Y a little
    # (about 0.5 % at the default gain), so 2 % is allowed.
    _, _, path = record
    rec = loads.load_record(path)
    assert abs(rec.trx_k / 55.0 - 1) < 0.02
    assert abs(rec.tsys_cold_k / 65.0 - 1) < 0.02
    assert abs(rec.noise_source_k / 70.0 - 1) < 0.02
    assert rec.y == pytest.approx((290 + 55) / (10 + 55), rel=0.01)
    assert rec.gain_setting_db == 40.2 and rec.telescope == "HRFS 3 m dish"


def test_scan_with_the_loads_record_cites_it(record, tmp_path):
    d, cfg, path = record
    rec = loads.load_record(path)
    text = SIM + 'tsys_from = "loads"\n'
    cfg2 = write_config(tmp_path / "c.toml", text.replace("[calibration]", "[calibration]\nrecords = "
                                                          f'"{path.parent}"'))
    r = run_cli(["run", "--config", cfg2, "--fast", "--duration", 6, "--out", tmp_path / "o"])
    assert r.returncode == 0, r.stderr
    (scan,) = list((tmp_path / "o").glob("*.fits"))
    with fits.open(scan) as h:
        head, rows = h["SINGLE DISH"].header, h["SINGLE DISH"].data
    assert head["CALFILE"] == rec.name and head["TSYSSRC"].startswith("loads record")
    assert head["TRX"] == pytest.approx(rec.trx_k) and head["YFACTOR"] == pytest.approx(rec.y)
    np.testing.assert_allclose(rows["TSYS"], rec.tsys_cold_k)


def test_noise_source_temperature_taken_from_the_record(record, tmp_path):
    _, _, path = record
    rec = loads.load_record(path)
    cfg = write_config(tmp_path / "c.toml", SIM.replace("[calibration]", "[calibration]\nrecords = "
                                                        f'"{path.parent}"'))
    r = run_cli(["run", "--config", cfg, "--fast", "--duration", 6, "--out", tmp_path / "o"])
    assert r.returncode == 0, r.stderr
    (scan,) = list((tmp_path / "o").glob("*.fits"))
    head = fits.getheader(scan, "SINGLE DISH")
    assert head["TCAL"] == pytest.approx(rec.noise_source_k)
    assert rec.name in head["TCALSRC"] and head["CALFILE"] == rec.name


def test_old_record_is_refused(tmp_path):
    folder = tmp_path / "cal"
    meta = {"gain_setting_db": 40.2, "center_freq_hz": 1420405751.768, "sample_rate_hz": 2.4e6,
            "telescope": "HRFS 3 m dish", "site_name": "Heron Ridge Field Station"}
    old = loads.make_record(meta, p_hot_counts=5.0, p_cold_counts=1.0, t_hot_k=290.0,
                            t_cold_k=10.0, time_per_load_s=3.0, time_unix_s=time.time() - 2 * 86400)
    loads.save_record(old, folder)
    cfg = write_config(tmp_path / "c.toml",
                       f'[calibration]\ntsys_from = "loads"\nrecords = "{folder}"\n' + NO_PORTS)
    r = run_cli_inprocess(["run", "--config", cfg, "--fast", "--duration", 5, "--out", tmp_path / "o"])
    assert r.returncode == 2
    line = r.stderr.strip()
    assert "\n" not in line and old.name in line and "older than calibration.max_record_age_s" in line


def test_interactive_prompts_and_cancel_leave_no_record(tmp_path):
    cfg = write_config(tmp_path / "c.toml", SIM)
    # the observer presses Enter once, then the input ends (Ctrl-D): cancelled, nothing saved
    r = run_cli_inprocess(["loads", "--config", cfg, "--fast", "--out", tmp_path / "o"], stdin="\n")
    assert r.returncode == 130
    assert "Step 1 of 3: cover the feed with the absorber" in r.stdout
    assert "Step 2 of 3" in r.stdout and "cancelled" in r.stderr
    assert not list((tmp_path / "o").rglob("loads-*.json"))


def test_loads_refuses_a_replay(tmp_path):
    r = run_cli_inprocess(["loads", "--source", "replay:/nonexistent.cu8", "--out", tmp_path / "o"])
    assert r.returncode == 2 and "\n" not in r.stderr.strip() and "live receiver" in r.stderr


def test_absurd_y_is_refused_with_one_line_and_no_record(tmp_path):
    # a "cold" load hotter than the hot one (here: huge spillover on the sky) gives Y < 1
    cfg = write_config(tmp_path / "c.toml", SIM.replace("spillover_k = 0.0", "spillover_k = 300.0")
                       .replace("[calibration]", "[calibration]\nloads_s = 1.0").replace(
                           "loads_s = 3.0\n", "") + "[source]\n")
    r = run_cli_inprocess(["loads", "--config", cfg, "--fast", "--yes", "--out", tmp_path / "o"])
    assert r.returncode == 2, r.stderr
    lines = r.stderr.strip().splitlines()
    assert len(lines) == 1 and "Y = " in lines[0] and "not above 1" in lines[0]
    assert not list((tmp_path / "o").rglob("loads-*.json"))


def test_record_expiring_during_a_run_flags_and_says_so(record, tmp_path, monkeypatch):
    from spinflip.daemon import config
    from spinflip.daemon.run import observation
    _, _, path = record
    cfg = config.load(None)
    config.merge(cfg, {"calibration": {"tsys_from": "loads", "records": str(path.parent)},
                       "output": {"dir": str(tmp_path / "o")}})
    d = observation.Daemon(cfg, fast=True, log=lambda msg: None)
    tsys, age, ok = d.tsys.tsys_for(0.0)
    assert ok and tsys == loads.load_record(path).tsys_cold_k and 0 <= age < 600
    later = time.time() + cfg["calibration"]["max_record_age_s"] + 10
    monkeypatch.setattr(observation._time, "time", lambda: later)
    tsys, age, ok = d.tsys.tsys_for(0.0)
    assert not ok and age > cfg["calibration"]["max_record_age_s"]
    assert any(sev == "error" and "older than calibration.max_record_age_s" in text
               for sev, text in d.events)
