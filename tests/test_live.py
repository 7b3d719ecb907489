"""The daemon live: real pyzmq sockets on loopback against ``spinflip run`` on the simulator.

- a subscriber written from the README's schema alone (json + numpy, no spinflip import)
  receives spectrum, status and progress messages, units checked;
- the control socket drives the daemon and answers garbage with errors (property-based
  fuzzing with hypothesis) while the daemon keeps publishing;
- a subscriber that stops reading loses messages (its sequence numbers show the gaps) while
  the daemon loses no sample and another subscriber misses nothing;
- binding beyond loopback needs keys or the explicit opt-in.
"""

import json
import signal
import subprocess
import sys
import threading
import time

import numpy as np
import pytest
import zmq
from cli_runner import run_cli, run_cli_inprocess, write_config
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st

from spinflip.daemon.live.ports import free_loopback_port

pytestmark = pytest.mark.live      # real-time: seconds of wall time (CI runs it)

DTYPES = {"<f4": "<f4", "<f8": "<f8", "<i8": "<i8", "|u1": "u1"}


def schema_decode(frames):
    """A subscriber's decoder written from the README section alone."""
    topic = frames[0].decode("ascii")
    header = json.loads(frames[1].decode("utf-8"))
    assert header["schema"] == 1 and header["topic"] == topic
    arrays = {}
    for desc, raw in zip(header["arrays"], frames[2:], strict=True):
        a = np.frombuffer(raw, dtype=DTYPES[desc["dtype"]]).reshape(desc["shape"])
        arrays[desc["name"]] = (a, desc["unit"])
    assert len(frames) == 2 + len(header["arrays"])
    return topic, header, arrays


CONFIG = """
[sim]
start = "2026-03-01T04:00:00"
[pointing]
frame = "galactic"
lon = 30.0
lat = 0.0
[spectrometer]
integration_s = 1.0
[calibration]
cal_interval_s = 5.0
[publish]
data = "tcp://127.0.0.1:{data}"
control = "tcp://127.0.0.1:{control}"
"""


@pytest.fixture(scope="module")
def daemon(tmp_path_factory):
    d = tmp_path_factory.mktemp("live")
    ports = {"data": free_loopback_port(), "control": free_loopback_port()}
    cfg = write_config(d / "c.toml", CONFIG.format(**ports))
    proc = subprocess.Popen([sys.executable, "-m", "spinflip.cli", "run", "--config",
                             str(cfg), "--duration", "120", "--out", str(d / "out")],
                            stdout=subprocess.PIPE, stderr=subprocess.PIPE, text=True)
    data = f"tcp://127.0.0.1:{ports['data']}"
    control = f"tcp://127.0.0.1:{ports['control']}"
    from spinflip.daemon.live.control import ControlError, request
    deadline = time.monotonic() + 30
    while True:                                   # wait until the control socket answers
        try:
            request(control, "status", timeout_s=1.0)
            break
        except ControlError:
            if time.monotonic() > deadline or proc.poll() is not None:
                proc.kill()
                raise AssertionError(proc.stderr.read()) from None
    yield {"proc": proc, "data": data, "control": control, "out": d / "out"}
    proc.send_signal(signal.SIGTERM)
    out, err = proc.communicate(timeout=30)
    assert proc.returncode == 0, err


def _collect(endpoint, seconds, topics=(b"",), **opts):
    ctx = zmq.Context.instance()
    sub = ctx.socket(zmq.SUB)
    for k, v in opts.items():
        sub.setsockopt(getattr(zmq, k), v)
    sub.connect(endpoint)
    for t in topics:
        sub.setsockopt(zmq.SUBSCRIBE, t)
    got = []
    end = time.monotonic() + seconds
    while time.monotonic() < end:
        if sub.poll(100):
            got.append(sub.recv_multipart())
    sub.close(0)
    return got


def _collect_until(endpoint, done, deadline_s=60.0):
    """Decoded messages from endpoint until ``done(messages)`` says enough came (or a generous
    deadline passed: a loaded machine may delay the daemon by seconds)."""
    sub = zmq.Context.instance().socket(zmq.SUB)
    sub.connect(endpoint)
    sub.setsockopt(zmq.SUBSCRIBE, b"")
    got = []
    end = time.monotonic() + deadline_s
    while time.monotonic() < end and not done(got):
        if sub.poll(100):
            got.append(schema_decode(sub.recv_multipart()))
    sub.close(0)
    return got


