"""No thread of the daemon dies silently (issue 12, item 1).

Each worker thread (reader, writer, publisher, control, status, watchdog) is killed by an
injected exception while the simulator observes in fast mode. What must hold: the failure is
an error event and counted in the status (``worker_failures``, which the UI shows); the worker
runs again; every integration that finished is in the scan file. A worker that keeps failing
stops the daemon with exit status 1 (systemd's ``Restart=on-failure`` starts it again), and what
was saved up to then is still saved and said. The policy itself is common practice for
supervised services (systemd.service(5) restart policies), no single source.
"""

import socket
import threading

import pytest
from astropy.io import fits

from spinflip.daemon import config
from spinflip.daemon.live.control import ControlServer, request
from spinflip.daemon.live.ports import free_loopback_port
from spinflip.daemon.live.publisher import Publisher
from spinflip.daemon.run.observation import Daemon
from spinflip.daemon.run.supervisor import Supervisor, WorkerFailed
from spinflip.daemon.storage.archive import ScanWriter
from spinflip.daemon.storage.writer import ScanStore

SECONDS = 12.0


def _cfg(tmp_path, live=False):
    cfg = config.defaults()
    over = {
        "sim": {"start": "2026-03-01T04:00:00"},
        "pointing": {"frame": "azel", "lon": 0.0, "lat": 80.0},
        "spectrometer": {"integration_s": 1.0, "channels": 256},
        "calibration": {"tsys_from": "fixed"},
        "output": {"dir": str(tmp_path / "out")},
        "publish": {"data": "", "control": ""},
    }
    if live:
        over["publish"] = {"data": f"tcp://127.0.0.1:{free_loopback_port()}",
                           "control": f"tcp://127.0.0.1:{free_loopback_port()}"}
    config.merge(cfg, over, origin="test")
    return cfg


def _saved_rows(result) -> int:
    n = 0
    for f in result.files:
        with fits.open(f) as h:
            n += len(h[1].data)
    return n


def _once(original, exc=None):
    """``original`` that raises ``exc`` on its third call, then works again."""
    exc = exc if exc is not None else RuntimeError("injected failure")
    calls = {"n": 0}

    def wrapped(*a, **k):
        calls["n"] += 1
        if calls["n"] == 3:
            raise exc
        return original(*a, **k)
    return wrapped, calls


def _events(d: Daemon) -> str:
    return "\n".join(f"{sev}: {text}" for sev, text in d.events)


def _run_and_sample_status(d: Daemon):
    """Run ``d``; keep the last status the daemon would have published while it ran."""
    seen: dict = {}
    stop = threading.Event()

    def sample():
        while not stop.wait(0.05):
            try:
                st = d.status()
            except Exception:   # noqa: BLE001 - before the store exists
                continue
            if st["worker_failures"]:
                seen.update(st)
    t = threading.Thread(target=sample, daemon=True)
    t.start()
    try:
        return d.run(), seen
    finally:
        stop.set()
        t.join()


@pytest.mark.parametrize("worker", ["reader", "writer", "publisher", "status"])
def test_a_worker_killed_once_is_restarted_and_nothing_finished_is_lost(tmp_path, monkeypatch,
                                                                         worker):
    cfg = _cfg(tmp_path, live=worker in ("publisher", "status"))
    d = Daemon(cfg, fast=True, duration_s=SECONDS, log=lambda m: None)
    if worker == "reader":
        d.source.read, calls = _once(d.source.read)
    elif worker == "writer":
        fn, calls = _once(ScanStore._drain)
        monkeypatch.setattr(ScanStore, "_drain", fn)
    elif worker == "publisher":
        fn, calls = _once(Publisher._send)
        monkeypatch.setattr(Publisher, "_send", fn)
    else:
        fn, calls = _once(d.live.progress_message)
        monkeypatch.setattr(d.live, "progress_message", fn)
        # the status loop publishes once a second: observe until it has run twice more
        d.duration_s = None

        def stop_later():
            for _ in range(300):
                if calls["n"] >= 5:
                    break
                threading.Event().wait(0.05)
            d.stop_event.set()
        threading.Thread(target=stop_later, daemon=True).start()
    result, status = _run_and_sample_status(d)
    assert calls["n"] > 3, f"the {worker} did not run again after the failure"
    text = _events(d)
    assert f"error: the {worker} thread failed (RuntimeError: injected failure); restarted" \
        in text, text
    assert status["worker_failures"] == {worker: 1}
    assert d.supervisor.fatal is None
    assert result.rows >= 1 and _saved_rows(result) == result.rows   # nothing finished lost


