"""The service manager's notification protocol (sd_notify) and a watchdog pinger, in pure Python.

Under ``Type=notify`` systemd starts the daemon with ``NOTIFY_SOCKET`` in its environment and
waits for ``READY=1`` before it counts the service as started; with ``WatchdogSec=`` it also sets
``WATCHDOG_USEC`` (and ``WATCHDOG_PID``) and kills and restarts a service that stops sending
``WATCHDOG=1``. Outside systemd (a terminal, the tests) ``NOTIFY_SOCKET`` is unset and every call
here does nothing and returns False.

The protocol (sd_notify(3), NOTES):

- ``NOTIFY_SOCKET`` names an ``AF_UNIX`` datagram socket: an absolute path (``/run/...``), or,
  when it starts with ``@``, a name in Linux's abstract namespace (the ``@`` stands for a leading
  NUL byte of ``sun_path``, unix(7)). Other forms (``vsock:``, relative paths) are not handled
  here: the notifier is then disabled and says so once.
- One message is ONE datagram: newline-separated ``KEY=VALUE`` assignments, like an environment
  block (``READY=1\\nSTATUS=observing``). The manager reads at most ``PIPE_BUF`` = 4096 bytes of a
  datagram (``NOTIFY_BUFFER_MAX`` in systemd's ``src/basic/def.h``); longer ones are refused here.
- The watchdog (sd_watchdog_enabled(3)) applies to this process if ``WATCHDOG_USEC`` is set and
  ``WATCHDOG_PID`` is unset or equal to our PID; "it is recommended that a daemon sends a
  keep-alive notification message to the service manager every half of the time returned here",
  so the ping interval is

      t_ping = WATCHDOG_USEC / 2 / 10^6   [s].

- systemd.service(5), ``WatchdogSec=``: the watchdog is armed once start-up is completed (after
  ``READY=1``); a missed ping puts the service in the failed state, and ``Restart=on-failure``
  restarts it. ``NotifyAccess=main`` accepts messages only from the main process (any of its
  threads: the kernel reports the process, not the thread, as sender).

:class:`WatchdogPinger` pings from its own thread, but only while an ``alive()`` callable says the
main loop made progress recently: a loop that hangs stops the pings, and systemd restarts it. A
ping from a thread that ignores the main loop would keep a hung daemon "healthy" for ever.
:class:`Heartbeat` is such an ``alive()``: the main loop calls ``beat()``, and ``alive()`` is true
while the last beat is younger than ``max_silence_s``.

Worst case, a hang is noticed after ``max_silence_s + t_ping + WatchdogSec`` (the last ping can
come just before the heartbeat goes stale; systemd waits ``WatchdogSec`` after it).

References
----------
systemd, sd_notify(3): the message format, ``READY=1``, ``STATUS=``, ``STOPPING=1``,
``WATCHDOG=1``, ``EXTEND_TIMEOUT_USEC=``; NOTIFY_SOCKET path or ``@`` abstract name.
systemd, sd_watchdog_enabled(3): ``WATCHDOG_USEC``, ``WATCHDOG_PID``, ping every half interval.
systemd, systemd.service(5): ``Type=notify``, ``NotifyAccess=``, ``WatchdogSec=``.
Linux man-pages, unix(7): abstract socket addresses.
"""

from __future__ import annotations

import logging
import math
import os
import re
import socket
import threading
import time
from collections.abc import Callable, Mapping

_logger = logging.getLogger("spinflip.sd_notify")

