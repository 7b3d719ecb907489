"""The dongle unplugged in mid-scan and plugged in again, with the daemon running.

``spinflip run --source rtlsdr`` runs in a subprocess against the emulated librtlsdr
(``tests/fake_librtlsdr.c``, through pyrtlsdr's real ctypes layer); the test pulls the
"dongle" through the emulator's control file while a subscriber listens.
"""

import os
import signal
import subprocess
import sys
import threading
import time

import pytest
import zmq
from astropy.io import fits
from cli_runner import live_config
from rtlsdr_emulator import emulator_env, fakertl_lib, set_control  # noqa: F401  (fixture)

from spinflip.daemon.live import schema
from spinflip.daemon.live.ports import free_loopback_port
from spinflip.daemon.storage.journal import count_rows

pytestmark = pytest.mark.live      # real-time: seconds of wall time (CI runs it)

RTLSDR_SOURCE = """kind = "rtlsdr"
sample_rate = 1.024e6
block_samples = 65536
reconnect_max_s = 2.0"""


class _Listener(threading.Thread):
    def __init__(self, endpoint):
        super().__init__(daemon=True)
        self.endpoint, self.stop = endpoint, threading.Event()
        self.events, self.states = [], set()

    def run(self):
        sub = zmq.Context.instance().socket(zmq.SUB)
        sub.setsockopt(zmq.SUBSCRIBE, b"")
        sub.setsockopt(zmq.RCVTIMEO, 200)
        sub.connect(self.endpoint)
        while not self.stop.is_set():
            try:
                msg = schema.decode(sub.recv_multipart())
            except zmq.Again:
                continue
            if msg.topic == "event":
                self.events.append((msg.header["severity"], msg.header["text"]))
            elif msg.topic == "status":
                self.states.add(msg.header["state"])
        sub.close(linger=0)


def _wait(cond, what, timeout_s=40.0):
    deadline = time.monotonic() + timeout_s
    while not cond():
        assert time.monotonic() < deadline, f"timed out waiting for {what}"
        time.sleep(0.05)


def _journal_rows(out, skip=()):
    js = [j for j in out.glob("*.journal") if j.name not in skip]
    return (js[0], count_rows(js[0])) if js else (None, 0)


def test_unplugged_dongle_the_daemon_stays_up_and_resumes_a_new_scan(tmp_path, fakertl_lib):  # noqa: F811
    port = free_loopback_port()
    cfg = tmp_path / "c.toml"
    cfg.write_text(live_config(0.5, source=RTLSDR_SOURCE, channels=256,
                               data=f"tcp://127.0.0.1:{port}"))
    control = tmp_path / "fakertl.ctl"
    set_control(control, present=1)
    out = tmp_path / "out"
    log_path = tmp_path / "daemon.log"
    listener = _Listener(f"tcp://127.0.0.1:{port}")
    listener.start()
    with open(log_path, "w") as log:
        proc = subprocess.Popen([sys.executable, "-m", "spinflip.cli", "run", "--config",
                                 str(cfg), "--out", str(out)], stdout=log, stderr=subprocess.STDOUT,
                                env={**os.environ, **emulator_env(fakertl_lib, control)})
    try:
        _wait(lambda: _journal_rows(out)[1] >= 2, "two integrations")
        first, _ = _journal_rows(out)
        set_control(control, present=0)                     # pull the plug
        _wait(lambda: "source lost" in log_path.read_text(), "the loss")
        _wait(lambda: "reconnection attempt 1 failed" in log_path.read_text(), "a failed attempt")
        assert proc.poll() is None                          # still up
        set_control(control, present=1)                     # plug it back in
        _wait(lambda: "source back" in log_path.read_text(), "the return")
        _wait(lambda: _journal_rows(out, skip={first.name})[1] >= 2, "a new scan segment")
        proc.send_signal(signal.SIGTERM)
        proc.wait(timeout=30)
    finally:
        if proc.poll() is None:
            proc.kill()
        time.sleep(0.3)
        listener.stop.set()
        listener.join(timeout=5)
    text = log_path.read_text()
    assert proc.returncode == 0, text
    files = sorted(out.glob("*.fits"))
    assert len(files) == 2 and not list(out.glob("*.journal")), text
    rows = []
    for f in files:
        with fits.open(f) as h:
            rows.append(h[1].data)
    assert len(rows[0]) >= 2 and len(rows[1]) >= 2
    # the segments do not overlap in time, and no row of the new one carries the outage
    assert rows[0]["DATE-OBS"][-1] < rows[1]["DATE-OBS"][0]
    assert int(rows[1]["LOSTSAMP"][0]) < 65536
    # the error went out on the live socket, the state said so while it lasted
    assert any(sev == "error" and "source lost" in t for sev, t in listener.events), listener.events
    assert any(sev == "info" and "source back" in t for sev, t in listener.events)
    assert "reconnecting" in listener.states
