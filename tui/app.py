"""``spinflip watch`` and ``spinflip demo``: the terminal UI, a pure subscriber of the daemon.

``watch`` connects one ZeroMQ SUB socket to a daemon's data socket (every topic) and decodes
each message with :func:`spinflip.daemon.live.schema.decode` in a background thread, feeding a
:class:`~spinflip.tui.state.ViewState`; a message that is not per schema is counted and
dropped, never raised. The main thread redraws the whole terminal about four times a second
with :func:`spinflip.tui.panels.screen` sized to the terminal (a rich ``Live`` on the
alternate screen, so the shell's screen comes back unchanged afterwards) and reads keys from
standard input in cbreak mode (no echo, no line buffering; ``termios``/``tty``/``select``):

====  ==========================================================
key   does
====  ==========================================================
g     ``start`` observing
x     ``stop`` observing (the scan is closed; the daemon stays up)
c     ``calibrate`` with ``method=noise_source`` (fire the noise source now)
n     ``new_scan``
p     ``pointed``: the dish is where the manual driver asked (the screen prompts for it)
a     velocity <-> frequency axis (here only, nothing is sent)
v     the normal screen <-> the survey view: the l-v diagram of the scan averages so far,
      the terminal velocities and the rotation curve (reduced here, in the viewer; see
      :mod:`spinflip.tui.survey`)
q     quit
====  ==========================================================

Each command is sent by :func:`spinflip.daemon.live.control.request` in a short-lived thread of
its own with a 3 s timeout, so the screen never freezes on a daemon that does not answer;
its reply (or the error) is shown in ``state.reply``. When standard input is not a terminal
there are no keys. SIGTERM, SIGINT (Ctrl-C) and SIGHUP quit like ``q``: the terminal is
always restored and the exit status is 0.

The SUB socket reconnects by itself when the daemon goes away and comes back (ZeroMQ retries
the connection; a daemon answers a new subscription at once with its latest message of each
topic); meanwhile the state goes stale and the screen says so. ZMTP heartbeats (ZeroMQ 4.2+)
notice a peer that vanished without closing its TCP connection (a host that lost power).

``demo`` starts ``spinflip run`` on the simulator as a child process (free loopback ports, a
temporary configuration with 2 s integrations, a short observation, in real time or with
``--fast``), runs ``watch`` against it, ends on ``q`` or when the observation ends (the screen
says "observation finished" for 2 s), stops the daemon cleanly (SIGTERM, wait: every finished
integration is saved) and prints the daemon's own "saved N integrations ... to PATH" lines.

References
----------
POSIX termios, non-canonical input (``ICANON``, ``ECHO``); Python standard library
:mod:`termios`, :mod:`tty` (``setcbreak``), :mod:`select`, :mod:`signal`.
ZeroMQ RFC 29/PUBSUB and RFC 37/ZMTP 3.1 (heartbeats: ``ZMQ_HEARTBEAT_IVL``,
``ZMQ_HEARTBEAT_TIMEOUT``), from memory; pyzmq ``Socket.get_monitor_socket``.
rich documentation: ``rich.live.Live`` (``screen=True``: alternate screen).
"""

from __future__ import annotations

import contextlib
import os
import select
import shutil
import signal
import subprocess
import sys
import tempfile
import threading
import time
from collections.abc import Callable, Iterator
from pathlib import Path
from types import FrameType
from typing import IO, TYPE_CHECKING, TextIO

import zmq
from rich.text import Text
from zmq.utils.monitor import recv_monitor_message

from spinflip.daemon.config import DEFAULT_CONTROL_ENDPOINT, DEFAULT_DATA_ENDPOINT
from spinflip.daemon.error_line import one_line
from spinflip.daemon.live import schema
from spinflip.daemon.live.control import (
    DEFAULT_TIMEOUT_S,
    ControlError,
    format_result,
    request,
)
from spinflip.daemon.live.ports import free_loopback_port

from . import panels
from .state import ViewState

if TYPE_CHECKING:  # rich's console and the keys are imported where they are used
    from rich.console import Console

    from spinflip.daemon.live.keys import ClientSecurity

try:  # POSIX terminals
    import termios
    import tty
except ImportError:  # pragma: no cover - non-POSIX
    termios = tty = None  # type: ignore[assignment]  # the modules are absent; tested for None

