"""The control channel of the daemon: JSON commands over a ZeroMQ socket, and its client.

A request is one ZeroMQ frame of at most :data:`MAX_REQUEST_BYTES`, holding a UTF-8 JSON object

    ``{"cmd": NAME, "args": {...}, "id": ID}``   (``"args"`` may be left out: no arguments;
                                                  ``"id"`` may be left out: no retry safety)

and every request gets exactly one reply frame, a JSON object

    ``{"ok": true, "result": {...}}``  or  ``{"ok": false, "error": "one line"}``

(with ``"id": ID`` added when the request had one). Clients use REQ sockets (or DEALER with
the empty delimiter frame REQ adds).

Retrying safely: ``ID`` is a string of 1 to :data:`MAX_ID_CHARS` printable ASCII characters
the client makes up (e.g. a random UUID). The server remembers the reply to each request with
an id, the last :data:`ID_CACHE_SIZE` for :data:`ID_CACHE_S` s, and answers a request whose id
it remembers with that reply again without running the command again; the same id with
another command or other arguments is refused. :func:`request` sends an id and, when no reply
comes, sends the same request again (same id) on a new connection, within its timeout.

The commands and their arguments are the table :data:`COMMANDS`. Checking is strict: bytes
that are not UTF-8, JSON that is not an object, top-level keys other than ``cmd`` and ``args``,
duplicate keys, unknown commands, unknown or missing arguments, a value of the wrong JSON type
(``true`` is not a number), a number out of range or not finite (``NaN``, ``Infinity``,
``1e999``), text that is not printable or too long: each is refused with one line naming what
was wrong, the value, and what is allowed. Numbers may be given as JSON integers; they reach
the handler as ``float``. Optional arguments that were not given are absent from ``args``.

:class:`ControlServer` is one thread owning one ROUTER socket. It polls with a short timeout,
so :meth:`ControlServer.stop` returns promptly; it answers every request that has a reply
envelope (an empty delimiter frame), even one of several frames or an oversize one, and
drops a message without one (nobody to answer); replies are sent without blocking, so a
peer that does not read cannot hold the server up; and an exception from the handler other
than :class:`CommandError` becomes an ``"internal error: ..."`` reply (logged with its
traceback and counted), never the end of the thread. A ROUTER keeps no send/receive state
between messages, unlike REP, so no peer can leave it waiting. Hostile peers: a frame over
:data:`MAX_FRAME_BYTES` (``zmq.MAXMSGSIZE``, also during the handshake) closes its connection
before it is buffered; a connection that has not finished its ZeroMQ handshake within
:data:`HANDSHAKE_S` s is closed; at most :data:`RCVHWM` requests are queued per peer.

:func:`request` is the client (one REQ socket per call, ``LINGER`` 0, a bounded wait), and
:func:`ctl_main` is ``spinflip ctl [--connect ENDPOINT] [--keys DIR] COMMAND [KEY=VALUE ...]``.

References
----------
ZeroMQ RFC 28/REQREP (request-reply pattern: REP strips the envelope, answers once per
request), https://rfc.zeromq.org/spec/28/ (from memory).
pyzmq documentation: ``Socket.poll``, ``Socket.recv_multipart``, ``zmq.LINGER``,
``zmq.LAST_ENDPOINT``.
Python standard library, :mod:`json` (``parse_constant``, ``object_pairs_hook``).
RFC 8259 (JSON; numbers are finite, UTF-8 on the wire).
"""

from __future__ import annotations

import collections
import json
import logging
import math
import sys
import threading
import time
import uuid
from dataclasses import dataclass, field
from types import MappingProxyType
from typing import Any, Callable, Mapping

import zmq

log = logging.getLogger("spinflip.control")

