"""The terminal UI live, in real terminals: tmux panes running ``demo`` and ``watch``.

Each test starts a private tmux server (its own socket, ``tmux -L NAME``), runs the UI in a
detached pane of a fixed size, reads the pane with ``tmux capture-pane -p`` and types with
``tmux send-keys``. The pane's command is wrapped as ``sh -c 'APP; echo EXIT:$? > FILE;
stty -a > FILE2; sleep ...'`` so that the exit status and the terminal's modes after the UI
are known, and the pane stays to be read after the UI has left the alternate screen.

- ``demo`` (simulator, ``--fast``) at 80x24 and 160x50 shows a plotted spectrum against
  km/s, Tsys in K, progress in % with an ETA and an interference readout; ``c`` sends a
  calibration command whose reply appears; ``q`` quits with status 0, the terminal is back
  in canonical mode with echo, and the daemon's "saved N integrations" line is printed;
- ``demo`` whose observation ends says "observation finished" and exits 0 by itself
  (with ``NO_COLOR`` set: the ASCII plot, no braille);
- ``watch`` against a real-time daemon that is killed (SIGKILL) shows the stale warning,
  and when a daemon comes back on the same ports the data return and the warning goes;
  ``x`` reaches the new daemon; Ctrl-C (SIGINT) quits with status 0, the terminal restored;
- in-process: bad messages on the data socket are counted and dropped while good ones
  arrive; the keyboard reads single keys in cbreak mode on a pseudo-terminal, ignores escape
  sequences and restores the terminal's modes.

tmux is a requirement of this file (``scripts/setup.sh`` installs it): without it the tests
fail, saying so; they do not skip.
"""

import io
import os
import re
import shlex
import shutil
import signal
import subprocess
import sys
import termios
import threading
import time
import uuid

import pytest
import zmq
from cli_runner import write_config
from rich.console import Console

from spinflip.daemon.live import schema
from spinflip.tui.app import Keyboard, WatchSession, free_loopback_port

pytestmark = pytest.mark.live      # real-time: seconds of wall time (CI runs it)

#: How often a pane is read while waiting for something to appear, s.
POLL_S = 0.2


def require_tmux() -> str:
    path = shutil.which("tmux")
    assert path is not None, ("tmux is not installed, and these tests drive the UI in tmux "
                              "panes: run bash scripts/setup.sh or apt-get install tmux")
    return path


def app_argv(*args) -> list[str]:
    return [sys.executable, "-m", "spinflip.tui.app", *map(str, args)]


class Pane:
    """A detached tmux pane of ``width`` x ``height`` running ``argv`` on a private server."""

    def __init__(self, tmp_path, width, height, argv):
        self.tmux = require_tmux()
        self.server = f"spinflip-test-{os.getpid()}-{uuid.uuid4().hex[:8]}"
        self.exit_file = tmp_path / f"{self.server}.exit"
        self.stty_file = tmp_path / f"{self.server}.stty"
        self.width, self.height, self.argv = width, height, argv
        self.env = {k: v for k, v in os.environ.items() if k not in ("TMUX", "TMUX_PANE")}
        self.env.setdefault("TERM", "xterm-256color")
        self.last = ""

    def _tmux(self, *args, check=True) -> subprocess.CompletedProcess:
        return subprocess.run([self.tmux, "-L", self.server, *args], env=self.env,
                              capture_output=True, text=True, check=check, timeout=20)

    def __enter__(self):
        # the shell survives the Ctrl-C meant for the UI (a trapped signal is reset to its
        # default in the child, POSIX sh), then records the UI's exit status and the modes
        script = (f"trap : INT; {shlex.join(self.argv)}; "
                  f"echo EXIT:$? > {shlex.quote(str(self.exit_file))}; "
                  f"stty -a > {shlex.quote(str(self.stty_file))} 2>&1; sleep 300")
        self._tmux("-f", "/dev/null", "new-session", "-d", "-s", "ui", "-x", str(self.width),
                   "-y", str(self.height), "sh", "-c", script)
        return self

    def __exit__(self, *exc):
        self._tmux("kill-server", check=False)

    def screen(self) -> str:
        self.last = self._tmux("capture-pane", "-p", "-t", "ui").stdout
        assert "Traceback" not in self.last, self.last
        return self.last

    def keys(self, *keys) -> None:
        self._tmux("send-keys", "-t", "ui", *keys)

    def wait_for(self, check, timeout_s: float, what: str) -> str:
        """Read the pane until ``check(screen)`` is true; fail naming ``what`` otherwise."""
        end = time.monotonic() + timeout_s
        while True:
            screen = self.screen()
            if check(screen):
                return screen
            if time.monotonic() > end:
                raise AssertionError(f"no {what} on the screen within {timeout_s:g} s:\n{screen}")
            if self.exit_file.exists() and not check(self.screen()):
                raise AssertionError(f"the UI ended ({self.exit_file.read_text().strip()}) "
                                     f"before showing {what}:\n{self.last}")
            time.sleep(POLL_S)

    def exit_status(self, timeout_s: float) -> int:
        end = time.monotonic() + timeout_s
        while not (self.exit_file.exists() and self.exit_file.read_text().endswith("\n")):
            assert time.monotonic() < end, f"the UI did not exit:\n{self.screen()}"
            time.sleep(POLL_S)
        text = self.exit_file.read_text().strip()
        assert text.startswith("EXIT:"), text
        return int(text[len("EXIT:"):])

    def terminal_modes(self) -> list[str]:
        end = time.monotonic() + 10
        while not self.stty_file.exists() or "icanon" not in self.stty_file.read_text():
            assert time.monotonic() < end, "stty -a gave nothing after the UI ended"
            time.sleep(POLL_S)
        return self.stty_file.read_text().split()


