"""The control channel's protocol: the commands, checking a request, encoding a reply.

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

References
----------
Python standard library, :mod:`json` (``parse_constant``, ``object_pairs_hook``).
RFC 8259 (JSON; numbers are finite, UTF-8 on the wire).
"""

from __future__ import annotations

import json
import math
from collections.abc import Callable, Mapping
from dataclasses import dataclass, field
from types import MappingProxyType
from typing import Any

from spinflip.daemon.config import DEFAULT_CONTROL_ENDPOINT
from spinflip.daemon.error_line import one_line, quoted
from spinflip.daemon.live.schema import json_type_words

#: Largest request accepted, bytes (64 KiB).
MAX_REQUEST_BYTES = 64 * 1024
#: Default control endpoint of the daemon (config ``publish.control``).
DEFAULT_ENDPOINT = DEFAULT_CONTROL_ENDPOINT
#: Default time the client waits for a reply, s.
DEFAULT_TIMEOUT_S = 3.0
#: How long the server thread waits in one poll before looking at its stop flag, s.
POLL_INTERVAL_S = 0.05
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
    "pointed": CommandSpec("the dish is pointed where the daemon asked (manual driver); az_deg, el_deg: where it really points", {"az_deg": ArgSpec("number", "azimuth reached, deg", required=False, lo=-360, hi=720), "el_deg": ArgSpec("number", "elevation reached, deg", required=False, lo=-5, hi=90)}),
})


def _quote(value: Any) -> str:
    """``repr(value)`` on one line, cut to :data:`_QUOTE_MAX_CHARS` (repr escapes newlines)."""
    return quoted(value, _QUOTE_MAX_CHARS)



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
        assert spec.lo is not None and spec.hi is not None, "every number argument has a range"
        if isinstance(value, bool) or not isinstance(value, (int, float)):
            raise CommandError(f"{where} is {json_type_words(value)}: expected {spec.allowed()}")
        # ints compare exactly with floats, so a huge integer is refused here before float().
        if isinstance(value, float) and not math.isfinite(value):
            raise CommandError(f"{where}: expected a finite number from {spec.lo:g} to {spec.hi:g}")
        if not spec.lo <= value <= spec.hi:
            raise CommandError(f"{where} is out of range: expected {spec.allowed()}")
        return float(value)
    if not isinstance(value, str):
        raise CommandError(f"{where} is {json_type_words(value)}: expected {spec.allowed()}")
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
        raise CommandError(f'{cmd}: "args" = {_quote(args)} is {json_type_words(args)}: '
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
        raise CommandError(f"request is not usable JSON ({one_line(exc, 80)}): expected an "
                           f"object such as {_EXAMPLE}") from None
    if not isinstance(obj, dict):
        raise CommandError(f"request is {json_type_words(obj)}, not a JSON object: expected "
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
        raise CommandError(f'"cmd" = {_quote(cmd)} is {json_type_words(cmd)}: expected one of '
                           f"{_command_names()}")
    if cmd not in COMMANDS:
        raise CommandError(f"unknown command {_quote(cmd)}: expected one of {_command_names()}")
    return cmd, validate_args(cmd, obj.get("args", {})), request_id


def _encode_reply(reply: dict, request_id: str | None = None) -> bytes:
    if request_id is not None:
        reply = dict(reply, id=request_id)
    return json.dumps(reply, allow_nan=False, separators=(",", ":")).encode("ascii")


def _error_reply(text: str, request_id: str | None = None) -> bytes:
    return _encode_reply({"ok": False, "error": one_line(text)}, request_id)



Handler = Callable[[str, dict], dict]