#: Largest datagram the service manager reads, bytes: NOTIFY_BUFFER_MAX = PIPE_BUF, 4096 on Linux
#: (systemd, src/basic/def.h).
NOTIFY_DATAGRAM_MAX_BYTES = 4096
#: Longest ``STATUS=`` text :meth:`Notifier.status` sends, characters (``systemctl status`` shows
#: one line; the rest is cut, with "...").
STATUS_MAX_CHARS = 512
#: Longest a send may block when the manager's receive queue is full, s.
SEND_TIMEOUT_S = 1.0
#: How long :meth:`WatchdogPinger.stop` waits for the thread, s.
STOP_JOIN_TIMEOUT_S = 5.0
#: Microseconds per second.
_USEC_PER_S = 1_000_000
#: A key of the protocol: upper-case letters, digits and underscores, as in an environment block.
_KEY_RE = re.compile(r"[A-Z][A-Z0-9_]*\Z")

LogFunc = Callable[[str], None]


def _default_log(message: str) -> None:
    _logger.warning("%s", message)


def socket_address(notify_socket: str) -> str:
    """The ``AF_UNIX`` address of a ``NOTIFY_SOCKET`` value.

    Parameters
    ----------
    notify_socket : str
        ``/absolute/path`` or ``@name`` (Linux abstract namespace).

    Returns
    -------
    str
        The path, or ``"\\0name"`` for an abstract name (Python's form of an abstract address).

    Raises
    ------
    ValueError
        For anything else (empty, relative path, ``vsock:``), with one line naming the value.

    Notes
    -----
    sd_notify(3): "If the first character of $NOTIFY_SOCKET is "/" or "@", the string is
    understood as an AF_UNIX or Linux abstract namespace socket (respectively)". unix(7): an
    abstract address is a ``sun_path`` whose first byte is NUL.
    """
    if notify_socket.startswith("/"):
        return notify_socket
    if notify_socket.startswith("@") and len(notify_socket) > 1:
        return "\0" + notify_socket[1:]
    raise ValueError(f"NOTIFY_SOCKET = {notify_socket!r}: expected an absolute socket path or "
                     "'@name' (abstract namespace); other kinds are not supported")


def _positive_int(text: str | None) -> int | None:
    """``text`` as an integer > 0, or None when it is missing or not one."""
    if text is None:
        return None
    try:
        value = int(text.strip(), 10)
    except ValueError:
        return None
    return value if value > 0 else None


def _field_value(value: object) -> str:
    """A value for one ``KEY=VALUE`` line: booleans as 1/0, line breaks made spaces."""
    if isinstance(value, bool):
        return "1" if value else "0"
    return str(value).replace("\r", " ").replace("\n", " ")


