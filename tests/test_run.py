"""End-to-end runs of the daemon: simulator, replay, bad input, kill -9 recovery."""

import os
import signal
import subprocess
import sys
import time

import numpy as np
import pytest
from astropy.io import fits
from cli_runner import NO_PORTS, run_cli_inprocess

from spinflip.daemon.dsp.samples import complex_to_u8

SIM_CONFIG = """
[sim]
start = "2026-03-01T04:00:00"
seed = 7
[pointing]
frame = "galactic"
lon = 30.0
lat = 0.0
[spectrometer]
integration_s = 5.0
""" + NO_PORTS


def _run(args, cwd=None, timeout=120):
    return subprocess.run([sys.executable, "-m", "spinflip.cli", *args], cwd=cwd,
                          capture_output=True, text=True, timeout=timeout)


@pytest.fixture(scope="module")
def sim_scan(clean_l30_scan):
    """The simulated scan of SIM_CONFIG (40 s), computed once per session (tests/conftest.py,
    tests/sim_scans.py) and shared with test_rfi_sim.py."""
    return clean_l30_scan["path"]


def test_sim_scan_follows_the_file_contract(sim_scan):
    with fits.open(sim_scan) as hdul:
        tab = hdul[1]
        h = tab.header
        assert h["EXTNAME"] == "SINGLE DISH"
        for key in ("SITELAT", "SITELONG", "SITEELEV", "TELESCOP", "SPECSYS"):
            assert key in h
        d = tab.data
        assert len(d) >= 5
        cols = tab.columns
        for name in ("DATA", "FLAGGED", "TSYS", "EXPOSURE", "DATE-OBS", "CRVAL1", "CDELT1", "CRPIX1",
                     "CTYPE1", "RESTFREQ", "VFRAME", "GLON", "GLAT", "AZIMUTH", "ELEVATIO", "OBJECT"):
            assert name in cols.names
        assert cols["DATA"].unit == "K"
        assert d["DATA"].shape[1] == 1024 and d["DATA"].dtype.kind == "f"
        assert np.all(np.abs(d["GLON"] - 30.0) < 1e-6)
        assert np.all(d["ELEVATIO"] > 10)
        assert np.all(np.diff([np.datetime64(t) for t in d["DATE-OBS"]]).astype(float) > 0)


def test_sim_line_where_the_model_galaxy_puts_it(sim_scan):
    # At l = 30 deg, b = 0 first-quadrant gas lies between about 0 and +120 km/s (LSR), up to the
    # terminal velocity (a fact of the trade: inner-Galaxy gas has positive velocities in
    # quadrant I, the terminal velocity at l = 30 deg being about Theta0 (1 - sin l) ~ 110 km/s).
    with fits.open(sim_scan) as hdul:
        d = hdul[1].data
    i = np.arange(d["DATA"].shape[1])
    f = d["CRVAL1"][0] + (i + 1 - d["CRPIX1"][0]) * d["CDELT1"][0]
    v = 299792.458 * (d["RESTFREQ"][0] - f) / d["RESTFREQ"][0] + d["VFRAME"][0] / 1e3
    ok = ~d["FLAGGED"].any(axis=0)
    spec = d["DATA"].mean(axis=0)
    # smooth over 8 channels to beat the noise of 30 s
    sm = np.convolve(np.where(ok, spec, 0), np.ones(8) / 8, mode="same")
    peak_v = v[ok][np.argmax(sm[ok])]
    assert 0 < peak_v < 120
    strong = ok & (sm > 0.3 * sm[ok].max())
    assert v[strong].min() > -30 and v[strong].max() < 140
    # The folded spectrum of in-band switching is T(v) - [T(v + dv) + T(v - dv)] / 2 with dv the
    # switch offset in velocity (negative ghosts, common practice); the model galaxy's own
    # profile, folded the same way, must match the measured shape.
    from spinflip.daemon.sources.galaxy import ModelGalaxy
    vg = np.linspace(-600, 600, 4801)
    tb = ModelGalaxy().brightness_temperature(30.0, 0.0, vg, beam_fwhm_deg=np.degrees(1.2 * 0.2110 / 3.0))
    dv = 299792.458 * 0.8e6 / d["RESTFREQ"][0]
    model = np.interp(v, vg, tb) - 0.5 * (np.interp(v + dv, vg, tb) + np.interp(v - dv, vg, tb))
    r = np.corrcoef(sm[ok][8:-8], model[ok][8:-8])[0, 1]
    assert r > 0.95
    assert 20 < sm[ok].max() < 200          # K: HI in the plane peaks at tens of kelvin


def test_inspect_reports_line(sim_scan):
    r = _run(["inspect", str(sim_scan), "--json"])
    assert r.returncode == 0, r.stderr
    import json
    summary = json.loads(r.stdout)
    assert summary["rows"] >= 5 and summary["data_unit"] == "K"
    # peak of first-quadrant gas at l = 30 deg lies between 0 and +120 km/s (fact of the trade)
    assert 0 < summary["line_velocity_lsrk_km_s"] < 120
    # measured with the simulated noise source: receiver 55 K + spillover 12 K + continuum ~7 K
    assert 70 < summary["tsys_mean_k"] < 80


def _cu8(path, n, seed=3):
    rng = np.random.default_rng(seed)
    x = (0.15 * (rng.standard_normal(n) + 1j * rng.standard_normal(n))).astype(np.complex64)
    path.write_bytes(complex_to_u8(x).tobytes())