#: Time between two redraws of the screen, s (about 4 per second).
REFRESH_S = 0.25
#: Longest wait for a command's reply, s.
COMMAND_TIMEOUT_S = DEFAULT_TIMEOUT_S
#: How long "observation finished" stays on the screen before the demo ends, s.
FINISHED_SHOW_S = 2.0
#: Longest wait for the demo's daemon to save and exit after SIGTERM, s.
DAEMON_STOP_TIMEOUT_S = 60.0
#: Longest the feed thread waits in one poll before looking at its stop flag, s.
FEED_POLL_S = 0.1
#: Messages applied in one go before the feed thread looks at its stop flag again.
FEED_BURST = 200
#: ZMTP heartbeat interval and timeout of the SUB connection, s.
HEARTBEAT_IVL_S = 2.0
HEARTBEAT_TIMEOUT_S = 6.0
#: Reconnection interval of the SUB socket, first and longest, s.
RECONNECT_IVL_S = 0.2
RECONNECT_IVL_MAX_S = 2.0
#: Integration length of the demo's simulated observation, s.
DEMO_INTEGRATION_S = 2.0
#: Longest reply text kept for the screen, characters.
REPLY_MAX_CHARS = 160

#: Monitor event of a connection ready for data: the ZMTP handshake done (libzmq 4.3+),
#: else the TCP connection made.
_UP_EVENT = getattr(zmq, "EVENT_HANDSHAKE_SUCCEEDED", zmq.EVENT_CONNECTED)
#: Monitor events of a connection the daemon refused (CURVE keys not accepted), libzmq 4.3+.
_REFUSED_EVENTS = (getattr(zmq, "EVENT_HANDSHAKE_FAILED_AUTH", 0)
                   | getattr(zmq, "EVENT_HANDSHAKE_FAILED_PROTOCOL", 0))

#: Keys that send a control command: key -> (command, arguments).
KEY_COMMANDS: dict[str, tuple[str, dict | None]] = {
    "g": ("start", None),
    "x": ("stop", None),
    "c": ("calibrate", {"method": "noise_source"}),
    "n": ("new_scan", None),
    "p": ("pointed", None),
}
#: The key that toggles the spectral axis, the one that toggles the survey view, and the
#: key that quits.
KEY_AXIS = "a"
KEY_VIEW = "v"
KEY_QUIT = "q"


def _one_line(text: str, limit: int = REPLY_MAX_CHARS) -> str:
    """``text`` on one line, at most ``limit`` characters (``…`` marks a cut)."""
    return one_line(text, limit, ellipsis="…")


