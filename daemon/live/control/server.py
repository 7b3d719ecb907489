"""The control channel's server: one thread owning one ROUTER socket.


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

References
----------
ZeroMQ RFC 28/REQREP (request-reply pattern: REP strips the envelope, answers once per
request), https://rfc.zeromq.org/spec/28/ (from memory).
pyzmq documentation: ``Socket.poll``, ``Socket.recv_multipart``, ``zmq.LINGER``,
``zmq.LAST_ENDPOINT``.
"""

from __future__ import annotations

import collections
import logging
import threading
import time
from collections.abc import Callable
from typing import Any

import zmq

from spinflip.daemon.error_line import one_line
from spinflip.daemon.live.control.protocol import (
    _EXAMPLE,
    HANDSHAKE_S,
    ID_CACHE_S,
    ID_CACHE_SIZE,
    MAX_FRAME_BYTES,
    POLL_INTERVAL_S,
    RCVHWM,
    CommandError,
    ControlError,
    Handler,
    _encode_reply,
    _error_reply,
    _quote,
    parse_request,
)

log = logging.getLogger("spinflip.control")


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

    def start(self) -> ControlServer:
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
            text = one_line(f"control endpoint {self.endpoint!r} cannot be bound: {exc}")
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