#: Largest request accepted, bytes (64 KiB).
MAX_REQUEST_BYTES = 64 * 1024
#: Default control endpoint of the daemon (config ``publish.control``).
DEFAULT_ENDPOINT = "tcp://127.0.0.1:5622"
#: Default time the client waits for a reply, s.
DEFAULT_TIMEOUT_S = 3.0
#: How long the server thread waits in one poll before looking at its stop flag, s.
POLL_INTERVAL_S = 0.05
#: Longest error line sent in a reply, characters.
MAX_ERROR_CHARS = 400
#: Longest value quoted inside an error line, characters.
_QUOTE_MAX_CHARS = 40
#: Longest OBJECT name: a FITS string value on one card, 80 columns minus 10 for keyword and
#: value indicator and 2 for the quotes (FITS standard 4.0, section 4.2.1.1, from memory).
OBJECT_MAX_CHARS = 68
#: Example of a well-formed request, quoted in error lines.
_EXAMPLE = '{"cmd": "status"}'
#: Largest frame the control socket takes from a peer, bytes (``zmq.MAXMSGSIZE``): twice the
#: largest request, so a slightly oversize request is still answered with an error line.
MAX_FRAME_BYTES = 2 * MAX_REQUEST_BYTES
#: Longest a connection may take over its ZeroMQ handshake before it is closed, s.
HANDSHAKE_S = 5.0
#: Requests queued per peer before ZeroMQ stops reading from it.
RCVHWM = 16
#: Longest request id, characters.
MAX_ID_CHARS = 64
#: Replies remembered by request id, and for how long, s.
ID_CACHE_SIZE = 256
ID_CACHE_S = 60.0
#: How many times :func:`request` sends a request in all when no reply comes.
REQUEST_ATTEMPTS = 3


class CommandError(ValueError):
    """A request refused: the message is one line naming what was wrong and what is allowed."""


class ControlError(RuntimeError):
    """The control channel failed (no reply, cannot bind or connect); one line."""


@dataclass(frozen=True)
class ArgSpec:
    """One argument of a command.

    Parameters
    ----------
    kind : {"number", "text"}
        JSON type: ``"number"`` (integer or real, finite, given to the handler as ``float``)
        or ``"text"`` (a JSON string).
    doc : str
        One line saying what the argument is, with its unit.
    required : bool
        Whether the argument must be given.
    lo, hi : float or None
        Inclusive range of a number.
    choices : tuple of str
        Allowed values of a text argument; empty: any text within the length limits.
    min_chars, max_chars : int
        Length range of free text, characters.
    ascii_only : bool
        Free text must be printable ASCII (it goes into FITS headers); otherwise any
        printable Unicode (:meth:`str.isprintable`).
    """

    kind: str
    doc: str
    required: bool = True
    lo: float | None = None
    hi: float | None = None
    choices: tuple[str, ...] = ()
    min_chars: int = 0
    max_chars: int = 0
    ascii_only: bool = False

    def allowed(self) -> str:
        """What is allowed, as words for an error line."""
        if self.kind == "number":
            return f"a number from {self.lo:g} to {self.hi:g}"
        if self.choices:
            return "one of " + ", ".join(repr(c) for c in self.choices)
        chars = "printable ASCII" if self.ascii_only else "printable"
        return f"{chars} text of {self.min_chars} to {self.max_chars} characters"


@dataclass(frozen=True)
class CommandSpec:
    """One command: what it does and its arguments (name -> :class:`ArgSpec`)."""

    doc: str
    args: Mapping[str, ArgSpec] = field(default_factory=dict)


#: The commands the daemon accepts, name -> :class:`CommandSpec`.
COMMANDS: Mapping[str, CommandSpec] = MappingProxyType({
    "status": CommandSpec("report the daemon's state, like the status topic"),
    "start": CommandSpec("start observing"),
    "stop": CommandSpec("stop observing and close the current scan"),
    "pause": CommandSpec("pause observing; the scan stays open"),
    "resume": CommandSpec("resume observing after pause"),
    "new_scan": CommandSpec("close the current scan and begin a new one"),
    "calibrate": CommandSpec("measure the system temperature now", MappingProxyType({
        "method": ArgSpec("text", "how: fire the noise source", choices=("noise_source",)),
    })),
    "point": CommandSpec("tell the daemon where the telescope points", MappingProxyType({
        "frame": ArgSpec("text", "coordinate frame of lon_deg, lat_deg",
                         choices=("galactic", "radec", "azel")),
        "lon_deg": ArgSpec("number", "galactic l, RA or azimuth, deg", lo=-360.0, hi=360.0),
        "lat_deg": ArgSpec("number", "galactic b, Dec or elevation, deg", lo=-90.0, hi=90.0),
        "object": ArgSpec("text", "OBJECT name; left out: made from the position",
                          required=False, min_chars=0, max_chars=OBJECT_MAX_CHARS,
                          ascii_only=True),
    })),
    "set_integration": CommandSpec("set the observing time per saved row", MappingProxyType({
        "seconds": ArgSpec("number", "observing time per saved row, s", lo=0.5, hi=3600.0),
    })),
    "annotate": CommandSpec("add a note to the log and the event stream", MappingProxyType({
        "text": ArgSpec("text", "the note, one line", min_chars=1, max_chars=500),
    })),
})