# --------------------------------------------------------------------------------------------
# the data feed
# --------------------------------------------------------------------------------------------
class Feed(threading.Thread):
    """The SUB socket's thread: receive, decode, apply to the state under the lock.

    Parameters
    ----------
    endpoint : str
        The daemon's data socket, e.g. ``"tcp://127.0.0.1:5621"``.
    state : ViewState
        Updated with :meth:`ViewState.apply` for each valid message; ``state.connected``
        also follows the connection itself (socket monitor events: ZMTP handshake done,
        disconnected, keys refused).
    lock : threading.Lock
        Held while the state is changed (the screen reads it under the same lock).
    security : object, optional
        Anything with ``apply(socket)`` (``keys.ClientSecurity``), applied before connecting.
    context : zmq.Context, optional
        Default ``zmq.Context.instance()``.

    Attributes
    ----------
    received : int
        Messages applied.
    errors : int
        Messages refused by :func:`schema.decode` (not per schema) or that the state could not
        take; each is dropped, never raised. The first one, and then each tenth power, is
        also logged as a warning event on the screen.
    last_error : str
        The latest such error, one line.

    Notes
    -----
    The socket is made and connected in :meth:`open` (the caller's thread, so that a bad
    endpoint is a ``ValueError`` there) and then used only by this thread (pyzmq: a socket
    may change threads across a full memory barrier, such as ``Thread.start``).
    """

    def __init__(self, endpoint: str, state: ViewState, lock: threading.Lock,
                 security: ClientSecurity | None = None, context: zmq.Context | None = None):
        super().__init__(name="spinflip-watch-feed", daemon=True)
        self.endpoint = endpoint
        self.state = state
        self.lock = lock
        self.security = security
        self.context = context or zmq.Context.instance()
        self.received = 0
        self.errors = 0
        self.last_error = ""
        self._stop_event = threading.Event()
        self._sock: zmq.Socket | None = None
        self._monitor: zmq.Socket | None = None
        self._refusal_reported = False

    def open(self) -> None:
        """Make the SUB socket (every topic) and connect it.

        Raises
        ------
        ValueError
            The endpoint cannot be connected to (malformed, unknown transport); one line.
        """
        sock = self.context.socket(zmq.SUB)
        try:
            sock.setsockopt(zmq.LINGER, 0)
            sock.setsockopt(zmq.MAXMSGSIZE, schema.MAX_FRAME_BYTES)   # no frame larger than a spectrum
            sock.setsockopt(zmq.RECONNECT_IVL, int(RECONNECT_IVL_S * 1000))
            sock.setsockopt(zmq.RECONNECT_IVL_MAX, int(RECONNECT_IVL_MAX_S * 1000))
            sock.setsockopt(zmq.HEARTBEAT_IVL, int(HEARTBEAT_IVL_S * 1000))
            sock.setsockopt(zmq.HEARTBEAT_TIMEOUT, int(HEARTBEAT_TIMEOUT_S * 1000))
            if self.security is not None:
                self.security.apply(sock)
            sock.setsockopt(zmq.SUBSCRIBE, b"")
            self._monitor = sock.get_monitor_socket(
                _UP_EVENT | zmq.EVENT_DISCONNECTED | _REFUSED_EVENTS)
            try:
                sock.connect(self.endpoint)
            except zmq.ZMQError as exc:
                raise ValueError(f"data endpoint {self.endpoint!r} cannot be connected to "
                                 f"({exc}): expected e.g. {DEFAULT_DATA_ENDPOINT}") from None
        except BaseException:
            if self._monitor is not None:
                self._monitor.close(0)
                self._monitor = None
            sock.close(0)
            raise
        self._sock = sock

    def stop(self, timeout_s: float = 2.0) -> None:
        """Ask the thread to end and wait for it up to ``timeout_s``."""
        self._stop_event.set()
        if self.is_alive():
            self.join(timeout_s)

    def run(self) -> None:
        if self._sock is None:
            self.open()
        sock, monitor = self._sock, self._monitor
        assert sock is not None and monitor is not None, "open() makes both or raises"
        poller = zmq.Poller()
        poller.register(sock, zmq.POLLIN)
        poller.register(monitor, zmq.POLLIN)
        try:
            while not self._stop_event.is_set():
                ready = dict(poller.poll(int(FEED_POLL_S * 1000)))
                if monitor in ready:
                    self._monitor_events(monitor)
                if sock in ready:
                    self._drain(sock)
        finally:
            try:
                sock.disable_monitor()
            except zmq.ZMQError:
                pass
            monitor.close(0)
            sock.close(0)

    def _drain(self, sock: zmq.Socket) -> None:
        for _ in range(FEED_BURST):
            try:
                frames = sock.recv_multipart(zmq.NOBLOCK)
            except zmq.Again:
                return
            try:
                message = schema.decode(frames)
            except schema.WireError as exc:
                self._error(f"message not per schema, dropped: {exc}")
                continue
            try:
                with self.lock:
                    self.state.apply(message, time.monotonic())
            except Exception as exc:  # a message the state cannot take must not end the feed
                self._error(f"{message.topic} message not shown: {type(exc).__name__}: {exc}")
                continue
            self.received += 1
            self._refusal_reported = False

    def _error(self, text: str) -> None:
        self.errors += 1
        self.last_error = _one_line(text)
        n = self.errors
        if n == 1 or (n % 10 == 0 and str(n).rstrip("0") == "1"):   # 1, 10, 100, ...
            with self.lock:
                self.state.events.append(
                    (schema.now_utc_iso(), "warning",
                     f"{n} bad message{'s' if n > 1 else ''} so far: {self.last_error}"))

    def _monitor_events(self, monitor: zmq.Socket) -> None:
        while True:
            try:
                event = recv_monitor_message(monitor, zmq.NOBLOCK)
            except zmq.Again:
                return
            kind = event["event"]
            with self.lock:
                if kind == _UP_EVENT:
                    self.state.connected = True
                elif kind == zmq.EVENT_DISCONNECTED:
                    self.state.connected = False
                elif kind & _REFUSED_EVENTS:
                    self.state.connected = False
                    if not self._refusal_reported:   # once, not at every retry
                        self._refusal_reported = True
                        self.state.events.append(
                            (schema.now_utc_iso(), "error",
                             f"the daemon at {self.endpoint} refused the connection: is this "
                             f"client on its allow-list, and is server.key the daemon's?"))