# --- what the screen must show (words the panels print; units as issue 6 asks) ------------
BRAILLE_DOTS = re.compile("[\u2801-\u28ff]")   # braille cells with at least one dot


def has_spectrum(screen: str) -> bool:
    """A plot of dots, and km/s on a line that is not the key help (which names the axes)."""
    plot_lines = [line for line in screen.splitlines() if "[q]" not in line]
    return (len(BRAILLE_DOTS.findall(screen)) >= 20
            and any("km/s" in line for line in plot_lines))


def has_tsys(screen: str) -> bool:
    return re.search(r"Tsys\s+\d+(\.\d+)?\s?K\b", screen) is not None


def has_progress(screen: str) -> bool:
    return re.search(r"\b\d{1,3}\s?%.*\bETA\b", screen) is not None


def has_interference(screen: str) -> bool:
    return re.search(r"flagged\s+\d+(\.\d+)?\s?%", screen) is not None


def shows_observation(screen: str) -> bool:
    return all(f(screen) for f in (has_spectrum, has_tsys, has_progress, has_interference))


def assert_terminal_restored(pane: Pane) -> None:
    # POSIX stty -a lists a mode without '-' when it is on (icanon: line input; echo)
    modes = pane.terminal_modes()
    assert "icanon" in modes and "-icanon" not in modes, modes
    assert "echo" in modes and "-echo" not in modes, modes


@pytest.mark.parametrize("width,height", [(80, 24), (160, 50)])
def test_demo_shows_the_observation_and_quits_on_q(tmp_path, width, height):
    out = tmp_path / "out"
    argv = app_argv("demo", "--fast", "--seconds", 3600, "--out", out)
    with Pane(tmp_path, width, height, argv) as pane:
        pane.wait_for(shows_observation, 15,
                      "spectrum (km/s), Tsys (K), progress (%, ETA) and interference")
        pane.keys("c")
        pane.wait_for(lambda s: "calibrate: ok" in s, 10, "reply to the calibrate key")
        pane.keys("q")
        assert pane.exit_status(60) == 0, pane.screen()
        after = pane.wait_for(lambda s: re.search(r"saved \d+ integrations?", s), 10,
                              "'saved N integrations' line after the UI")
        assert "[q]" not in after                  # the alternate screen is gone
        assert_terminal_restored(pane)
    assert list(out.glob("*.fits"))


def test_demo_says_observation_finished_and_ends_by_itself(tmp_path):
    out = tmp_path / "out"
    # NO_COLOR (https://no-color.org): the ASCII fallback, no braille
    # 16 s of simulated sky: long enough that the UI is connected before the daemon ends
    argv = ["env", "NO_COLOR=1", *app_argv("demo", "--fast", "--seconds", 16, "--out", out)]
    with Pane(tmp_path, 100, 30, argv) as pane:
        screen = pane.wait_for(lambda s: "observation finished" in s, 30,
                               "'observation finished'")
        assert has_tsys(screen) and "km/s" in screen
        assert not BRAILLE_DOTS.search(screen) and re.search(r"[.:|]{3}", screen), screen
        assert pane.exit_status(30) == 0, pane.screen()
        pane.wait_for(lambda s: re.search(r"saved \d+ integrations?", s), 10,
                      "'saved N integrations' line after the UI")
        assert_terminal_restored(pane)


CONFIG = """
[pointing]
frame = "auto"
[spectrometer]
integration_s = 1.0
[publish]
data = "tcp://127.0.0.1:{data}"
control = "tcp://127.0.0.1:{control}"
"""