def _quote(value: Any) -> str:
    """``repr(value)`` on one line, cut to :data:`_QUOTE_MAX_CHARS` (repr escapes newlines)."""
    text = repr(value)
    return text if len(text) <= _QUOTE_MAX_CHARS else text[: _QUOTE_MAX_CHARS - 3] + "..."


def _one_line(text: str, limit_chars: int = MAX_ERROR_CHARS) -> str:
    """``text`` with every run of whitespace made one space, cut to ``limit_chars``."""
    flat = " ".join(str(text).split())
    return flat if len(flat) <= limit_chars else flat[: limit_chars - 3] + "..."


def _json_type(value: Any) -> str:
    """The JSON name of a decoded value's type, for error lines."""
    if value is None:
        return "null"
    if isinstance(value, bool):
        return "a boolean"
    if isinstance(value, (int, float)):
        return "a number"
    if isinstance(value, str):
        return "a string"
    if isinstance(value, list):
        return "an array"
    return "an object"


def _command_names() -> str:
    return ", ".join(COMMANDS)


def _reject_constant(name: str) -> Any:
    """``json`` ``parse_constant`` hook: NaN and infinities are not JSON (RFC 8259, sec. 6)."""
    raise CommandError(f"request contains {name}: numbers must be finite (RFC 8259 JSON)")


def _no_duplicates(pairs: list[tuple[str, Any]]) -> dict:
    """``json`` ``object_pairs_hook``: a key given twice is refused, not silently overwritten."""
    out: dict = {}
    for key, value in pairs:
        if key in out:
            raise CommandError(f"request gives key {_quote(key)} twice: each key at most once")
        out[key] = value
    return out


def _check_arg(cmd: str, name: str, spec: ArgSpec, value: Any) -> Any:
    """One argument's value, checked against ``spec``; numbers come back as ``float``."""
    where = f"{cmd}: {name} = {_quote(value)}"
    if spec.kind == "number":
        if isinstance(value, bool) or not isinstance(value, (int, float)):
            raise CommandError(f"{where} is {_json_type(value)}: expected {spec.allowed()}")
        # ints compare exactly with floats, so a huge integer is refused here before float().
        if isinstance(value, float) and not math.isfinite(value):
            raise CommandError(f"{where}: expected a finite number from {spec.lo:g} to {spec.hi:g}")
        if not spec.lo <= value <= spec.hi:
            raise CommandError(f"{where} is out of range: expected {spec.allowed()}")
        return float(value)
    if not isinstance(value, str):
        raise CommandError(f"{where} is {_json_type(value)}: expected {spec.allowed()}")
    if spec.choices:
        if value not in spec.choices:
            raise CommandError(f"{where}: expected {spec.allowed()}")
        return value
    printable = value.isprintable() and (value.isascii() or not spec.ascii_only)
    if not printable or not spec.min_chars <= len(value) <= spec.max_chars:
        raise CommandError(f"{where} ({len(value)} characters): expected {spec.allowed()}")
    return value