class Notifier:
    """Sender of sd_notify messages to the service manager.

    Parameters
    ----------
    address : str or None
        ``AF_UNIX`` address (a path, or ``"\\0name"`` for the abstract namespace); None: disabled
        (not started by systemd), every send returns False.
    watchdog_usec : int or None
        The watchdog timeout the manager expects pings within, microseconds; None: no watchdog.
    log : callable, optional
        Takes one line of text; told once when sending starts failing (and when it recovers).
        Default: a warning on the ``spinflip.sd_notify`` logger.

    Attributes
    ----------
    address, watchdog_usec : as given.

    Notes
    -----
    One unconnected datagram socket is kept and each message is sent to the address with
    ``sendto``, so a restarted service manager (``systemctl daemon-reexec``) is found again.
    The socket has a send timeout of :data:`SEND_TIMEOUT_S`, so a manager that does not read
    cannot block the caller for longer. A lock makes sends from several threads safe.
    """

    def __init__(self, address: str | None, watchdog_usec: int | None = None,
                 log: LogFunc | None = None):
        self.address = address
        self.watchdog_usec = watchdog_usec
        self._log = log if log is not None else _default_log
        self._sock: socket.socket | None = None
        self._lock = threading.Lock()
        self._failing = False

    @classmethod
    def from_env(cls, environ: Mapping[str, str] = os.environ,
                 log: LogFunc | None = None) -> Notifier:
        """The notifier that the process environment describes.

        Parameters
        ----------
        environ : mapping
            ``NOTIFY_SOCKET``, ``WATCHDOG_USEC`` and ``WATCHDOG_PID`` are read from it.
        log : callable, optional
            As for :class:`Notifier`; also told about an unusable ``NOTIFY_SOCKET`` or
            ``WATCHDOG_USEC``.

        Returns
        -------
        Notifier
            Disabled when ``NOTIFY_SOCKET`` is unset, empty or of an unsupported kind.

        Notes
        -----
        sd_watchdog_enabled(3): the watchdog applies when ``WATCHDOG_USEC`` is set and
        ``WATCHDOG_PID`` is unset or equal to this process's PID (a child that inherited the
        variables must not ping for its parent). A ``WATCHDOG_USEC`` that is not a positive
        integer means no watchdog.
        """
        say = log if log is not None else _default_log
        address = None
        raw_socket = environ.get("NOTIFY_SOCKET", "")
        if raw_socket:
            try:
                address = socket_address(raw_socket)
            except ValueError as exc:
                say(f"service notifications off: {exc}")
        watchdog_usec = None
        raw_usec = environ.get("WATCHDOG_USEC")
        if raw_usec is not None:
            watchdog_usec = _positive_int(raw_usec)
            if watchdog_usec is None:
                say(f"watchdog off: WATCHDOG_USEC = {raw_usec!r} is not a positive integer "
                    "of microseconds")
            raw_pid = environ.get("WATCHDOG_PID")
            if raw_pid is not None and _positive_int(raw_pid) != os.getpid():
                watchdog_usec = None          # meant for another process
        return cls(address, watchdog_usec, log=log)

    @property
    def enabled(self) -> bool:
        """True when there is a service manager to notify."""
        return self.address is not None

    @property
    def watchdog_interval_s(self) -> float | None:
        """Seconds between watchdog pings, half of ``WATCHDOG_USEC``; None without a watchdog.

        Notes
        -----
        t_ping = WATCHDOG_USEC / 2 / 10^6 s, the half interval sd_watchdog_enabled(3)
        recommends. None also when notifications are disabled (nobody to ping).
        """
        if self.watchdog_usec is None or not self.enabled:
            return None
        return self.watchdog_usec / 2 / _USEC_PER_S

    def send(self, **fields: object) -> bool:
        """Send ``KEY=VALUE`` assignments to the service manager in one datagram.

        Parameters
        ----------
        **fields
            Keys as the protocol spells them (``READY=1`` is ``send(READY=1)``); values are made
            text, booleans ``1``/``0``, line breaks inside a value spaces.

        Returns
        -------
        bool
            True when the datagram was sent; False when notifications are disabled, nothing was
            given, a key is not an upper-case name, the message is longer than
            :data:`NOTIFY_DATAGRAM_MAX_BYTES`, or the socket failed. Never raises.

        Notes
        -----
        The message is ``"\\n".join(f"{key}={value}")``, sd_notify(3)'s newline-separated list
        of assignments. The first failure after a success (or after start) is logged once.
        """
        if not self.enabled or not fields:
            return False
        assert self.address is not None         # enabled
        bad = [k for k in fields if not _KEY_RE.match(k)]
        if bad:
            self._log(f"service notification not sent: key {bad[0]!r} is not an upper-case "
                      "name such as READY or STATUS")
            return False
        message = "\n".join(f"{k}={_field_value(v)}" for k, v in fields.items())
        data = message.encode("utf-8", errors="replace")
        if len(data) > NOTIFY_DATAGRAM_MAX_BYTES:
            self._log(f"service notification not sent: {len(data)} bytes, the service manager "
                      f"reads at most {NOTIFY_DATAGRAM_MAX_BYTES}")
            return False
        with self._lock:
            try:
                if self._sock is None:
                    sock = socket.socket(socket.AF_UNIX, socket.SOCK_DGRAM | socket.SOCK_CLOEXEC)
                    sock.settimeout(SEND_TIMEOUT_S)
                    self._sock = sock
                self._sock.sendto(data, self.address)
            except OSError as exc:
                if not self._failing:
                    self._failing = True
                    self._log(f"cannot notify the service manager at {self._shown_address()}: "
                              f"{exc.strerror or exc}; carrying on without (said once)")
                return False
            if self._failing:
                self._failing = False
                self._log(f"notifying the service manager at {self._shown_address()} works again")
            return True

    def _shown_address(self) -> str:
        address = self.address or ""
        return "@" + address[1:] if address.startswith("\0") else address

    def ready(self, status: str | None = None) -> bool:
        """``READY=1`` (start-up finished; ``Type=notify`` waits for it), with a status line."""
        if status is None:
            return self.send(READY=1)
        return self.send(READY=1, STATUS=_status_text(status))

    def status(self, text: str) -> bool:
        """``STATUS=text``: one line shown by ``systemctl status`` (cut to STATUS_MAX_CHARS)."""
        return self.send(STATUS=_status_text(text))

    def watchdog(self) -> bool:
        """``WATCHDOG=1``: the keep-alive ping (sd_notify(3))."""
        return self.send(WATCHDOG=1)

    def stopping(self, status: str | None = None) -> bool:
        """``STOPPING=1`` (shutting down, e.g. on SIGTERM), with a status line."""
        if status is None:
            return self.send(STOPPING=1)
        return self.send(STOPPING=1, STATUS=_status_text(status))

    def extend_timeout(self, seconds: float) -> bool:
        """``EXTEND_TIMEOUT_USEC``: ask for ``seconds`` more before the start or stop timeout.

        Parameters
        ----------
        seconds : float
            Time, s, within which the next message must come (sd_notify(3): the start-up,
            runtime or shutdown timeout of the current state is extended by it).

        Raises
        ------
        ValueError
            When ``seconds`` is not a finite number above 0.

        Notes
        -----
        EXTEND_TIMEOUT_USEC = round(seconds * 10^6). It does not move the watchdog.
        """
        if isinstance(seconds, bool) or not isinstance(seconds, (int, float)) \
                or not math.isfinite(seconds) or seconds <= 0:
            raise ValueError(f"extend_timeout seconds = {seconds!r}: expected a finite number "
                             "of seconds above 0")
        return self.send(EXTEND_TIMEOUT_USEC=max(1, round(seconds * _USEC_PER_S)))

    def close(self) -> None:
        """Close the socket (a later send opens a new one)."""
        with self._lock:
            if self._sock is not None:
                self._sock.close()
                self._sock = None