def _spectra_status_progress(msgs):
    seen = {t if t != "spectrum" else h["kind"] for t, h, _ in msgs}
    return {"integration", "average", "status", "progress"} <= seen


def test_subscriber_from_the_schema_gets_spectra_status_and_progress(daemon):
    msgs = _collect_until(daemon["data"], _spectra_status_progress)
    topics = {t for t, _, _ in msgs}
    assert {"spectrum", "status", "progress"} <= topics
    spectra = [(h, a) for t, h, a in msgs if t == "spectrum"]
    kinds = {h["kind"] for h, _ in spectra}
    assert kinds == {"integration", "average"}
    h, a = spectra[-1]
    n = a["data"][0].size
    assert a["data"][1] == h["unit"] == "K" and a["freq_hz"][1] == "Hz"
    assert a["v_lsrk_km_s"][1] == "km/s" and a["exposure_s"][1] == "s"
    assert all(arr.shape == (n,) for arr, _ in a.values())
    # the axes follow the radio convention: v = c (nu0 - nu) / nu0 + VFRAME (Greisen et al. 2006)
    v = 299792.458 * (h["restfreq_hz"] - a["freq_hz"][0]) / h["restfreq_hz"] + h["vframe_m_s"] / 1e3
    if h["kind"] == "integration":
        np.testing.assert_allclose(a["v_lsrk_km_s"][0], v, atol=1e-6)
    status = [h for t, h, _ in msgs if t == "status"][-1]
    for key in ("state", "lo_hz", "gain_db", "sample_rate_hz", "tsys_k", "samples_received",
                "samples_lost", "queue_depth", "disk_free_bytes", "uptime_s", "version"):
        assert key in status
    assert status["state"] == "observing" and status["samples_received"] > 0
    progress = [h for t, h, _ in msgs if t == "progress"][-1]
    assert 0 <= progress["integration_elapsed_s"] <= progress["integration_total_s"] + 0.2
    assert progress["scan_total_s"] == 120.0 and progress["eta_s"] <= 120.0


def test_late_joiner_gets_the_latest_spectrum_and_status_at_once(daemon):
    msgs = [schema_decode(f) for f in _collect(daemon["data"], 1.5)]
    assert {"spectrum", "status"} <= {t for t, _, _ in msgs}


def test_control_commands_drive_the_daemon(daemon):
    from spinflip.daemon.live.control import request
    c = daemon["control"]
    assert request(c, "pause")["result"]["state"] == "paused"
    assert request(c, "status")["result"]["state"] == "paused"
    bad = request(c, "pause")
    assert not bad["ok"] and "not observing" in bad["error"]
    assert request(c, "resume")["result"]["state"] == "observing"
    r = request(c, "set_integration", {"seconds": 2.0})
    assert r["ok"] and 2.0 <= r["result"]["integration_s"] < 3.5
    assert request(c, "annotate", {"text": "wind picking up"})["ok"]
    assert request(c, "calibrate", {"method": "noise_source"})["ok"]
    first = request(c, "status")["result"]["scan"]
    r = request(c, "new_scan")
    assert r["ok"] and r["result"]["scan"] != first
    r = request(c, "point", {"frame": "azel", "lon_deg": 180.0, "lat_deg": 60.0})
    assert r["ok"] and request(c, "status")["result"]["pointing"]["frame"] == "azel"
    low = request(c, "point", {"frame": "azel", "lon_deg": 180.0, "lat_deg": 2.0})
    assert not low["ok"] and "min_elevation" in low["error"]
    assert request(c, "stop")["result"]["state"] == "idle"
    events = [schema_decode(f) for f in _collect(daemon["data"], 1.0, (b"event",))]
    assert any(h["severity"] == "info" and "control: stop" in h["text"] for _, h, _ in events)
    assert request(c, "start")["result"]["state"] == "observing"
    # spinflip ctl, the command-line client
    r = run_cli(["ctl", "--connect", c, "status"])
    assert r.returncode == 0 and "state=observing" in r.stdout
    r = run_cli(["ctl", "--connect", c, "set_integration", "seconds=0.1"])
    assert r.returncode == 2 and "seconds" in r.stderr