def validate_args(cmd: str, args: Any) -> dict[str, Any]:
    """Check the arguments of a known command.

    Parameters
    ----------
    cmd : str
        A name in :data:`COMMANDS`.
    args : Any
        The decoded ``"args"`` value.

    Returns
    -------
    dict
        The arguments, numbers as ``float``; optional arguments not given are absent.

    Raises
    ------
    CommandError
        One line naming the command, the argument, its value and what is allowed.
    """
    spec = COMMANDS[cmd]
    if not isinstance(args, dict):
        raise CommandError(f'{cmd}: "args" = {_quote(args)} is {_json_type(args)}: '
                           f"expected a JSON object of arguments")
    allowed = ", ".join(spec.args) if spec.args else "none"
    for name in args:
        if name not in spec.args:
            raise CommandError(f"{cmd}: unknown argument {_quote(name)}: allowed are {allowed}")
    out: dict[str, Any] = {}
    for name, arg in spec.args.items():
        if name not in args:
            if arg.required:
                raise CommandError(f"{cmd}: missing argument {name!r}: expected {arg.allowed()}")
            continue
        out[name] = _check_arg(cmd, name, arg, args[name])
    return out


def validate_request(raw: bytes) -> tuple[str, dict[str, Any]]:
    """Decode and check one request frame (see :func:`parse_request`, which also returns the
    request's id).

    Returns
    -------
    cmd, args
        As :func:`parse_request`.
    """
    cmd, args, _request_id = parse_request(raw)
    return cmd, args


def _check_id(value: Any) -> str:
    if not (isinstance(value, str) and 1 <= len(value) <= MAX_ID_CHARS and value.isascii()
            and value.isprintable()):
        raise CommandError(f'"id" = {_quote(value)}: expected printable ASCII text of 1 to '
                           f"{MAX_ID_CHARS} characters")
    return value


def parse_request(raw: bytes) -> tuple[str, dict[str, Any], str | None]:
    """Decode and check one request frame.

    Parameters
    ----------
    raw : bytes
        The request frame: a UTF-8 JSON object ``{"cmd": NAME, "args": {...}, "id": ID}`` of
        at most :data:`MAX_REQUEST_BYTES` bytes; ``"args"`` and ``"id"`` may be left out.

    Returns
    -------
    cmd : str
        A name in :data:`COMMANDS`.
    args : dict
        Its arguments, checked (see :func:`validate_args`).
    request_id : str or None
        The request's id, None when it has none.

    Raises
    ------
    CommandError
        One line naming what was wrong and what is allowed.

    Notes
    -----
    Checks, in order: size, UTF-8, JSON syntax (no ``NaN``/``Infinity``, no duplicate keys),
    a top-level object, its keys, the command name, then each argument.
    """
    raw = bytes(raw)
    if not raw:
        raise CommandError(f"empty request: expected one UTF-8 JSON object such as {_EXAMPLE}")
    if len(raw) > MAX_REQUEST_BYTES:
        raise CommandError(f"request of {len(raw)} bytes is too large: at most "
                           f"{MAX_REQUEST_BYTES} bytes")
    try:
        text = raw.decode("utf-8")
    except UnicodeDecodeError as exc:
        raise CommandError(f"request is not UTF-8 (byte {exc.start}: {exc.reason}): expected a "
                           f"UTF-8 JSON object such as {_EXAMPLE}") from None
    try:
        obj = json.loads(text, parse_constant=_reject_constant, object_pairs_hook=_no_duplicates)
    except CommandError:
        raise
    except json.JSONDecodeError as exc:
        raise CommandError(f"request is not JSON ({exc.msg} at line {exc.lineno} column "
                           f"{exc.colno}): expected an object such as {_EXAMPLE}") from None
    except RecursionError:
        raise CommandError("request is nested too deeply: expected an object such as "
                           f"{_EXAMPLE}") from None
    except ValueError as exc:  # e.g. an integer beyond Python's digit limit
        raise CommandError(f"request is not usable JSON ({_one_line(exc, 80)}): expected an "
                           f"object such as {_EXAMPLE}") from None
    if not isinstance(obj, dict):
        raise CommandError(f"request is {_json_type(obj)}, not a JSON object: expected "
                           f'{{"cmd": NAME, "args": {{...}}}}')
    for key in obj:
        if key not in ("cmd", "args", "id"):
            raise CommandError(f"request has unknown key {_quote(key)}: allowed are cmd, args, "
                               "id")
    request_id = _check_id(obj["id"]) if "id" in obj else None
    if "cmd" not in obj:
        raise CommandError(f'request has no "cmd": expected one of {_command_names()}')
    cmd = obj["cmd"]
    if not isinstance(cmd, str):
        raise CommandError(f'"cmd" = {_quote(cmd)} is {_json_type(cmd)}: expected one of '
                           f"{_command_names()}")
    if cmd not in COMMANDS:
        raise CommandError(f"unknown command {_quote(cmd)}: expected one of {_command_names()}")
    return cmd, validate_args(cmd, obj.get("args", {})), request_id