def _status_text(text: str) -> str:
    flat = " ".join(str(text).split())
    return flat if len(flat) <= STATUS_MAX_CHARS else flat[: STATUS_MAX_CHARS - 3] + "..."


class Heartbeat:
    """Whether a loop made progress recently: the loop calls ``beat()``, anyone asks ``alive()``.

    Parameters
    ----------
    max_silence_s : float
        ``alive()`` is true while the last beat is at most this old, s. Choose it longer than
        the slowest legitimate step of the loop (e.g. a USB reconnect attempt).
    clock : callable, optional
        Monotonic seconds (``time.monotonic``); a fake in tests.

    Notes
    -----
    Created alive: the first beat counts from construction. Reading and writing one float is
    atomic under the GIL, so no lock is needed.
    """

    def __init__(self, max_silence_s: float, clock: Callable[[], float] = time.monotonic):
        if isinstance(max_silence_s, bool) or not isinstance(max_silence_s, (int, float)) \
                or not math.isfinite(max_silence_s) or max_silence_s <= 0:
            raise ValueError(f"heartbeat max_silence_s = {max_silence_s!r}: expected a finite "
                             "number of seconds above 0")
        self.max_silence_s = float(max_silence_s)
        self._clock = clock
        self._last_s = clock()

    def beat(self) -> None:
        """The loop made progress now."""
        self._last_s = self._clock()

    def silence_s(self) -> float:
        """Seconds since the last beat."""
        return self._clock() - self._last_s

    def alive(self) -> bool:
        """True while the last beat is at most ``max_silence_s`` old."""
        return self.silence_s() <= self.max_silence_s


