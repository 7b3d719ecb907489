"""Faults at the dish: SIGTERM, systemd's notify protocol, clock steps, a full disk.

The dongle unplugged in mid-scan is in ``test_unplug.py`` (it needs the emulated librtlsdr);
kill -9 and recovery is in ``test_run.py``.
"""

import errno
import json
import os
import re
import shutil
import signal
import socket
import subprocess
import sys
import threading
import time
from pathlib import Path

import numpy as np
import pytest
from astropy.io import fits
from astropy.time import Time
from cli_runner import live_config

from spinflip.daemon import config
from spinflip.daemon.products.row import Row
from spinflip.daemon.run.observation import Daemon
from spinflip.daemon.sky.coordinates import SkyPosition
from spinflip.daemon.sources.sample_clock import SampleClock
from spinflip.daemon.storage import archive
from spinflip.daemon.storage.items import OpenScan
from spinflip.daemon.storage.journal import count_rows
from spinflip.daemon.storage.writer import ScanStore

pytestmark = pytest.mark.live      # real-time: seconds of wall time (CI runs it)

REPO = Path(__file__).resolve().parents[1]


def _unit_stop_timeout_s() -> float:
    text = (REPO / "systemd" / "spinflip.service").read_text()
    return float(re.search(r"^TimeoutStopSec=(\d+)", text, re.M).group(1))


def _fits_rows(path: Path):
    with fits.open(path) as h:
        return h[1].header, h[1].data


# -- systemd notify protocol and SIGTERM ------------------------------------------------------
def test_notify_ready_watchdog_and_sigterm_keeps_the_integration_in_progress(tmp_path):
    """sd_notify(3): READY=1 once up, WATCHDOG=1 every WATCHDOG_USEC/2 (sd_watchdog_enabled(3)
    advises half), STOPPING=1 on the way down; systemd.service(5): the service must be gone
    within TimeoutStopSec of SIGTERM, and then the integration in progress is in the file."""
    sock_path = str(tmp_path / "notify")
    sock = socket.socket(socket.AF_UNIX, socket.SOCK_DGRAM)
    sock.bind(sock_path)
    sock.settimeout(0.5)
    cfg = tmp_path / "c.toml"
    cfg.write_text(live_config(2.0))
    out = tmp_path / "out"
    env = dict(os.environ, NOTIFY_SOCKET=sock_path, WATCHDOG_USEC="400000")
    env.pop("WATCHDOG_PID", None)
    proc = subprocess.Popen([sys.executable, "-m", "spinflip.cli", "run", "--config",
                             str(cfg), "--out", str(out)], env=env,
                            stdout=subprocess.PIPE, stderr=subprocess.PIPE, text=True)
    got: list[tuple[float, str]] = []
    try:
        deadline = time.monotonic() + 60
        journal = None
        while time.monotonic() < deadline:
            try:
                got.append((time.monotonic(), sock.recv(4096).decode()))
            except TimeoutError:
                pass
            js = list(out.glob("*.journal"))
            if js and count_rows(js[0]) >= 1 and journal is None:
                journal, t_row = js[0], time.monotonic()
            if journal is not None and time.monotonic() - t_row > 1.0:
                break                      # about half-way through the second integration
        assert journal is not None, "no integration was written"
        proc.send_signal(signal.SIGTERM)
        t_term = time.monotonic()
        while proc.poll() is None and time.monotonic() - t_term < _unit_stop_timeout_s():
            try:
                got.append((time.monotonic(), sock.recv(4096).decode()))
            except TimeoutError:
                pass
        t_gone = time.monotonic()
        stdout, stderr = proc.communicate(timeout=10)
    finally:
        if proc.poll() is None:
            proc.kill()
        sock.close()
    # gone within the unit's stop timeout, cleanly
    assert t_gone - t_term < _unit_stop_timeout_s() and proc.returncode == 0, stderr
    msgs = [m for _, m in got]
    assert msgs and "READY=1" in msgs[0].split("\n"), msgs[:3]
    pings = [t for t, m in got if "WATCHDOG=1" in m.split("\n")]
    assert len(pings) >= 5
    gaps = np.diff(pings)
    # WATCHDOG_USEC = 0.4 s: pings every 0.2 s (loose: a factor 2 either way on a busy machine)
    assert 0.1 < float(np.median(gaps)) < 0.4, gaps
    assert any(m.startswith("STATUS=") or "\nSTATUS=" in m for m in msgs)
    assert any("STOPPING=1" in m.split("\n") for m in msgs)
    # the integration in progress at SIGTERM is kept, shorter, and says how long it is
    (fits_path,) = out.glob("*.fits")
    _, data = _fits_rows(fits_path)
    assert len(data) == 2, stderr
    assert data["EXPOSURE"][0] > data["EXPOSURE"][1] > 0
    assert "dropped" not in stderr