def _encode_reply(reply: dict, request_id: str | None = None) -> bytes:
    if request_id is not None:
        reply = dict(reply, id=request_id)
    return json.dumps(reply, allow_nan=False, separators=(",", ":")).encode("ascii")


def _error_reply(text: str, request_id: str | None = None) -> bytes:
    return _encode_reply({"ok": False, "error": _one_line(text)}, request_id)


Handler = Callable[[str, dict], dict]


class ControlServer:
    """A thread answering control requests on a ROUTER socket.

    Parameters
    ----------
    endpoint : str
        Where to bind, e.g. ``"tcp://127.0.0.1:5622"``; ``"tcp://127.0.0.1:*"`` picks a free
        port (see :attr:`bound_endpoint`).
    handler : callable
        ``handler(cmd, args) -> dict`` is called in the server thread with a checked request
        and returns the result. It may raise :class:`CommandError` to refuse; any other
        exception becomes an ``"internal error: ..."`` reply.
    security : object, optional
        Anything with ``apply(socket)`` (e.g. ``keys.ServerSecurity``), called before bind.
        Running its authenticator is the caller's job.
    context : zmq.Context, optional
        Default: the process-wide ``zmq.Context.instance()``.

    Attributes
    ----------
    requests : int
        Messages received.
    errors : int
        Error replies sent (refused requests and internal errors).
    internal_errors : int
        Handler exceptions other than :class:`CommandError`.
    repeats : int
        Requests answered from the remembered replies (an id seen before), not run again.
    bound_endpoint : str or None
        The endpoint actually bound (``LAST_ENDPOINT``), once started.

    Notes
    -----
    The socket is made, bound, used and closed in the server thread only (ZeroMQ sockets are
    not thread-safe). Each request is answered with exactly one frame after its envelope.
    """

    def __init__(self, endpoint: str, handler: Handler, security: Any = None,
                 context: zmq.Context | None = None,
                 guard: Callable[[str, Callable[[], None]], Callable[[], None]] | None = None):
        self.endpoint = endpoint
        self.guard = guard
        self.handler = handler
        self.security = security
        self.context = context
        self.requests = 0
        self.errors = 0
        self.internal_errors = 0
        self.repeats = 0
        self.bound_endpoint: str | None = None
        self._replies: collections.OrderedDict = collections.OrderedDict()
        self._stop = threading.Event()
        self._ready = threading.Event()
        self._bind_error: str | None = None
        self._thread: threading.Thread | None = None

    def start(self) -> "ControlServer":
        """Bind and start answering; returns ``self``.

        Raises
        ------
        ControlError
            The endpoint cannot be bound (one line, e.g. address in use).
        """
        if self._thread is not None:
            raise ControlError("control server already started")
        target = self.guard("control", self._run) if self.guard is not None else self._run
        self._thread = threading.Thread(target=target, name="spinflip-control", daemon=True)
        self._thread.start()
        self._ready.wait()
        if self._bind_error is not None:
            self._thread.join()
            raise ControlError(self._bind_error)
        return self

    def stop(self, timeout_s: float = 2.0) -> None:
        """Ask the thread to finish and wait up to ``timeout_s`` for it."""
        self._stop.set()
        if self._thread is not None:
            self._thread.join(timeout_s)

    def is_alive(self) -> bool:
        """Whether the server thread runs."""
        return self._thread is not None and self._thread.is_alive()

    def _bind(self, sock: zmq.Socket) -> None:
        """Bind; when running again after a failure, wait up to 2 s for the old socket's
        endpoint to be released (ZeroMQ unbinds a closed socket in its I/O thread)."""
        again = self._ready.is_set()
        deadline = time.monotonic() + 2.0
        while True:
            try:
                sock.bind(self.endpoint)
                return
            except zmq.ZMQError as exc:
                if not again or exc.errno != zmq.EADDRINUSE or time.monotonic() > deadline:
                    raise
                time.sleep(0.05)

    def _run(self) -> None:
        ctx = self.context or zmq.Context.instance()
        try:
            sock = ctx.socket(zmq.ROUTER)
        except zmq.ZMQError as exc:
            self._bind_error = f"control socket cannot be made: {exc}"
            self._ready.set()
            return
        try:
            sock.setsockopt(zmq.LINGER, 0)
            sock.setsockopt(zmq.MAXMSGSIZE, MAX_FRAME_BYTES)
            sock.setsockopt(zmq.HANDSHAKE_IVL, int(HANDSHAKE_S * 1000))
            sock.setsockopt(zmq.RCVHWM, RCVHWM)
            if self.security is not None:
                self.security.apply(sock)
            self._bind(sock)
            self.bound_endpoint = sock.getsockopt(zmq.LAST_ENDPOINT).decode()
        except Exception as exc:  # noqa: BLE001 - reported to start() as one line
            sock.close(0)
            text = _one_line(f"control endpoint {self.endpoint!r} cannot be bound: {exc}")
            if self._ready.is_set():          # running again after a failure: the guard says
                raise ControlError(text) from None
            self._bind_error = text
            self._ready.set()
            return
        self._ready.set()
        poll_ms = int(POLL_INTERVAL_S * 1000)
        try:
            while not self._stop.is_set():
                try:
                    if not sock.poll(poll_ms, zmq.POLLIN):
                        continue
                    frames = sock.recv_multipart(zmq.NOBLOCK)
                except zmq.Again:
                    continue
                except zmq.ZMQError as exc:
                    if self._stop.is_set() or exc.errno == zmq.ETERM:
                        break
                    log.warning("control socket receive failed: %s", exc)
                    continue
                self.requests += 1
                # ROUTER: [peer id, envelope..., b"", request frames...]; the envelope goes back
                try:
                    split = frames.index(b"", 1)
                except ValueError:
                    self.errors += 1        # no reply envelope: nobody could read an answer
                    continue
                reply = self._answer(frames[split + 1:])
                try:
                    sock.send_multipart(frames[:split + 1] + [reply], zmq.NOBLOCK)
                except zmq.ZMQError as exc:
                    self.errors += 1
                    log.warning("control reply could not be sent: %s", exc)
                    if exc.errno == zmq.ETERM:
                        break
        finally:
            sock.close(0)

    def _remembered(self, request_id: str, cmd: str, args: dict) -> bytes | None:
        """The reply already given to ``request_id`` (None: not remembered); drops replies
        older than :data:`ID_CACHE_S`."""
        now = time.monotonic()
        while self._replies:
            oldest = next(iter(self._replies.values()))
            if now - oldest[0] <= ID_CACHE_S:
                break
            self._replies.popitem(last=False)
        entry = self._replies.get(request_id)
        if entry is None:
            return None
        if entry[1] != (cmd, args):
            raise CommandError(f'"id" = {_quote(request_id)} was given before to another '
                               "request: make a new id for each request")
        self.repeats += 1
        return entry[2]

    def _answer(self, frames: list[bytes]) -> bytes:
        """The one reply frame for one received request; never raises."""
        request_id = None
        try:
            if len(frames) != 1:
                raise CommandError(f"request has {len(frames)} frames: expected exactly one "
                                   f"frame holding a JSON object such as {_EXAMPLE}")
            cmd, args, request_id = parse_request(frames[0])
            if request_id is not None:
                remembered = self._remembered(request_id, cmd, args)
                if remembered is not None:
                    return remembered
            result = self.handler(cmd, args)
            if not isinstance(result, dict):
                raise TypeError(f"handler for {cmd!r} returned {type(result).__name__}, "
                                f"not dict")
            reply = _encode_reply({"ok": True, "result": result}, request_id)
        except CommandError as exc:
            self.errors += 1
            return _error_reply(str(exc) or "request refused", request_id)
        except Exception as exc:  # noqa: BLE001 - the server thread must never die
            self.errors += 1
            self.internal_errors += 1
            log.exception("control handler failed")
            reply = _error_reply(f"internal error: {type(exc).__name__}: {exc}", request_id)
        if request_id is not None:
            self._replies[request_id] = (time.monotonic(), (cmd, args), reply)
            while len(self._replies) > ID_CACHE_SIZE:
                self._replies.popitem(last=False)
        return reply