def test_a_control_thread_killed_once_answers_again(tmp_path, monkeypatch):
    cfg = _cfg(tmp_path, live=True)
    d = Daemon(cfg, fast=False, duration_s=None, log=lambda m: None)
    fn, calls = _once(ControlServer._answer)
    monkeypatch.setattr(ControlServer, "_answer", fn)
    endpoint = cfg["publish"]["control"]
    replies = []

    def drive():
        for _ in range(5):
            try:
                replies.append(request(endpoint, "status", timeout_s=1.0))
            except Exception as exc:  # noqa: BLE001 - the failed request has no reply
                replies.append(exc)
        d.stop_event.set()
    threading.Timer(1.0, drive).start()
    result, _ = _run_and_sample_status(d)
    ok = [r for r in replies if isinstance(r, dict) and r.get("ok")]
    assert len(ok) >= 3, replies                    # answered again after the restart
    assert "error: the control thread failed" in _events(d)
    assert d.supervisor.counts() == {"control": 1}
    assert _saved_rows(result) == result.rows


def test_a_watchdog_thread_killed_once_pings_again(tmp_path, monkeypatch):
    sock_path = str(tmp_path / "notify")
    sock = socket.socket(socket.AF_UNIX, socket.SOCK_DGRAM)
    sock.bind(sock_path)
    sock.settimeout(0.2)
    monkeypatch.setenv("NOTIFY_SOCKET", sock_path)
    monkeypatch.setenv("WATCHDOG_USEC", "200000")
    monkeypatch.delenv("WATCHDOG_PID", raising=False)
    d = Daemon(_cfg(tmp_path), fast=False, duration_s=3.0, log=lambda m: None)
    fn, calls = _once(d.notifier.watchdog)
    d.notifier.watchdog = fn
    result = d.run()
    pings = 0
    while True:
        try:
            pings += sock.recv(4096).count(b"WATCHDOG=1")
        except TimeoutError:
            break
    sock.close()
    assert calls["n"] > 3 and pings >= 3
    assert "error: the watchdog thread failed" in _events(d)
    assert _saved_rows(result) == result.rows


def test_a_reader_that_keeps_failing_stops_the_daemon_with_status_1(tmp_path, monkeypatch,
                                                                     capsys):
    """Past the restart budget the daemon stops, saves what finished and exits 1; the final
    lines say what was saved and why it stopped, nothing more."""
    from spinflip import cli
    read = None
    calls = {"n": 0}

    real_init = Daemon.__init__

    def init(self, *a, **k):
        nonlocal read
        real_init(self, *a, **k)
        read = self.source.read

        def failing():
            calls["n"] += 1
            if calls["n"] > 60:
                raise RuntimeError("reader broke")
            return read()
        self.source.read = failing
    monkeypatch.setattr(Daemon, "__init__", init)
    cfg_path = tmp_path / "c.toml"
    cfg_path.write_text('[sim]\nstart = "2026-03-01T04:00:00"\n[pointing]\nframe = "azel"\n'
                        'lon = 0.0\nlat = 80.0\n[spectrometer]\nintegration_s = 1.0\n'
                        'channels = 256\n[calibration]\ntsys_from = "fixed"\n'
                        '[publish]\ndata = ""\ncontrol = ""\n')
    code = cli.main(["run", "--config", str(cfg_path), "--fast", "--duration", "600",
                     "--out", str(tmp_path / "out")])
    out, err = capsys.readouterr()
    assert code == 1, err
    assert "the reader thread failed (RuntimeError: reader broke)" in err
    assert "restarted too often" in err
    files = sorted((tmp_path / "out").glob("*.fits"))
    assert len(files) == 1 and not list((tmp_path / "out").glob("*.journal"))
    with fits.open(files[0]) as h:
        n = len(h[1].data)
    assert n >= 1 and f"saved {n} integrations" in out
    assert "nothing saved" not in out and "every finished" not in out + err