_any_json = st.recursive(st.none() | st.booleans() | st.floats(allow_nan=False) | st.integers()
                         | st.text(max_size=20),
                         lambda kids: st.lists(kids, max_size=4)
                         | st.dictionaries(st.text(max_size=8), kids, max_size=4), max_leaves=12)
_requests = st.one_of(
    st.binary(max_size=200),
    _any_json.map(lambda v: json.dumps(v).encode()),
    st.fixed_dictionaries({"cmd": st.sampled_from(["status", "pause", "point", "annotate",
                                                   "set_integration", "bogus"]),
                           "args": st.dictionaries(st.sampled_from(["seconds", "text", "frame",
                                                                    "lon_deg", "x"]),
                                                   _any_json, max_size=3)}
                          ).map(lambda v: json.dumps(v).encode()),
)


@settings(max_examples=60, deadline=None, database=None,
          suppress_health_check=[HealthCheck.function_scoped_fixture])
@given(raw=_requests)
def test_fuzzed_control_requests_are_answered_and_publishing_goes_on(daemon, raw):
    ctx = zmq.Context.instance()
    req = ctx.socket(zmq.REQ)
    req.setsockopt(zmq.LINGER, 0)
    req.connect(daemon["control"])
    req.send(raw)
    assert req.poll(5000), f"no reply to {raw!r}"
    reply = json.loads(req.recv())
    req.close(0)
    assert isinstance(reply["ok"], bool)
    if not reply["ok"]:
        assert "\n" not in reply["error"]
    if reply["ok"] and reply.get("result", {}).get("state") == "paused":
        from spinflip.daemon.live.control import request
        request(daemon["control"], "resume")


def test_still_publishing_and_observing_after_the_fuzzing(daemon):
    from spinflip.daemon.live.control import request
    state = request(daemon["control"], "status")["result"]["state"]
    if state == "paused":
        request(daemon["control"], "resume")
    elif state == "idle":
        request(daemon["control"], "start")
    msgs = [schema_decode(f) for f in _collect(daemon["data"], 2.5)]
    assert sum(t == "status" for t, _, _ in msgs) >= 2


def test_stalled_subscriber_loses_messages_not_the_daemon(tmp_path, monkeypatch):
    # in this process, simulated time as fast as the CPU allows: 25 s of sky in a few seconds
    from spinflip.daemon import config
    from spinflip.daemon.live import publisher
    from spinflip.daemon.run import observation
    monkeypatch.setattr(publisher, "_SNDHWM", 4)      # small queues, so that a stall shows
    monkeypatch.setattr(publisher, "_SNDBUF", 8192)   # within a 15 s stall
    port = free_loopback_port()
    cfg = config.load(None)
    config.merge(cfg, {"sim": {"start": "2026-03-01T04:00:00"},
                       "pointing": {"frame": "galactic", "lon": 30.0, "lat": 0.0},
                       "spectrometer": {"integration_s": 0.5},
                       "output": {"dir": str(tmp_path / "o")},
                       "publish": {"data": f"tcp://127.0.0.1:{port}", "control": ""}})
    d = observation.Daemon(cfg, fast=True, duration_s=25.0, log=lambda m: None)
    ctx = zmq.Context.instance()
    ep = f"tcp://127.0.0.1:{port}"
    reader, stalled = ctx.socket(zmq.SUB), ctx.socket(zmq.SUB)
    stalled.setsockopt(zmq.RCVHWM, 1)
    stalled.setsockopt(zmq.RCVBUF, 4096)
    for s in (reader, stalled):
        s.setsockopt(zmq.SUBSCRIBE, b"spectrum")
    seqs, late = [], []
    done = threading.Event()

    def read():
        while not done.is_set():
            if reader.poll(100):
                seqs.append(json.loads(reader.recv_multipart()[1])["seq"])

    def read_after_a_stall():
        # reads nothing for the first 15 s of simulated time, then everything
        while not done.is_set() and d.total_blocks * d.block_s < 15.0:
            time.sleep(0.05)
        while not done.is_set():
            if stalled.poll(100):
                late.append(json.loads(stalled.recv_multipart()[1])["seq"])

    result = {}
    t = threading.Thread(target=lambda: result.setdefault("r", d.run()))
    t.start()
    time.sleep(0.5)                        # let the daemon bind before we connect
    reader.connect(ep)
    stalled.connect(ep)
    readers = [threading.Thread(target=read), threading.Thread(target=read_after_a_stall)]
    for r in readers:
        r.start()
    t.join()
    time.sleep(0.5)
    done.set()
    for r in readers:
        r.join()
    reader.close(0)
    stalled.close(0)
    assert result["r"].lost_samples == 0                  # acquisition never waited
    assert len(seqs) > 30 and seqs == list(range(seqs[0], seqs[0] + len(seqs)))   # no gap
    assert late and max(np.diff(late, prepend=0)) > 5      # the stalled one missed a run ...
    assert late[-1] >= seqs[-1] - 2                        # ... and caught up afterwards
    assert len(late) < len(seqs)


