"""sd_notify protocol, watchdog pinger and the systemd unit, against real AF_UNIX sockets.

The "service manager" in these tests is a datagram socket bound in tmp_path (or in the abstract
namespace) that the test reads, as systemd reads its notification socket. Timing is checked only
loosely (counts within a factor of 2 of what the interval predicts), never tightly.
"""

import os
import re
import shutil
import socket
import struct
import subprocess
import sys
import tempfile
import threading
import time
import uuid
from pathlib import Path

import pytest

from spinflip.daemon.run.sd_notify import (
    NOTIFY_DATAGRAM_MAX_BYTES,
    STATUS_MAX_CHARS,
    Heartbeat,
    Notifier,
    WatchdogPinger,
    socket_address,
)

REPO = Path(__file__).resolve().parent.parent
UNIT = REPO / "systemd" / "spinflip.service"
UDEV_RULES = REPO / "hardware" / "60-spinflip-dongle.rules"
SYSTEMD_ANALYZE = Path("/usr/bin/systemd-analyze")
#: sun_path holds 108 bytes with its terminating NUL (unix(7)).
_SUN_PATH_MAX_BYTES = 107


class Log:
    """A log callable that keeps what it was told."""

    def __init__(self):
        self.lines = []

    def __call__(self, line):
        self.lines.append(line)


def _socket_path(tmp_path):
    path = tmp_path / "notify"
    if len(os.fsencode(path)) <= _SUN_PATH_MAX_BYTES:
        return path
    return Path(tempfile.mkdtemp(prefix="sdn")) / "notify"   # tmp_path too long for sun_path


@pytest.fixture
def manager(tmp_path):
    """A stand-in for systemd's notification socket: (socket, NOTIFY_SOCKET value)."""
    path = _socket_path(tmp_path)
    sock = socket.socket(socket.AF_UNIX, socket.SOCK_DGRAM)
    sock.bind(str(path))
    yield sock, str(path)
    sock.close()
    path.unlink(missing_ok=True)


def _recv(sock, timeout_s=2.0):
    """One datagram as text, or None if none came within timeout_s."""
    sock.settimeout(timeout_s)
    try:
        return sock.recv(65536).decode()
    except TimeoutError:
        return None


def _drain(sock):
    """Every datagram already queued, as a list of texts."""
    out = []
    while (msg := _recv(sock, 0.001)) is not None:
        out.append(msg)
    return out


def _collect(sock, window_s):
    """Every datagram received during window_s seconds."""
    out = []
    end = time.monotonic() + window_s
    while (left := end - time.monotonic()) > 0:
        msg = _recv(sock, left)
        if msg is not None:
            out.append(msg)
    return out


def _fields(message):
    """sd_notify(3): newline-separated KEY=VALUE assignments -> list of (key, value)."""
    return [tuple(line.split("=", 1)) for line in message.split("\n") if line]


# --- the protocol -----------------------------------------------------------------------

def test_ready_status_watchdog_stopping_reach_a_path_socket(manager):
    sock, path = manager
    n = Notifier.from_env({"NOTIFY_SOCKET": path})
    assert n.enabled
    # sd_notify(3): READY=1 tells the manager start-up is finished; STATUS= is free text.
    assert n.ready("observing G30+0 with the rtlsdr source")
    assert _fields(_recv(sock)) == [("READY", "1"), ("STATUS", "observing G30+0 with the rtlsdr source")]
    # sd_notify(3): the assignments are newline-separated, so a line break inside a value
    # would start a new assignment; it must arrive as one line.
    assert n.status("integration 12\nTsys 96 K")
    assert _fields(_recv(sock)) == [("STATUS", "integration 12 Tsys 96 K")]
    # sd_notify(3): WATCHDOG=1 is the keep-alive ping.
    assert n.watchdog()
    assert _recv(sock) == "WATCHDOG=1"
    # sd_notify(3): STOPPING=1 tells the manager the service is shutting down.
    assert n.stopping("saving the integration in progress")
    assert _fields(_recv(sock)) == [("STOPPING", "1"),
                                    ("STATUS", "saving the integration in progress")]
    assert _drain(sock) == []
    n.close()