def test_an_item_that_cannot_be_written_is_dropped_counted_and_writing_goes_on(tmp_path,
                                                                              monkeypatch):
    d = Daemon(_cfg(tmp_path), fast=True, duration_s=SECONDS, log=lambda m: None)
    fn, calls = _once(ScanWriter.append)
    monkeypatch.setattr(ScanWriter, "append", fn)
    with pytest.raises(OSError, match=r"1 integration\(s\) could not be saved: 1 failed to "
                                      r"write"):
        d.run()
    assert "could not save an integration (RuntimeError: injected failure)" in _events(d)
    assert d.store.failed_rows == 1
    assert d.status()["dropped_integrations"] == 1
    assert _saved_rows(d.result) == d.result.rows - 1 >= 5     # the later ones are saved
    assert d.supervisor.fatal is None


def test_a_note_beyond_ascii_is_saved_escaped_and_nothing_stops(tmp_path):
    """The reproduction of item 1: ``ctl annotate "text=café"`` was accepted, then killed the
    writer. FITS header cards are printable ASCII (FITS 4.0, section 4.1): the note is kept
    with a backslash escape, and every integration is saved."""
    cfg = _cfg(tmp_path, live=True)
    d = Daemon(cfg, fast=False, duration_s=None, log=lambda m: None)
    replies = []

    def drive():
        replies.append(request(cfg["publish"]["control"], "annotate", {"text": "café ☕"}))
        threading.Timer(1.5, d.stop_event.set).start()
    threading.Timer(1.2, drive).start()
    result = d.run()
    assert replies and replies[0]["ok"], replies
    assert result.rows >= 1 and _saved_rows(result) == result.rows
    with fits.open(result.files[0]) as h:
        history = [str(c) for c in h[1].header["HISTORY"]]
    assert any("caf\\xe9 \\u2615" in c for c in history), history
    assert d.supervisor.failures == []


def test_supervisor_gives_up_after_its_budget_and_says_so_once():
    events, fatal = [], []
    sup = Supervisor(lambda s, t: events.append((s, t)), log=lambda m: None,
                     on_fatal=lambda: fatal.append(1), max_restarts=2, window_s=60)
    runs = {"n": 0}

    def body():
        runs["n"] += 1
        raise ValueError("x" * 500 + "\nsecond line")
    sup.guard("reader", body)()
    assert runs["n"] == 3 and fatal == [1]
    assert [s for s, _ in events] == ["error"] * 3
    assert "restarted (1 of 2" in events[0][1] and "restarted too often" in events[2][1]
    assert all("\n" not in t and len(t) < 400 for _, t in events)
    assert sup.counts() == {"reader": 3}
    with pytest.raises(WorkerFailed, match="the reader thread failed"):
        sup.check()


def test_an_unguarded_thread_that_dies_is_caught_by_the_backstop():
    events, fatal = [], []
    sup = Supervisor(lambda s, t: events.append((s, t)), log=lambda m: None,
                     on_fatal=lambda: fatal.append(1))
    sup.install_excepthook()
    try:
        t = threading.Thread(target=lambda: 1 / 0, name="stray")
        t.start()
        t.join()
    finally:
        sup.remove_excepthook()
    assert fatal == [1] and "the stray thread failed (ZeroDivisionError" in events[0][1]