def request(endpoint: str, cmd: str, args: dict | None = None, security: Any = None,
            timeout_s: float = DEFAULT_TIMEOUT_S, context: zmq.Context | None = None,
            attempts: int = REQUEST_ATTEMPTS, request_id: str | None = None) -> dict:
    """Send one command to a daemon and return its reply; safe to retry.

    Parameters
    ----------
    endpoint : str
        The daemon's control endpoint, e.g. ``"tcp://127.0.0.1:5622"``.
    cmd : str
        Command name (checked by the daemon, not here).
    args : dict, optional
        Its arguments; ``None``: none.
    security : object, optional
        Anything with ``apply(socket)`` (e.g. ``keys.ClientSecurity``), called before connect.
    timeout_s : float
        Longest wait for the reply in all, s.
    context : zmq.Context, optional
        Default: ``zmq.Context.instance()``.
    attempts : int
        How many times the request is sent in all: each attempt waits ``timeout_s /
        attempts`` for a reply on a new connection, then sends the same request (same id)
        again; the daemon answers a repeat with the reply it already gave, without running
        the command twice.
    request_id : str, optional
        The request's id (module docstring); default: a new random one.

    Returns
    -------
    dict
        The reply: ``{"ok": True, "result": {...}}`` or ``{"ok": False, "error": "..."}``
        (its ``"id"``, checked against the request's, left out).

    Raises
    ------
    CommandError
        ``args`` cannot be written as JSON (e.g. NaN).
    ControlError
        No reply within ``timeout_s``, an endpoint that cannot be connected, or a reply that
        is not a control reply; one line.
    """
    request_id = request_id or uuid.uuid4().hex
    body: dict[str, Any] = {"cmd": cmd}
    if args is not None:
        body["args"] = args
    body["id"] = request_id
    try:
        payload = json.dumps(body, allow_nan=False).encode("utf-8")
    except (TypeError, ValueError) as exc:
        raise CommandError(f"{cmd}: arguments cannot be sent as JSON: {_one_line(exc, 120)}") \
            from None
    ctx = context or zmq.Context.instance()
    attempts = max(1, int(attempts))
    deadline = time.monotonic() + max(0.0, timeout_s)
    frames = None
    for attempt in range(attempts):
        wait_s = (deadline - time.monotonic()) / (attempts - attempt)
        frames = _send_once(ctx, endpoint, payload, security, max(0.0, wait_s))
        if frames is not None:
            break
    if frames is None:
        raise ControlError(f"no reply from {endpoint} within {timeout_s:g} s: "
                           f"is spinflip run going?")
    reply = None
    if len(frames) == 1:
        try:
            reply = json.loads(frames[0].decode("utf-8"))
        except (UnicodeDecodeError, ValueError):
            reply = None
    ok_form = (isinstance(reply, dict) and isinstance(reply.get("ok"), bool)
               and reply.get("id", request_id) == request_id
               and (isinstance(reply.get("result"), dict) if reply["ok"]
                    else isinstance(reply.get("error"), str)))
    if not ok_form:
        raise ControlError(f"reply from {endpoint} is not a control reply: "
                           f"{_quote(frames[0] if len(frames) == 1 else frames)}")
    reply.pop("id", None)
    return reply