def test_abstract_namespace_socket_receives_ready():
    # sd_notify(3): a NOTIFY_SOCKET starting with "@" is a Linux abstract-namespace socket;
    # unix(7): its sun_path starts with a NUL byte.
    name = f"spinflip-test-{os.getpid()}-{uuid.uuid4().hex}"
    sock = socket.socket(socket.AF_UNIX, socket.SOCK_DGRAM)
    sock.bind("\0" + name)
    try:
        assert socket_address("@" + name) == "\0" + name
        n = Notifier.from_env({"NOTIFY_SOCKET": "@" + name})
        assert n.ready()
        assert _recv(sock) == "READY=1"
        assert n.watchdog()
        assert _recv(sock) == "WATCHDOG=1"
        n.close()
    finally:
        sock.close()


def test_several_fields_go_in_one_datagram_in_order(manager):
    sock, path = manager
    n = Notifier(socket_address(path))
    # sd_notify(3): one state string, newline-separated assignments, sent as one datagram.
    assert n.send(READY=True, STATUS="two lines\r\nmade one", ERRNO=0)
    assert _recv(sock) == "READY=1\nSTATUS=two lines  made one\nERRNO=0"
    assert _drain(sock) == []


def test_extend_timeout_is_in_microseconds(manager):
    sock, path = manager
    n = Notifier(socket_address(path))
    # sd_notify(3): EXTEND_TIMEOUT_USEC= takes microseconds.
    assert n.extend_timeout(2.5)
    assert _recv(sock) == "EXTEND_TIMEOUT_USEC=2500000"
    for bad in (0, -1.0, float("nan"), float("inf"), True):
        with pytest.raises(ValueError, match="extend_timeout seconds"):
            n.extend_timeout(bad)
    assert _drain(sock) == []


def test_bad_keys_and_oversized_messages_are_refused_not_raised(manager):
    sock, path = manager
    log = Log()
    n = Notifier(socket_address(path), log=log)
    assert n.send() is False
    assert n.send(ready=1) is False                       # keys are upper-case names
    assert "'ready'" in log.lines[-1]
    # systemd reads at most NOTIFY_BUFFER_MAX = PIPE_BUF bytes of a datagram (src/basic/def.h).
    assert n.send(STATUS="x" * NOTIFY_DATAGRAM_MAX_BYTES) is False
    assert _drain(sock) == []
    # status() cuts a long text so the message still fits
    assert n.status("y" * (3 * NOTIFY_DATAGRAM_MAX_BYTES))
    (key, value), = _fields(_recv(sock))
    assert key == "STATUS" and len(value) == STATUS_MAX_CHARS and value.endswith("...")


def test_sender_credentials_are_the_process_even_from_a_thread(manager):
    # systemd.service(5), NotifyAccess=main: only messages from the main PID count. The manager
    # learns the sender from SCM_CREDENTIALS (unix(7), SO_PASSCRED); a ping from the pinger's
    # thread must carry the process ID, not a thread ID.
    sock, path = manager
    sock.setsockopt(socket.SOL_SOCKET, socket.SO_PASSCRED, 1)
    n = Notifier(socket_address(path))
    t = threading.Thread(target=n.watchdog)
    t.start()
    t.join()
    sock.settimeout(2.0)
    data, ancdata, _, _ = sock.recvmsg(4096, socket.CMSG_SPACE(12))
    assert data == b"WATCHDOG=1"
    creds = [d for level, kind, d in ancdata
             if level == socket.SOL_SOCKET and kind == socket.SCM_CREDENTIALS]
    pid, uid, _gid = struct.unpack("iII", creds[0][:12])   # struct ucred {pid_t; uid_t; gid_t}
    assert pid == os.getpid() and uid == os.getuid()


# --- not under systemd, and failures ----------------------------------------------------

def test_without_notify_socket_nothing_is_sent_and_nothing_logged():
    log = Log()
    n = Notifier.from_env({}, log=log)
    assert not n.enabled
    assert n.ready() is False and n.watchdog() is False and n.status("x") is False
    assert n.watchdog_interval_s is None
    assert log.lines == []