# --------------------------------------------------------------------------------------------
# keys and signals
# --------------------------------------------------------------------------------------------
class Keyboard:
    """Keys from a terminal on standard input, in cbreak mode while in a ``with`` block.

    Parameters
    ----------
    stream : file, optional
        Default ``sys.stdin``. When it is not a terminal there are no keys: :meth:`read`
        only waits.

    Notes
    -----
    cbreak mode (``tty.setcbreak``) turns off ``ICANON`` and ``ECHO``: each key is readable at
    once and not echoed; ``ISIG`` stays on, so Ctrl-C still sends SIGINT. The terminal's
    attributes are saved on entry and put back on exit, whatever happened. Bytes of an
    escape sequence (arrow and function keys, which start with ESC) are ignored as a whole,
    so that e.g. the ``A`` of "cursor up" is not taken for a key.
    """

    def __init__(self, stream: TextIO | None = None):
        self.stream = stream if stream is not None else sys.stdin
        self.fd: int | None = None
        self._saved: list | None = None

    def __enter__(self) -> Keyboard:
        if termios is None:
            return self
        try:
            fd = self.stream.fileno()
        except (AttributeError, OSError, ValueError):
            return self
        if not os.isatty(fd):
            return self
        try:
            self._saved = termios.tcgetattr(fd)
            tty.setcbreak(fd, termios.TCSANOW)
        except termios.error:
            self._saved = None
            return self
        self.fd = fd
        return self

    def __exit__(self, *exc: object) -> None:
        if self.fd is not None and self._saved is not None:
            try:
                termios.tcsetattr(self.fd, termios.TCSADRAIN, self._saved)
            except termios.error:   # the terminal is gone (SIGHUP): nothing to restore
                pass
        self.fd = None

    def read(self, timeout_s: float) -> str:
        """The keys typed within ``timeout_s`` seconds (``""``: none)."""
        if self.fd is None:
            time.sleep(timeout_s)
            return ""
        try:
            ready, _, _ = select.select([self.fd], [], [], timeout_s)
            if not ready:
                return ""
            data = os.read(self.fd, 64)
        except OSError:            # the terminal went away
            self.fd = None
            return ""
        if not data:               # end of input: no more keys
            self.fd = None
            return ""
        text = data.decode("utf-8", "replace")
        return "" if "\x1b" in text else text


class QuitOnSignals:
    """While in a ``with`` block, SIGTERM, SIGINT and SIGHUP set ``event`` instead of killing.

    Handlers can only be installed from the main thread; elsewhere this does nothing. The
    previous handlers are put back on exit.
    """

    SIGNALS = tuple(getattr(signal, name) for name in ("SIGTERM", "SIGINT", "SIGHUP")
                    if hasattr(signal, name))

    def __init__(self, event: threading.Event):
        self.event = event
        self.signum: int | None = None   # the signal that asked to quit, if one did
        self._saved: dict = {}

    def __enter__(self) -> QuitOnSignals:
        if threading.current_thread() is not threading.main_thread():
            return self
        for signum in self.SIGNALS:
            self._saved[signum] = signal.signal(signum, self._handle)
        return self

    def _handle(self, signum: int, _frame: FrameType | None) -> None:
        self.signum = signum
        self.event.set()

    def __exit__(self, *exc: object) -> None:
        for signum, handler in self._saved.items():
            signal.signal(signum, handler)
        self._saved.clear()