# -- clock steps ------------------------------------------------------------------------------
class _SteppableWall:
    """time.time with steps added on cue (the system clock set by NTP or by hand)."""

    def __init__(self):
        self.offset_s = 0.0

    def __call__(self) -> float:
        return time.time() + self.offset_s


def test_clock_steps_keep_timestamps_monotonic_and_are_recorded(tmp_path):
    """POSIX clock_gettime: CLOCK_REALTIME may be stepped, CLOCK_MONOTONIC never. A forward
    step (a board without an RTC set right by NTP) is followed; a backward one is not, so
    DATE-OBS never decreases; both are events and HISTORY cards of the scan."""
    cfg = config.load(None)
    config.merge(cfg, {"source": {"sample_rate": 1.2e6, "block_samples": 131072},
                       "sim": {"start": "now"},
                       "pointing": {"frame": "azel", "lon": 0.0, "lat": 80.0},
                       "spectrometer": {"integration_s": 0.5},
                       "calibration": {"tsys_from": "fixed"},
                       "publish": {"data": "", "control": ""},
                       "output": {"dir": str(tmp_path / "out")}}, origin="test")
    logs: list[str] = []
    d = Daemon(cfg, duration_s=4.5, log=logs.append)
    wall = _SteppableWall()
    real_open = d.source.open

    def open_with_steppable_clock():
        real_open()
        d.source.clock = SampleClock(wall=wall)
    d.source.open = open_with_steppable_clock

    def step_later():
        time.sleep(1.5)
        wall.offset_s += 3600.0            # forward an hour
        time.sleep(1.5)
        wall.offset_s -= 100.0             # back 100 s
    threading.Thread(target=step_later, daemon=True).start()
    result = d.run()
    (path,) = result.files
    header, data = _fits_rows(path)
    t = Time(list(data["DATE-OBS"]), format="isot", scale="utc").unix
    assert np.all(np.diff(t) > 0), np.diff(t)
    jumps = np.diff(t)
    assert 3590 < jumps.max() < 3610                      # the forward step is followed
    assert np.sum(jumps > 10) == 1                         # and nothing else jumps
    texts = [text for sev, text in d.events if sev == "warning"]
    assert any("stepped forward by 3600" in x for x in texts), texts
    assert any("stepped back by 100" in x for x in texts), texts
    history = " ".join(str(v) for v in header.get("HISTORY", []))
    assert "stepped forward" in history and "stepped back" in history


# -- the disk refusing writes -----------------------------------------------------------------
def _row(i: int, nchan: int = 8) -> Row:
    t_unix_s = Time("2026-03-01T00:00:00", scale="utc").unix + i
    return Row(data=np.full(nchan, float(i), np.float32), flagged=np.zeros(nchan, bool),
               tsys_k=80.0, exposure_s=1.0, date_obs=Time(t_unix_s, format="unix").isot,
               lo_hz=1.42e9, channel_hz=1e3, crpix=5.0, restfreq_hz=1.420405751768e9,
               vframe_m_s=0.0, object="TEST",
               position=SkyPosition(30.0, 0.0, 0.0, 0.0, 0.0, 80.0))


_HEADER = {"TELESCOP": "HRFS-3", "SITELAT": 54.0, "SITELONG": -2.0, "SITEELEV": 300.0,
           "SPECSYS": "TOPOCENT", "BUNIT": "K"}