@pytest.mark.parametrize("value", ["relative/notify", "vsock:2:1234", "@"])
def test_unsupported_notify_socket_disables_and_says_so(value):
    log = Log()
    n = Notifier.from_env({"NOTIFY_SOCKET": value}, log=log)
    assert not n.enabled and n.send(READY=1) is False
    assert len(log.lines) == 1 and repr(value) in log.lines[0]
    with pytest.raises(ValueError, match="NOTIFY_SOCKET"):
        socket_address(value)


def test_missing_socket_returns_false_logs_once_and_recovers(tmp_path):
    path = _socket_path(tmp_path)
    log = Log()
    n = Notifier.from_env({"NOTIFY_SOCKET": str(path)}, log=log)
    assert n.enabled
    assert n.ready() is False                             # nobody listens: no exception
    assert n.watchdog() is False
    assert len(log.lines) == 1 and str(path) in log.lines[0]
    sock = socket.socket(socket.AF_UNIX, socket.SOCK_DGRAM)
    sock.bind(str(path))                                  # the manager (re)appears
    try:
        assert n.watchdog() is True
        assert _recv(sock) == "WATCHDOG=1"
        assert len(log.lines) == 2 and "again" in log.lines[1]
    finally:
        sock.close()
        n.close()


# --- the watchdog environment -----------------------------------------------------------

def test_watchdog_interval_is_half_of_watchdog_usec(manager):
    _, path = manager
    # sd_watchdog_enabled(3): ping "every half of the time" in WATCHDOG_USEC (microseconds).
    n = Notifier.from_env({"NOTIFY_SOCKET": path, "WATCHDOG_USEC": "400000"})
    assert n.watchdog_usec == 400000
    assert n.watchdog_interval_s == pytest.approx(0.2, rel=1e-12)
    # sd_watchdog_enabled(3): it applies if WATCHDOG_PID is unset or is our PID ...
    mine = Notifier.from_env({"NOTIFY_SOCKET": path, "WATCHDOG_USEC": "400000",
                              "WATCHDOG_PID": str(os.getpid())})
    assert mine.watchdog_interval_s == pytest.approx(0.2, rel=1e-12)
    # ... and not when it names another process (here our parent).
    other = Notifier.from_env({"NOTIFY_SOCKET": path, "WATCHDOG_USEC": "400000",
                               "WATCHDOG_PID": str(os.getppid())})
    assert other.watchdog_usec is None and other.watchdog_interval_s is None
    # without a manager to ping there is no interval either
    assert Notifier.from_env({"WATCHDOG_USEC": "400000"}).watchdog_interval_s is None


@pytest.mark.parametrize("raw", ["abc", "0", "-5", ""])
def test_unusable_watchdog_usec_means_no_watchdog(manager, raw):
    _, path = manager
    log = Log()
    n = Notifier.from_env({"NOTIFY_SOCKET": path, "WATCHDOG_USEC": raw}, log=log)
    assert n.enabled and n.watchdog_interval_s is None
    assert len(log.lines) == 1 and "WATCHDOG_USEC" in log.lines[0]


# --- the pinger -------------------------------------------------------------------------