def wants_ascii(console: Console) -> bool:
    """True when the screen should use ASCII plots, bars and shades instead of braille/blocks.

    That is when the terminal's encoding is not UTF-8 (it cannot show them at all), when it
    is the Linux virtual console or a dumb/VT terminal (fonts without braille: common
    practice), or when it is monochrome or asked for no colour (``NO_COLOR``): the panels'
    ASCII fallback is meant for such terminals.
    """
    encoding = (getattr(console, "encoding", "") or "").lower().replace("-", "")
    term = os.environ.get("TERM", "").lower()
    return (not encoding.startswith("utf8") or term in ("linux", "dumb")
            or term.startswith("vt") or console.color_system is None
            or bool(getattr(console, "no_color", False)))


@contextlib.contextmanager
def _unencodable_replaced(stream: IO[str]) -> Iterator[None]:
    """While in the block, characters ``stream``'s encoding lacks are written as ``?``.

    A terminal whose encoding is not UTF-8 (e.g. ``PYTHONIOENCODING=latin-1``) cannot show
    every character of the screen; without this one such character would end the UI with
    ``UnicodeEncodeError``. Uses :meth:`io.TextIOWrapper.reconfigure`; streams without it
    are left alone.
    """
    errors = getattr(stream, "errors", None)
    reconfigure = getattr(stream, "reconfigure", None)
    if reconfigure is None or errors in (None, "replace"):
        yield
        return
    try:
        reconfigure(errors="replace")
    except (ValueError, OSError):
        yield
        return
    try:
        yield
    finally:
        try:
            reconfigure(errors=errors)
        except (ValueError, OSError):
            pass


# --------------------------------------------------------------------------------------------
# the session
# --------------------------------------------------------------------------------------------
class WatchSession:
    """One running UI: the state, its lock, the feed, the command threads and the screen.

    Parameters
    ----------
    data_endpoint, control_endpoint : str
        The daemon's data and control sockets (``control_endpoint`` ``""``: no commands).
    security : object, optional
        ``keys.ClientSecurity`` for both sockets, or ``None``.
    """

    def __init__(self, data_endpoint: str, control_endpoint: str,
                 security: ClientSecurity | None = None):
        self.state = ViewState()
        self.state.endpoint = data_endpoint
        self.lock = threading.Lock()
        self.control_endpoint = control_endpoint
        self.security = security
        self.feed = Feed(data_endpoint, self.state, self.lock, security)
        self.quit = threading.Event()
        self.render_errors = 0

    # keys --------------------------------------------------------------------------------
    def handle_keys(self, keys: str) -> None:
        """Act on each key of ``keys``: a command, the axis, the view, quit; others are
        ignored."""
        for key in keys.lower():
            if key == KEY_QUIT:
                self.quit.set()
                return
            if key == KEY_AXIS:
                with self.lock:
                    self.state.toggle_axis()
            elif key == KEY_VIEW:
                with self.lock:
                    self.state.toggle_view()
            elif key in KEY_COMMANDS:
                cmd, args = KEY_COMMANDS[key]
                self.send(cmd, args)

    def send(self, cmd: str, args: dict | None = None) -> threading.Thread:
        """Send ``cmd`` in a thread of its own; its reply goes to ``state.reply``."""
        with self.lock:
            self.state.reply = f"{cmd}: sent, waiting for the reply"
        thread = threading.Thread(target=self._request, args=(cmd, args),
                                  name=f"spinflip-watch-{cmd}", daemon=True)
        thread.start()
        return thread

    def _request(self, cmd: str, args: dict | None) -> None:
        if not self.control_endpoint:
            text = f"{cmd}: no control endpoint given"
        else:
            try:
                reply = request(self.control_endpoint, cmd, args, security=self.security,
                                timeout_s=COMMAND_TIMEOUT_S)
            except (ControlError, ValueError) as exc:
                text = f"{cmd}: {exc}"
            except zmq.ZMQError as exc:
                text = f"{cmd}: {exc}"
            else:
                if reply.get("ok"):
                    text = f"{cmd}: ok {format_result(reply.get('result') or {})}"
                else:
                    text = f"{cmd}: refused: {reply.get('error', '?')}"
        with self.lock:
            self.state.reply = _one_line(text)

    # the loop ----------------------------------------------------------------------------
    def render(self, console: Console) -> Text:
        """The whole screen for the console's current size (under the lock).

        A failure of the panels does not end the UI: the screen says what failed, the keys
        (``q``) still work, and the next redraw tries again.
        """
        width, height, ascii = console.width, console.height, wants_ascii(console)
        with self.lock:
            self.state.now_s = time.monotonic()
            try:
                return panels.screen(self.state, width, height, ascii=ascii)
            except Exception as exc:
                self.render_errors += 1
                return Text(_one_line(f"spinflip: the screen could not be drawn "
                                      f"({type(exc).__name__}: {exc}); q quits", width * 2))

    def run(self, console: Console | None = None, duration_s: float | None = None,
            ended: Callable[[], str | None] | None = None, keyboard: Keyboard | None = None) -> int:
        """Show the screen until ``q``, a signal, ``duration_s`` or ``ended()``.

        Parameters
        ----------
        console : rich.console.Console, optional
            Default: a new Console on standard output.
        duration_s : float, optional
            Quit after this many seconds; ``None``: no limit.
        ended : callable, optional
            Called at each redraw; when it returns text (e.g. "observation finished"), that
            text is shown in ``state.reply`` for :data:`FINISHED_SHOW_S` and the UI ends.
        keyboard : Keyboard, optional
            Default: ``Keyboard()`` on standard input.

        Returns
        -------
        int
            0.
        """
        from rich.console import Console
        from rich.live import Live

        console = console if console is not None else Console()
        keyboard = keyboard if keyboard is not None else Keyboard()
        signals = QuitOnSignals(self.quit)
        self.feed.open()
        self.feed.start()
        start_s = time.monotonic()
        finish_at_s = None
        try:
            with signals, keyboard, _unencodable_replaced(console.file):
                # a terminal gets the alternate screen (given back as it was on exit); a file
                # or pipe gets the last screen once, on exit
                on_terminal = console.is_terminal and not console.is_dumb_terminal
                with Live(self.render(console), console=console, screen=on_terminal,
                          auto_refresh=False, transient=False) as live:
                    while not self.quit.is_set():
                        now_s = time.monotonic()
                        if duration_s is not None and now_s - start_s >= duration_s:
                            break
                        if finish_at_s is None and ended is not None:
                            message = ended()
                            if message:
                                with self.lock:
                                    self.state.reply = _one_line(message)
                                    self.state.events.append((schema.now_utc_iso(), "info",
                                                              _one_line(message)))
                                finish_at_s = now_s + FINISHED_SHOW_S
                        if finish_at_s is not None and now_s >= finish_at_s:
                            break
                        live.update(self.render(console), refresh=True)
                        self.handle_keys(keyboard.read(REFRESH_S))
        except OSError:
            if signals.signum != getattr(signal, "SIGHUP", None):
                raise          # after a hang-up the terminal is gone: nothing to restore
        finally:
            self.feed.stop()
        return 0