def test_store_holds_rows_while_the_disk_refuses_then_writes_them_in_order(tmp_path,
                                                                         monkeypatch):
    """ENOSPC (errno(3)) on the journal append: rows wait in memory, an error event says so,
    writing resumes by itself and the FITS file holds every row in order."""
    full = {"on": False}
    real_write_all = archive.write_all

    def write_all(fd, data):
        if full["on"]:
            raise OSError(errno.ENOSPC, "No space left on device")
        real_write_all(fd, data)
    monkeypatch.setattr(archive, "write_all", write_all)
    events = []
    store = ScanStore(tmp_path, 8, None, lambda sev, text: events.append((sev, text)),
                      hold_bytes=10_000_000, retry_s=0.05)
    store.start()
    store.put(OpenScan("scan-a", _HEADER))
    for i in range(3):
        store.put(_row(i))
    _wait(lambda: store.q.empty() and not store.held)
    full["on"] = True
    for i in range(3, 10):
        store.put(_row(i))
    _wait(lambda: store.state == "holding" and store.held_rows == 7)
    assert any(sev == "error" and "held in memory" in text for sev, text in events)
    full["on"] = False
    _wait(lambda: store.state == "writing")
    assert any(sev == "info" and "resumed" in text for sev, text in events)
    store.finish()
    (path,) = store.files
    _, data = _fits_rows(path)
    assert [float(d[0]) for d in data["DATA"]] == [float(i) for i in range(10)]
    assert not list(tmp_path.glob("*.journal")) and not list(tmp_path.glob("*.tmp"))


def test_store_bounds_its_memory_and_says_what_it_dropped(tmp_path, monkeypatch):
    def write_all(fd, data):
        raise OSError(errno.ENOSPC, "No space left on device")
    events = []
    store = ScanStore(tmp_path, 8, None, lambda sev, text: events.append((sev, text)),
                      hold_bytes=5 * (8 * 4 + 8), retry_s=0.05)   # 5 rows: DATA f4 + FLAGGED
    store.start()
    store.put(OpenScan("scan-b", _HEADER))
    _wait(lambda: store.scan_name is not None)
    monkeypatch.setattr(archive, "write_all", write_all)
    for i in range(8):
        store.put(_row(i))
    _wait(lambda: store.dropped_rows + store.held_rows == 8)
    assert store.held_rows == 5 and store.dropped_rows == 3
    assert any("dropped" in text for _, text in events)
    store.finish(give_up_after_s=0.3)
    assert store.unsaved_rows == 5
    assert any(sev == "error" and "5 integration(s) that could not be written" in text
               for sev, text in events)
    # nothing half-written is left: the scan had no row on disk, so no file at all
    assert list(tmp_path.iterdir()) == []


def _wait(cond, timeout_s: float = 10.0) -> None:
    deadline = time.monotonic() + timeout_s
    while not cond():
        assert time.monotonic() < deadline, "timed out"
        time.sleep(0.02)


def _can_mount_private_tmpfs(tmp_path) -> bool:
    probe = tmp_path / "probe"
    probe.mkdir()
    if shutil.which("unshare") is None:
        return False
    r = subprocess.run(["unshare", "-m", "mount", "-t", "tmpfs", "-o", "size=64k", "probe",
                        str(probe)], capture_output=True)
    return r.returncode == 0


def test_daemon_on_a_full_disk_holds_then_writes_every_integration(tmp_path):
    """A real ENOSPC (errno(3)): the daemon writes onto a 2 MB tmpfs in a private mount
    namespace, the disk is filled while it observes and freed again. Every integration is in
    the file in the end, one every integration_s with no gap, and nothing half-written is left.
    Needs mount rights (root, CAP_SYS_ADMIN), which this project's machines and CI have; the
    same logic is also tested without them by the two store tests above."""
    if not _can_mount_private_tmpfs(tmp_path):
        pytest.skip("no rights to mount a tmpfs in a private mount namespace (unshare -m)")
    r = subprocess.run(["unshare", "-m", sys.executable, str(REPO / "tests" / "disk_full_driver.py"),
                        str(tmp_path)], capture_output=True, text=True, timeout=150)
    assert r.returncode == 0, r.stderr + r.stdout
    res = json.loads(r.stdout.strip().splitlines()[-1])
    log = res["log"]
    assert res["returncode"] == 0, log
    assert "writing paused" in log and "held in memory" in log and "resumed" in log
    assert [f for f in res["files"] if not f.endswith(".fits")] == [], res["files"]
    t = Time(res["dates"], format="isot", scale="utc").unix
    step = np.diff(t)
    # integrations of 0.5 s (rounded up to whole switching cycles): none missing while full
    assert len(t) >= 5 and np.all(step > 0)
    assert t[-1] - t[0] > res["full_s"]             # the rows span the time the disk was full
    assert step.max() < 1.6 * np.median(step), step