def start_daemon(cfg, out) -> subprocess.Popen:
    with open(f"{out}.log", "w") as log:      # the child keeps its own copy of the file
        return subprocess.Popen([sys.executable, "-m", "spinflip.cli", "run",
                                 "--config", str(cfg), "--duration", "120", "--out", str(out)],
                                stdin=subprocess.DEVNULL, stdout=log, stderr=log)


def test_watch_survives_the_daemon_killed_and_restarted(tmp_path):
    ports = {"data": free_loopback_port(), "control": free_loopback_port()}
    cfg = write_config(tmp_path / "c.toml", CONFIG.format(**ports))
    argv = app_argv("watch", "--connect", f"tcp://127.0.0.1:{ports['data']}",
                    "--control", f"tcp://127.0.0.1:{ports['control']}")
    daemons = [start_daemon(cfg, tmp_path / "out1")]
    try:
        with Pane(tmp_path, 100, 30, argv) as pane:
            pane.wait_for(lambda s: has_tsys(s) and has_spectrum(s) and "STALE" not in s, 20,
                          "data from the first daemon")
            daemons[0].kill()                            # SIGKILL: no goodbye on the wire
            daemons[0].wait(10)
            pane.wait_for(lambda s: "STALE" in s, 8, "stale warning")
            daemons.append(start_daemon(cfg, tmp_path / "out2"))
            pane.wait_for(lambda s: "STALE" not in s and has_tsys(s), 10,
                          "data from the restarted daemon without the stale warning")
            pane.keys("x")                               # control reaches the new daemon
            pane.wait_for(lambda s: "stop: ok" in s, 10, "reply to the stop key")
            pane.keys("C-c")                             # SIGINT quits like q
            assert pane.exit_status(20) == 0, pane.screen()
            assert_terminal_restored(pane)
    finally:
        for proc in daemons:
            if proc.poll() is None:
                proc.send_signal(signal.SIGTERM)
                try:
                    proc.wait(30)
                except subprocess.TimeoutExpired:
                    proc.kill()
                    proc.wait()


def test_feed_counts_bad_messages_and_keeps_the_good_ones():
    """Garbage on the data socket is counted and dropped; valid messages still arrive."""
    ctx = zmq.Context.instance()
    pub = ctx.socket(zmq.PUB)
    pub.setsockopt(zmq.LINGER, 0)
    port = pub.bind_to_random_port("tcp://127.0.0.1")
    stop = threading.Event()
    good = schema.encode("event", {"severity": "warning", "text": "dew on the feed"})
    bad = [[b"spectrum", b"{not json"], [b"nosuchtopic", b"{}"], [b"status"]]

    def publish():
        while not stop.is_set():           # a PUB drops what it sends before the SUB joins
            for frames in bad + [good]:
                pub.send_multipart(frames)
            time.sleep(0.05)

    session = WatchSession(f"tcp://127.0.0.1:{port}", "")
    thread = threading.Thread(target=publish, daemon=True)
    thread.start()
    try:
        assert session.run(console=Console(file=io.StringIO(), width=80, height=24),
                           duration_s=1.5) == 0
    finally:
        stop.set()
        thread.join(5)
        pub.close(0)
    assert session.feed.errors >= 3 and session.feed.received >= 1
    texts = [text for _, _, text in session.state.events]
    assert "dew on the feed" in texts
    assert any(text.startswith("1 bad message so far") for text in texts), texts
    # a key without a control endpoint says so instead of hanging
    session.send("new_scan").join(5)
    assert session.state.reply == "new_scan: no control endpoint given"


def test_keyboard_reads_single_keys_in_cbreak_mode_and_restores_the_terminal():
    """On a pseudo-terminal: keys arrive one by one without Enter, escape sequences (arrow
    keys) are not taken for letters, and the terminal's modes come back afterwards."""
    master, slave = os.openpty()
    try:
        with os.fdopen(slave, "r", closefd=False) as stream:
            before = termios.tcgetattr(slave)
            with Keyboard(stream) as keyboard:
                lflag = termios.tcgetattr(slave)[3]
                # POSIX termios: ICANON off = no line editing, ECHO off = keys not echoed
                assert not lflag & termios.ICANON and not lflag & termios.ECHO
                os.write(master, b"g")
                assert keyboard.read(2.0) == "g"
                os.write(master, b"\x1b[A")          # cursor up: ESC [ A
                assert keyboard.read(2.0) == ""
                assert keyboard.read(0.05) == ""     # nothing typed: nothing read
            assert termios.tcgetattr(slave) == before
    finally:
        os.close(master)
        os.close(slave)