def test_binding_beyond_loopback_needs_keys_or_the_opt_in(tmp_path):
    port = free_loopback_port()
    cfg = write_config(tmp_path / "c.toml",
                       f'[publish]\ndata = "tcp://0.0.0.0:{port}"\ncontrol = ""\n')
    r = run_cli_inprocess(["run", "--config", cfg, "--fast", "--duration", 2, "--out", tmp_path / "o"])
    assert r.returncode == 2
    line = r.stderr.strip()
    assert "\n" not in line and "publish.keys" in line and "allow_insecure" in line
    cfg = write_config(tmp_path / "c2.toml", f'[publish]\ndata = "tcp://0.0.0.0:{port}"\n'
                       'control = ""\nallow_insecure = true\n')
    r = run_cli(["run", "--config", cfg, "--fast", "--duration", 2, "--out", tmp_path / "o"])
    assert r.returncode == 0, r.stderr
    assert any(l.startswith("warning:") and "0.0.0.0" in l for l in r.stderr.splitlines())


def test_curve_secured_daemon_serves_only_listed_clients(tmp_path):
    from spinflip.daemon.live.control import ControlError, request
    from spinflip.daemon.live.keys import ClientSecurity
    keys = tmp_path / "keys"
    assert run_cli(["keys", keys]).returncode == 0
    assert run_cli(["keys", keys, "--client", "laptop"]).returncode == 0
    assert run_cli(["keys", keys, "--client", "stranger"]).returncode == 0
    # the observer's two steps: list the laptop, give each client the daemon's public key
    (keys / "clients" / "laptop.key").write_bytes((keys / "laptop" / "client.key").read_bytes())
    for who in ("laptop", "stranger"):
        (keys / who / "server.key").write_bytes((keys / "server.key").read_bytes())
    ports = {"data": free_loopback_port(), "control": free_loopback_port()}
    cfg = write_config(tmp_path / "c.toml", CONFIG.format(**ports) + f'keys = "{keys}"\n')
    proc = subprocess.Popen([sys.executable, "-m", "spinflip.cli", "run", "--config",
                             str(cfg), "--duration", "60", "--out", str(tmp_path / "out")],
                            stdout=subprocess.PIPE, stderr=subprocess.PIPE, text=True)
    data = f"tcp://127.0.0.1:{ports['data']}"
    control = f"tcp://127.0.0.1:{ports['control']}"
    try:
        laptop = ClientSecurity.from_dir(keys / "laptop")
        stranger = ClientSecurity.from_dir(keys / "stranger")
        deadline = time.monotonic() + 30
        while True:
            try:
                assert request(control, "status", security=laptop, timeout_s=1.0)["ok"]
                break
            except ControlError:
                assert time.monotonic() < deadline and proc.poll() is None, proc.stderr.read()
        ctx = zmq.Context.instance()
        subs = {}
        for name, sec in (("laptop", laptop), ("stranger", stranger), ("nokey", None)):
            s = ctx.socket(zmq.SUB)
            if sec is not None:
                sec.apply(s)
            s.setsockopt(zmq.SUBSCRIBE, b"")
            s.connect(data)
            subs[name] = s
        got = {name: 0 for name in subs}
        end = time.monotonic() + 3.0
        while time.monotonic() < end:
            for name, s in subs.items():
                while s.poll(0):
                    s.recv_multipart()
                    got[name] += 1
            time.sleep(0.05)
        for s in subs.values():
            s.close(0)
        assert got["laptop"] >= 3 and got["stranger"] == 0 and got["nokey"] == 0
        for sec in (stranger, None):
            with pytest.raises(ControlError):
                request(control, "pause", security=sec, timeout_s=1.0)
        assert request(control, "status", security=laptop)["result"]["state"] == "observing"
    finally:
        proc.send_signal(signal.SIGTERM)
        proc.communicate(timeout=30)