def test_replay_runs_in_counts(tmp_path):
    cap = tmp_path / "cap.cu8"
    _cu8(cap, 2_400_000)
    cfg = tmp_path / "c.toml"
    cfg.write_text(NO_PORTS)
    r = _run(["run", "--config", str(cfg), "--source", f"replay:{cap}", "--fast", "--out",
              str(tmp_path / "o"),
              "--sample-rate", "2.4e6", "--center-freq", "1420.4e6"])
    assert r.returncode == 0, r.stderr
    f = next((tmp_path / "o").glob("*.fits"))
    assert f"to {f}" in r.stdout and r.stdout.startswith("saved ")     # what was written
    with fits.open(f) as h:
        assert h[1].columns["DATA"].unit == "count"
        assert h[1].data["CRVAL1"][0] == 1420.4e6


@pytest.mark.parametrize("make, fragment", [
    (lambda p: p.write_bytes(b"\x80" * 1001), "odd length"),
    (lambda p: p.write_bytes(b""), "empty"),
    (lambda p: p.write_bytes(b"\x80" * 100), "too short"),
    (lambda p: None, "not found"),
])
def test_bad_replay_files_exit_2_and_write_nothing(tmp_path, make, fragment):
    cap = tmp_path / "cap.cu8"
    make(cap)
    out = tmp_path / "o"
    r = run_cli_inprocess(["run", "--source", f"replay:{cap}", "--fast", "--out", str(out)])
    assert r.returncode == 2
    assert fragment in r.stderr and str(cap) in r.stderr
    assert len(r.stderr.strip().splitlines()) == 1
    assert not list(out.glob("*")) if out.exists() else True


@pytest.mark.parametrize("args, fragment", [
    (["--sample-rate", "500000"], "source.sample_rate"),
    (["--duration", "-3"], "positive number"),
    (["--source", "usb"], "--source 'usb'"),
])
def test_bad_options_exit_2(tmp_path, args, fragment):
    r = run_cli_inprocess(["run", "--fast", "--out", str(tmp_path / "o"), *args])
    assert r.returncode == 2
    assert fragment in r.stderr


def test_unwritable_output_folder_exit_2(tmp_path):
    # a real subprocess (python -m spinflip.cli), as test_rtlsdr_without_librtlsdr_says_how_to_fix
    # below: the entry point's own exit codes 2 and 1; the other exit-code tests run in-process
    blocker = tmp_path / "file"
    blocker.write_text("x")
    r = _run(["run", "--fast", "--duration", "5", "--out", str(blocker / "sub")])
    assert r.returncode == 2
    assert "output folder" in r.stderr and "not writable" in r.stderr


def test_target_below_horizon_refused(tmp_path):
    cfg = tmp_path / "c.toml"
    cfg.write_text('[pointing]\nframe = "azel"\nlon = 180.0\nlat = 2.0\n')
    r = run_cli_inprocess(["run", "--config", str(cfg), "--fast", "--duration", "5", "--out",
                           str(tmp_path / "o")])
    assert r.returncode == 2 and "min_elevation" in r.stderr


def test_kill_9_then_restart_recovers_every_finished_integration(tmp_path):
    cfg = tmp_path / "c.toml"
    cfg.write_text(SIM_CONFIG.replace("integration_s = 5.0", "integration_s = 1.0"))
    out = tmp_path / "out"
    proc = subprocess.Popen([sys.executable, "-m", "spinflip.cli", "run", "--config",
                             str(cfg), "--out", str(out)],
                            stdout=subprocess.PIPE, stderr=subprocess.PIPE, text=True)
    from spinflip.daemon.storage.journal import count_rows
    journal = None
    deadline = time.monotonic() + 60
    while time.monotonic() < deadline:       # real-time pacing: wait for three finished rows
        js = list(out.glob("*.journal"))
        if js and count_rows(js[0]) >= 3:
            journal = js[0]
            break
        time.sleep(0.1)
    assert journal is not None, "no journal grew"
    time.sleep(0.5)                          # kill in the middle of the next integration
    os.kill(proc.pid, signal.SIGKILL)
    proc.wait()
    assert not list(out.glob("*.fits"))
    n_rows_in_journal = count_rows(journal)
    r = _run(["run", "--config", str(cfg), "--fast", "--duration", "2", "--out", str(out)])
    assert r.returncode == 0, r.stderr
    assert "recovered" in r.stderr
    files = sorted(out.glob("*.fits"))
    assert len(files) == 2
    assert not list(out.glob("*.journal"))
    recovered = out / (journal.stem + ".fits")
    assert recovered in files
    with fits.open(recovered) as h:
        rows = len(h[1].data)
    assert rows >= 3 and rows == n_rows_in_journal


def test_rtlsdr_without_librtlsdr_says_how_to_fix(tmp_path):
    # no dongle library on this machine: one line naming the fix, exit 1, nothing written
    out = tmp_path / "o"
    cfg = tmp_path / "c.toml"
    cfg.write_text('[calibration]\ntsys_from = "fixed"\n')
    r = _run(["run", "--config", str(cfg), "--source", "rtlsdr", "--duration", "1", "--out", str(out)])
    if r.returncode == 1 and "librtlsdr not found" in r.stderr:
        assert "apt-get install librtlsdr0" in r.stderr
    else:   # a machine with librtlsdr but no dongle
        assert r.returncode == 1 and "no RTL-SDR dongle" in r.stderr
    assert not list(out.glob("*"))