def _send_once(ctx: zmq.Context, endpoint: str, payload: bytes, security: Any,
               wait_s: float) -> list[bytes] | None:
    """One attempt on a new REQ socket: the reply frames, or None after ``wait_s`` s."""
    sock = ctx.socket(zmq.REQ)
    try:
        sock.setsockopt(zmq.LINGER, 0)
        sock.setsockopt(zmq.MAXMSGSIZE, MAX_FRAME_BYTES)      # a reply is one small frame
        if security is not None:
            security.apply(sock)
        try:
            sock.connect(endpoint)
        except zmq.ZMQError as exc:
            raise ControlError(f"cannot connect to {endpoint!r}: {exc}") from None
        sock.send(payload)
        if not sock.poll(int(wait_s * 1000), zmq.POLLIN):
            return None
        return sock.recv_multipart()
    finally:
        sock.close(0)


def parse_words(words: list[str]) -> tuple[str, dict[str, Any]]:
    """``COMMAND [KEY=VALUE ...]`` from the command line -> ``(cmd, args)``.

    A value is read as a number where :data:`COMMANDS` says the argument is a number (and,
    for arguments it does not know, wherever it reads as one); otherwise it stays text, so
    ``object=1234`` is a name.

    Raises
    ------
    CommandError
        No command, a word without ``=``, or a key given twice.
    """
    if not words:
        raise CommandError(f"no command given: expected one of {_command_names()}")
    cmd, rest = words[0], words[1:]
    known = COMMANDS[cmd].args if cmd in COMMANDS else {}
    args: dict[str, Any] = {}
    for word in rest:
        key, sep, text = word.partition("=")
        if not sep or not key:
            raise CommandError(f"{cmd}: argument {_quote(word)} is not KEY=VALUE")
        if key in args:
            raise CommandError(f"{cmd}: argument {key!r} given twice")
        spec = known.get(key)
        if spec is not None and spec.kind == "text":
            args[key] = text
        else:
            args[key] = _number_or_text(text)
    return cmd, args