def test_pinger_pings_at_about_the_interval_and_only_while_alive(manager):
    # Tolerant of a loaded machine (a thread may run late, never early): the pings are counted
    # until enough have come (with a generous deadline), and their spacing may only be longer
    # than the interval, never much shorter; "no pings" is checked only once the thread has
    # said that it withholds them (so none was already decided).
    sock, path = manager
    log = Log()
    # WATCHDOG_USEC = 200000 us -> a ping every 0.1 s (sd_watchdog_enabled(3): half of it)
    n = Notifier.from_env({"NOTIFY_SOCKET": path, "WATCHDOG_USEC": "200000"})
    interval_s = n.watchdog_interval_s
    alive = threading.Event()
    alive.set()
    pinger = WatchdogPinger(n, alive.is_set, log=log)
    t0 = time.monotonic()
    assert pinger.start()
    try:
        got, arrived = [], []
        deadline = time.monotonic() + 60 * interval_s + 10.0      # generous: a loaded machine
        while len(got) < 6 and (left := deadline - time.monotonic()) > 0:
            msg = _recv(sock, left)
            if msg is not None:
                got.append(msg)
                arrived.append(time.monotonic())
        assert got == ["WATCHDOG=1"] * 6, got                   # it keeps pinging, only that
        # one at start, then one per interval: 5 intervals at least between the 1st and 6th
        # (Event.wait never returns early; 10 % for the clocks' granularity)
        assert arrived[-1] - t0 >= 0.9 * 5 * interval_s

        # The main loop stops making progress: no more pings, so systemd's watchdog would fire
        # (systemd.service(5), WatchdogSec=) and Restart=on-failure would restart the daemon.
        alive.clear()
        deadline = time.monotonic() + 60 * interval_s + 10.0
        while not log.lines and time.monotonic() < deadline:    # the thread saw it
            time.sleep(interval_s / 10)
        assert len(log.lines) == 1 and "no progress" in log.lines[0]
        _drain(sock)                                  # pings decided before it said so
        assert _collect(sock, 3 * interval_s) == []
        assert pinger.running
        assert len(log.lines) == 1

        alive.set()                                       # progress again: pings resume
        assert _recv(sock, timeout_s=60 * interval_s + 10.0) == "WATCHDOG=1"
        deadline = time.monotonic() + 10.0
        while len(log.lines) < 2 and time.monotonic() < deadline:
            time.sleep(interval_s / 10)
        assert "resumed" in log.lines[-1]
    finally:
        pinger.stop()
    assert not pinger.running
    _drain(sock)
    assert _collect(sock, 2.5 * interval_s) == []         # stopped means stopped
    assert pinger.pings_sent >= len(got) + 1


def test_pinger_survives_a_failing_alive_and_sends_nothing(manager):
    sock, path = manager
    log = Log()

    def broken():
        raise RuntimeError("state lock poisoned")

    pinger = WatchdogPinger(Notifier(socket_address(path), 200000), broken, log=log)
    with pinger:
        assert _collect(sock, 0.3) == []
        assert pinger.running
    assert not pinger.running
    assert len(log.lines) == 1 and "RuntimeError" in log.lines[0]


def test_pinger_without_watchdog_does_not_start(manager):
    _, path = manager
    pinger = WatchdogPinger(Notifier(socket_address(path)), lambda: True)
    assert pinger.start() is False and not pinger.running
    pinger.stop()
    with pytest.raises(ValueError, match="interval_s"):
        WatchdogPinger(Notifier(socket_address(path)), lambda: True, interval_s=0.0)


def test_heartbeat_is_alive_until_silent_too_long():
    now = [100.0]
    hb = Heartbeat(10.0, clock=lambda: now[0])
    assert hb.alive()                                     # alive from construction
    now[0] = 110.0
    assert hb.alive() and hb.silence_s() == pytest.approx(10.0)
    now[0] = 110.5
    assert not hb.alive()
    hb.beat()
    assert hb.alive() and hb.silence_s() == 0.0
    for bad in (0, -1, float("nan"), True):
        with pytest.raises(ValueError, match="max_silence_s"):
            Heartbeat(bad)


# --- the unit file and the udev rule ----------------------------------------------------

def _unit_settings(text):
    """(section, key) -> list of values, as systemd.syntax(7) reads them (no continuations)."""
    settings, section = {}, None
    for line in text.splitlines():
        line = line.strip()
        if not line or line[0] in "#;":
            continue
        if line.startswith("["):
            section = line.strip("[]")
            continue
        key, _, value = line.partition("=")
        settings.setdefault((section, key.strip()), []).append(value.strip())
    return settings


