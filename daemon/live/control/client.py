"""The control channel's client: :func:`request` (one REQ socket per call, ``LINGER`` 0, a
bounded wait, retried with the same id), and ``spinflip ctl`` (:func:`ctl_main`): reading
``COMMAND [KEY=VALUE ...]`` and printing the reply as one line of ``key=value`` pairs.
"""

from __future__ import annotations

import json
import sys
import time
import uuid
from collections.abc import Mapping
from typing import Any

import zmq

from spinflip.daemon.error_line import one_line
from spinflip.daemon.live.control.protocol import (
    COMMANDS,
    DEFAULT_TIMEOUT_S,
    MAX_FRAME_BYTES,
    REQUEST_ATTEMPTS,
    CommandError,
    ControlError,
    _command_names,
    _quote,
    validate_args,
)


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
        raise CommandError(f"{cmd}: arguments cannot be sent as JSON: {one_line(exc, 120)}") \
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
    if not (isinstance(reply, dict) and isinstance(reply.get("ok"), bool)
            and reply.get("id", request_id) == request_id
            and (isinstance(reply.get("result"), dict) if reply["ok"]
                 else isinstance(reply.get("error"), str))):
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
        print(f"error: {one_line(text)}", file=sys.stderr)
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
        from spinflip.daemon.live.keys import (
            ClientSecurity,  # lazily: only a CURVE client needs it
        )
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