def _number_or_text(text: str) -> Any:
    for kind in (int, float):
        try:
            return kind(text)
        except ValueError:
            pass
    return text


def _format_value(value: Any) -> str:
    if isinstance(value, str):
        plain = value and value.isprintable() and not any(c.isspace() or c in "=\"'" for c in value)
        return value if plain else json.dumps(value)
    return json.dumps(value, separators=(",", ":"))


def _flatten(result: Mapping[str, Any], prefix: str = "") -> list[str]:
    """``key=value`` words of a result; nested objects as ``outer.inner=value``."""
    out = []
    for key, value in result.items():
        name = f"{prefix}{key}"
        if isinstance(value, dict) and value:
            out.extend(_flatten(value, name + "."))
        else:
            out.append(f"{name}={_format_value(value)}")
    return out


def format_result(result: Mapping[str, Any]) -> str:
    """One line of ``key=value`` pairs (``"ok"`` for an empty result)."""
    words = _flatten(result)
    return " ".join(words) if words else "ok"


def ctl_main(endpoint: str, words: list[str], keys_dir: str | None,
             timeout_s: float = DEFAULT_TIMEOUT_S) -> int:
    """``spinflip ctl``: send one command and print the reply as one line.

    Parameters
    ----------
    endpoint : str
        The daemon's control endpoint.
    words : list of str
        ``COMMAND [KEY=VALUE ...]``.
    keys_dir : str or None
        Folder of client CURVE keys (``keys.ClientSecurity.from_dir``); ``None`` or ``""``:
        none.
    timeout_s : float
        Longest wait for the reply, s.

    Returns
    -------
    int
        0 the command was done (its result printed as ``key=value`` pairs on stdout);
        1 no reply (``error: ...`` on stderr); 2 the request was refused, here or by the
        daemon, or the keys are unusable (``error: ...`` on stderr).

    Notes
    -----
    The request is checked here first with :func:`validate_args`, so a mistake is reported
    even when no daemon runs; the daemon checks it again.
    """
    def fail(text: str, code: int) -> int:
        print(f"error: {_one_line(text)}", file=sys.stderr)
        return code

    try:
        cmd, args = parse_words(list(words))
        if cmd not in COMMANDS:
            raise CommandError(f"unknown command {_quote(cmd)}: expected one of "
                               f"{_command_names()}")
        validate_args(cmd, args)
    except CommandError as exc:
        return fail(str(exc), 2)
    security = None
    if keys_dir:
        from spinflip.daemon.live.keys import ClientSecurity  # lazily: only a CURVE client needs it
        try:
            security = ClientSecurity.from_dir(keys_dir)
        except ValueError as exc:
            return fail(str(exc), 2)
    try:
        reply = request(endpoint, cmd, args, security=security, timeout_s=timeout_s)
    except CommandError as exc:
        return fail(str(exc), 2)
    except ControlError as exc:
        return fail(str(exc), 1)
    if not reply["ok"]:
        return fail(reply["error"], 2)
    print(format_result(reply["result"]))
    return 0