def test_unit_file_settings():
    s = _unit_settings(UNIT.read_text())

    def one(section, key):
        assert len(s.get((section, key), [])) == 1, f"{section}/{key}"
        return s[(section, key)][0]

    # systemd.service(5): Type=notify waits for READY=1; the watchdog needs WATCHDOG=1 pings.
    assert one("Service", "Type") == "notify"
    assert one("Service", "NotifyAccess") == "main"
    assert one("Service", "WatchdogSec") == "30"
    assert one("Service", "ExecStart") == ("/opt/spinflip/bin/spinflip run --config "
                                           "/etc/spinflip/spinflip.toml --out /var/lib/spinflip")
    assert one("Service", "User") == one("Service", "Group") == "spinflip"
    assert one("Service", "StateDirectory") == "spinflip"
    assert one("Service", "Restart") == "on-failure"
    assert one("Service", "KillSignal") == "SIGTERM"
    # systemd.resource-control(5): device access by /proc/devices group; PrivateDevices=
    # (systemd.exec(5)) would hide /dev/bus/usb, MemoryDenyWriteExecute= may break ctypes
    # callbacks (libffi closures): both must stay off.
    assert one("Service", "DevicePolicy") == "closed"
    assert sorted(s[("Service", "DeviceAllow")]) == ["char-gpiochip rw", "char-usb_device rw"]
    assert ("Service", "PrivateDevices") not in s
    assert ("Service", "MemoryDenyWriteExecute") not in s
    families = one("Service", "RestrictAddressFamilies").split()
    assert {"AF_UNIX", "AF_INET", "AF_INET6", "AF_NETLINK"} <= set(families)
    assert "network-online.target" in one("Unit", "Wants")
    assert {"time-sync.target", "network-online.target"} <= set(one("Unit", "After").split())


@pytest.mark.skipif(not SYSTEMD_ANALYZE.exists(), reason="no /usr/bin/systemd-analyze")
def test_systemd_analyze_verify_accepts_the_unit(tmp_path):
    # systemd-analyze(1), verify: loads the unit and reports unknown keys, bad values and an
    # ExecStart= binary that is not executable. It exits 0 even for unknown keys and bad values
    # (it only prints them), so the test also requires it to print nothing about the unit.
    # /opt/spinflip is not installed here: the copy checked below has ExecStart pointed at this
    # running Python with "-m spinflip.cli" (the same command as the installed script);
    # every other line is the repository's unit unchanged. User=spinflip need not exist (verify
    # does not look the user up).
    text = UNIT.read_text()
    copy, count = re.subn(r"(?m)^ExecStart=/opt/spinflip/bin/spinflip ",
                          f"ExecStart={sys.executable} -m spinflip.cli ", text)
    assert count == 1
    unit = tmp_path / "spinflip.service"
    unit.write_text(copy)
    r = subprocess.run([str(SYSTEMD_ANALYZE), "verify", "--man=no", "--generators=no", str(unit)],
                       capture_output=True, text=True, timeout=60)
    about_unit = [ln for ln in (r.stdout + r.stderr).splitlines() if "spinflip" in ln]
    assert r.returncode == 0, r.stderr
    assert about_unit == []
    # and it does complain about the original's missing /opt/spinflip binary, so the check bites
    if not Path("/opt/spinflip/bin/spinflip").exists():
        orig = tmp_path / "orig" / "spinflip.service"
        orig.parent.mkdir()
        shutil.copy(UNIT, orig)
        r = subprocess.run([str(SYSTEMD_ANALYZE), "verify", "--man=no", "--generators=no",
                            str(orig)], capture_output=True, text=True, timeout=60)
        assert "/opt/spinflip/bin/spinflip" in r.stdout + r.stderr


def test_udev_rule_gives_the_dongles_to_group_spinflip():
    rules = [ln for ln in UDEV_RULES.read_text().splitlines() if ln and not ln.startswith("#")]
    ids = set()
    for rule in rules:
        assert 'SUBSYSTEM=="usb"' in rule and 'GROUP="spinflip"' in rule and 'MODE="0660"' in rule
        vendor = re.search(r'ATTR\{idVendor\}=="([0-9a-f]{4})"', rule).group(1)
        product = re.search(r'ATTR\{idProduct\}=="([0-9a-f]{4})"', rule).group(1)
        ids.add(f"{vendor}:{product}")
    # RTL2832U dongles' usual USB ids, from memory
    assert ids == {"0bda:2838", "0bda:2832"}