class WatchdogPinger:
    """A thread that sends ``WATCHDOG=1`` every interval while ``alive()`` says so.

    Parameters
    ----------
    notifier : Notifier
        Where the pings go.
    alive : callable
        Returns True while the main loop made progress recently (e.g. :meth:`Heartbeat.alive`).
        An exception from it counts as False (and is logged once).
    interval_s : float, optional
        Seconds between pings; default ``notifier.watchdog_interval_s`` (half of
        ``WATCHDOG_USEC``).
    log : callable, optional
        Takes one line: told once when pings stop for want of progress, and when they resume.
        Default: a warning on the ``spinflip.sd_notify`` logger.

    Attributes
    ----------
    pings_sent : int
        Pings sent so far (successful sends).

    Notes
    -----
    The thread pings at once when started, then waits ``interval_s`` between checks (an
    ``Event.wait``, so :meth:`stop` ends it at once). While ``alive()`` is False it sends
    nothing, so systemd's watchdog (systemd.service(5), ``WatchdogSec=``) fires ``WatchdogSec``
    after the last ping and ``Restart=on-failure`` restarts the daemon; if the loop recovers
    first, pings resume. The thread is a daemon thread: it never keeps the process alive.
    """

    def __init__(self, notifier: Notifier, alive: Callable[[], bool],
                 interval_s: float | None = None, log: LogFunc | None = None,
                 guard: Callable[[str, Callable[[], None]], Callable[[], None]] | None = None):
        self.notifier = notifier
        self._guard = guard
        self.interval_s = notifier.watchdog_interval_s if interval_s is None else interval_s
        if self.interval_s is not None and (not math.isfinite(self.interval_s)
                                            or self.interval_s <= 0):
            raise ValueError(f"watchdog interval_s = {interval_s!r}: expected a finite number "
                             "of seconds above 0")
        self._alive = alive
        self._log = log if log is not None else _default_log
        self._stop = threading.Event()
        self._thread: threading.Thread | None = None
        self.pings_sent = 0

    @property
    def running(self) -> bool:
        """True while the pinging thread runs."""
        return self._thread is not None and self._thread.is_alive()

    def start(self) -> bool:
        """Start pinging; False (and nothing started) when there is no watchdog to ping."""
        if self.interval_s is None or self.running:
            return self.running
        self._stop.clear()
        target = self._guard("watchdog", self._run) if self._guard is not None else self._run
        self._thread = threading.Thread(target=target, name="spinflip-watchdog", daemon=True)
        self._thread.start()
        return True

    def stop(self) -> None:
        """Stop pinging and wait for the thread (at most STOP_JOIN_TIMEOUT_S)."""
        self._stop.set()
        if self._thread is not None:
            self._thread.join(STOP_JOIN_TIMEOUT_S)
            self._thread = None

    def _run(self) -> None:
        withheld = False
        while not self._stop.is_set():
            try:
                ok = bool(self._alive())
                why = "the main loop made no progress recently"
            except Exception as exc:                # a broken alive() must not end the thread
                ok = False
                why = f"alive() failed ({type(exc).__name__}: {exc})"
            if ok:
                if self.notifier.watchdog():
                    self.pings_sent += 1
                if withheld:
                    withheld = False
                    self._log("watchdog: the main loop makes progress again; pinging resumed")
            elif not withheld:
                withheld = True
                self._log(f"watchdog: {why}; pings withheld, so the service manager restarts "
                          "the daemon unless it recovers")
            if self._stop.wait(self.interval_s):
                break

    def __enter__(self) -> WatchdogPinger:
        self.start()
        return self

    def __exit__(self, *exc_info: object) -> None:
        self.stop()