def test_collect_relays_two_simulated_stations_without_mixing_them(tmp_path):
    # two daemons pointing at different Galactic longitudes; collect relays and archives both
    from spinflip.daemon.live.spectrum_archive import read_spectra
    procs, stations = [], []
    for name, lon in (("north", 30.0), ("south", 90.0)):
        ports = {"data": free_loopback_port(), "control": free_loopback_port()}
        cfg = write_config(tmp_path / f"{name}.toml", CONFIG.format(**ports).replace(
            "lon = 30.0", f"lon = {lon}"))
        procs.append(subprocess.Popen([sys.executable, "-m", "spinflip.cli", "run",
                                       "--config", str(cfg), "--duration", "60", "--out",
                                       str(tmp_path / name)], stdout=subprocess.PIPE,
                                      stderr=subprocess.PIPE, text=True))
        stations.append(f"{name}=tcp://127.0.0.1:{ports['data']}")
    relay = f"tcp://127.0.0.1:{free_loopback_port()}"
    # tolerant of a loaded machine: both daemons answer before collect starts, and the relay
    # is read until it gave both stations' spectra and status (or a generous deadline); then
    # collect is stopped (SIGTERM: exit 0)
    from spinflip.daemon.live.control import ControlError, request
    try:
        for proc, cfg_name in zip(procs, ("north", "south"), strict=True):
            text = (tmp_path / f"{cfg_name}.toml").read_text()
            control = text.split('control = "')[1].split('"')[0]
            deadline = time.monotonic() + 60
            while True:
                try:
                    request(control, "status", timeout_s=1.0)
                    break
                except ControlError:
                    assert time.monotonic() < deadline and proc.poll() is None, cfg_name
        coll = subprocess.Popen([sys.executable, "-m", "spinflip.cli", "collect",
                                 *stations, "--relay", relay, "--archive",
                                 str(tmp_path / "archive"), "--duration", "120"],
                                stdout=subprocess.PIPE, stderr=subprocess.PIPE, text=True)
        sub = zmq.Context.instance().socket(zmq.SUB)
        sub.connect(relay)
        for t in (b"spectrum", b"status"):
            sub.setsockopt(zmq.SUBSCRIBE, t)
        msgs, seen = [], set()
        deadline = time.monotonic() + 60
        while len(seen) < 4 and time.monotonic() < deadline and coll.poll() is None:
            if sub.poll(100):
                msg = schema_decode(sub.recv_multipart())
                msgs.append(msg)
                seen.add((msg[0], msg[1]["station"]))
        sub.close(0)
        coll.send_signal(signal.SIGTERM)
        out, err = coll.communicate(timeout=60)
        assert coll.returncode == 0, err
    finally:
        for p in procs:
            p.send_signal(signal.SIGTERM)
            p.communicate(timeout=30)
    by_station = {}
    for topic, h, _ in msgs:
        by_station.setdefault(h["station"], []).append((topic, h))
    assert set(by_station) == {"north", "south"}
    for name, lon in (("north", 30.0), ("south", 90.0)):
        spectra = [h for t, h in by_station[name] if t == "spectrum"]
        assert spectra and all(abs(h["glon_deg"] - lon) < 1e-6 for h in spectra)
        assert any(t == "status" for t, _ in by_station[name])
    archived = {p.parent.name: read_spectra(p) for p in (tmp_path / "archive").rglob("*.jsonl")}
    assert set(archived) == {"north", "south"}
    for name, lon in (("north", 30.0), ("south", 90.0)):
        assert archived[name] and all(abs(m.header["glon_deg"] - lon) < 1e-6
                                      and m.header["station"] == name for m in archived[name])


def test_status_counts_samples_the_source_lost_and_the_queue_dropped(tmp_path):
    # lost = reported by the source before its blocks (USB gaps) + dropped on a full queue
    from spinflip.daemon import config
    from spinflip.daemon.run import observation
    cfg = config.load(None)
    config.merge(cfg, {"output": {"dir": str(tmp_path)}, "publish": {"data": "", "control": ""}})
    d = observation.Daemon(cfg, fast=True, log=lambda m: None)
    d.counters["lost"], d.counters["dropped"] = 5, 7
    s = d.status()
    assert s["samples_lost"] == 12 and s["state"] == "observing" and s["tsys_source"]