# --------------------------------------------------------------------------------------------
# entry points
# --------------------------------------------------------------------------------------------
def watch_main(data_endpoint: str = DEFAULT_DATA_ENDPOINT,
               control_endpoint: str = DEFAULT_CONTROL_ENDPOINT,
               keys_dir: str | Path | None = None, console: Console | None = None,
               duration_s: float | None = None) -> int:
    """``spinflip watch``: the live screen of a running daemon.

    Parameters
    ----------
    data_endpoint : str
        The daemon's data (PUB) socket.
    control_endpoint : str
        The daemon's control (REP) socket; ``""`` or ``None``: keys send no commands.
    keys_dir : str or Path, optional
        Folder of client CURVE keys (``spinflip keys DIR --client NAME``); ``None``: none.
    console : rich.console.Console, optional
        Where to draw; default the terminal on standard output.
    duration_s : float, optional
        Quit after this many seconds (tests); ``None``: until ``q`` or a signal.

    Returns
    -------
    int
        0 (``q``, SIGTERM, SIGINT, SIGHUP, or ``duration_s`` reached).

    Raises
    ------
    ValueError
        Unusable keys (``keys.KeysError``) or a data endpoint that cannot be connected to;
        one line, before the screen is taken over.
    """
    security = None
    if keys_dir:
        from spinflip.daemon.live.keys import ClientSecurity
        security = ClientSecurity.from_dir(keys_dir)
    session = WatchSession(data_endpoint, control_endpoint or "", security)
    return session.run(console=console, duration_s=duration_s)


def _say(text: str, stream: TextIO | None = None) -> None:
    """Print one line (standard output by default); a terminal that hung up is ignored."""
    try:
        print(text, file=stream if stream is not None else sys.stdout, flush=True)
    except OSError:
        pass


def demo_config(data_port: int, control_port: int,
                integration_s: float = DEMO_INTEGRATION_S) -> str:
    """The demo daemon's configuration (TOML): the simulator, a part of the Galactic plane
    above the horizon now, ``integration_s`` long integrations, loopback sockets."""
    return (f'[source]\nkind = "sim"\n'
            f'[pointing]\nframe = "auto"\n'
            f'[spectrometer]\nintegration_s = {integration_s!r}\n'
            f'[publish]\ndata = "tcp://127.0.0.1:{data_port}"\n'
            f'control = "tcp://127.0.0.1:{control_port}"\n')


def demo_main(seconds: float = 60, out_dir: str | Path = "spinflip-data", fast: bool = False,
              console: Console | None = None) -> int:
    """``spinflip demo``: observe the simulated sky for a short while and watch it live.

    Parameters
    ----------
    seconds : float
        Observing time, s (simulated time with ``fast``).
    out_dir : str or Path
        Where the daemon saves its FITS files.
    fast : bool
        Run the simulator faster than real time (``spinflip run --fast``; tests).
    console : rich.console.Console, optional
        Where to draw; default the terminal on standard output.

    Returns
    -------
    int
        0 when the daemon ended cleanly (its "saved ..." lines printed), 1 when it failed
        (its last error lines printed on standard error).

    Raises
    ------
    ValueError
        ``seconds`` not a positive finite number; one line.
    """
    seconds = float(seconds)
    if not 0 < seconds < float("inf"):
        raise ValueError(f"demo seconds {seconds!r}: expected a positive number of seconds")
    out = Path(out_dir).expanduser().resolve()
    work = Path(tempfile.mkdtemp(prefix="spinflip-demo-"))
    try:
        data_port, control_port = free_loopback_port(), free_loopback_port()
        while control_port == data_port:
            control_port = free_loopback_port()
        cfg = work / "demo.toml"
        cfg.write_text(demo_config(data_port, control_port))
        cmd = [sys.executable, "-m", "spinflip.cli", "run", "--config", str(cfg),
               "--duration", f"{seconds:g}", "--out", str(out)]
        if fast:
            cmd.append("--fast")
        with open(work / "stdout.txt", "w+") as out_file, \
                open(work / "stderr.txt", "w+") as err_file:
            # a session of its own: Ctrl-C reaches the UI only, which then stops the daemon
            proc = subprocess.Popen(cmd, stdin=subprocess.DEVNULL, stdout=out_file,
                                    stderr=err_file, start_new_session=True)
            try:
                def ended() -> str | None:
                    code = proc.poll()
                    if code is None:
                        return None
                    if code == 0:
                        return "observation finished"
                    return f"the daemon stopped with exit status {code}"

                session = WatchSession(f"tcp://127.0.0.1:{data_port}",
                                       f"tcp://127.0.0.1:{control_port}")
                session.run(console=console, ended=ended)
            finally:
                if proc.poll() is None:
                    proc.send_signal(signal.SIGTERM)
                    _say("spinflip demo: stopping the daemon (every finished integration is "
                         "saved) ...")
                    with QuitOnSignals(threading.Event()):   # a second Ctrl-C: let it save
                        try:
                            proc.wait(DAEMON_STOP_TIMEOUT_S)
                        except subprocess.TimeoutExpired:
                            proc.kill()
                            proc.wait()
            out_file.seek(0)
            err_file.seek(0)
            said, errors = out_file.read(), err_file.read()
        for line in said.splitlines():
            _say(line)
        if proc.returncode != 0:
            for line in errors.splitlines()[-5:]:
                _say(line, sys.stderr)
            _say(f"spinflip demo: the daemon ended with exit status {proc.returncode}",
                 sys.stderr)
            return 1
        return 0
    finally:
        shutil.rmtree(work, ignore_errors=True)


if __name__ == "__main__":   # ``python -m spinflip.tui.app watch|demo ...``: the one command line
    from spinflip.cli import main
    sys.exit(main())
