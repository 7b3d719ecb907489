"""The live data socket: a ZeroMQ XPUB that never slows acquisition down.

The DSP thread hands messages to :meth:`Publisher.publish`, which only encodes them
(:mod:`spinflip.daemon.live.schema`) and appends them to a short queue per topic; a thread of its own
sends them with ``NOBLOCK``. If the sending thread falls behind, the oldest queued message of
that topic is dropped and counted (``drops``): the queue never grows and ``publish`` never
waits. ZeroMQ itself keeps a send queue of ``SNDHWM`` messages per subscriber and drops beyond
it for a subscriber that stops reading, without slowing the others; subscribers see such gaps in
the per-topic sequence number ``seq`` of the header.

Late joiners: the socket is an XPUB, so a new subscription arrives as a message; the
publisher then sends the latest message of every topic it covers at once, so a viewer that
joins has the newest spectrum, status and progress within a moment. PUB fans out, so the
subscribers already connected get this replay too: each replayed message carries
``"replay": true`` (and its original ``seq``), and readers skip one they already have (wire
docstring, Transport).

Hostile peers: the socket takes frames of at most :data:`MAX_SUBSCRIPTION_FRAME` bytes
(``zmq.MAXMSGSIZE``; a peer that announces a larger frame, also during the handshake, is
disconnected before anything is buffered), and runs in ``XPUB_MANUAL`` mode: the publisher
itself passes a subscription to the socket only when it is a prefix of a topic (``""``
included), so the socket's subscription table holds at most :data:`MAX_SUBSCRIPTIONS_PER_PEER`
entries per peer however many subscriptions a peer sends; any other is ignored and counted
(``refused_subscriptions``). libzmq itself still records every subscription a peer sends in
this mode (to unsubscribe upstream when it leaves), so after
:data:`MAX_IGNORED_SUBSCRIPTIONS` ignored ones the publisher closes its socket and binds it
again (``reopened``): that frees the record, and every subscriber reconnects by itself and
gets the replay. Replays are sent at most once per :data:`REPLAY_MIN_INTERVAL_S` per topic,
so subscribers joining in a burst (or one peer subscribing over and over) cost the others at
most that many replayed messages.
"""

from __future__ import annotations

import collections
import ctypes
import json
import logging
import math
import threading
import time
from collections.abc import Callable
from typing import TYPE_CHECKING

import zmq

from spinflip.daemon.live import schema

if TYPE_CHECKING:
    from spinflip.daemon.live.keys import ServerSecurity

log = logging.getLogger("spinflip.publisher")

_QUEUE_PER_TOPIC = 8
_SNDHWM = 200
_SNDBUF = 0          # kernel send buffer per connection, bytes; 0: the system's default
_POLL_MS = 50
#: Largest frame the data socket takes from a peer, bytes (zmq.MAXMSGSIZE): a subscription
#: is 1 + a topic's length; the CURVE handshake's largest command is a few hundred bytes.
MAX_SUBSCRIPTION_FRAME = 512
#: The subscriptions the publisher passes to its socket: every prefix of every topic.
ACCEPTED_SUBSCRIPTIONS = frozenset(t[:i] for t in schema.TOPICS for i in range(len(t) + 1))
#: Most subscription-table entries one peer can hold.
MAX_SUBSCRIPTIONS_PER_PEER = len(ACCEPTED_SUBSCRIPTIONS)
#: Subscriptions read per wake-up before the publisher turns to sending again.
_SUBSCRIPTION_BURST = 256
#: Messages queued from one peer (subscriptions) before ZeroMQ stops reading from it.
_RCVHWM = 16
#: Ignored subscriptions after which the socket is closed and bound again, freeing what
#: libzmq keeps of them (in XPUB_MANUAL mode it records every subscription a peer sent, to
#: unsubscribe upstream when the peer leaves: about 45 kB each for 900 random bytes); every
#: subscriber then reconnects by itself (ZeroMQ's reconnect) and is brought up to date.
MAX_IGNORED_SUBSCRIPTIONS = 16
#: Shortest time between two replays of one topic, s: replays reach every subscriber, so the
#: newcomers of one such interval share one replay.
REPLAY_MIN_INTERVAL_S = 0.1


def _as_replay(frames: list[bytes]) -> list[bytes]:
    """The frames of a message marked ``"replay": true`` (header re-written, payload shared)."""
    header = json.loads(bytes(frames[1]))
    header["replay"] = True
    text = json.dumps(header, allow_nan=False, ensure_ascii=False, separators=(",", ":"))
    return [frames[0], text.encode("utf-8"), *frames[2:]]


def _return_freed_memory() -> None:
    """Give the heap's free pages back to the system (glibc ``malloc_trim(3)``): the subscription
    table libzmq kept of a flood is freed with the closed socket, but in small blocks that
    otherwise stay in the process's heap. Nothing where the C library has no malloc_trim."""
    try:
        libc = ctypes.CDLL(None)
        trim = libc.malloc_trim
    except (OSError, AttributeError):
        return
    trim.argtypes = [ctypes.c_size_t]
    trim(0)


class PublishError(RuntimeError):
    """The data socket cannot be bound; the message names the endpoint and why."""


class Publisher:
    """Publishes messages on ``endpoint`` from a thread of its own.

    Parameters
    ----------
    endpoint : where to bind, e.g. ``tcp://127.0.0.1:5621``
    security : object with ``apply(socket)`` (CURVE server keys) or None
    context : zmq.Context (default: the process's shared one)
    guard : callable(worker, body) -> thread target, or None
        Wraps the sending thread's body (the daemon's supervisor); None: run it bare.
    """

    def __init__(self, endpoint: str, security: ServerSecurity | None = None,
                 context: zmq.Context | None = None,
                 guard: Callable[[str, Callable[[], None]], Callable[[], None]] | None = None):
        self.endpoint = endpoint
        self.guard = guard
        self.security = security
        self.context = context or zmq.Context.instance()
        self.drops = {t: 0 for t in schema.TOPICS}
        self.sent = {t: 0 for t in schema.TOPICS}
        self._seq = {t: 0 for t in schema.TOPICS}
        self._queues: dict[str, collections.deque[list[bytes]]] = {
            t: collections.deque() for t in schema.TOPICS}
        self._latest: dict = {}
        self._replay: dict = {}
        self.refused_subscriptions = 0
        self.replayed = 0
        self.reopened = 0
        self._ignored_since_open = 0
        self._replay_due: set = set()
        self._replayed_at: dict = {}
        self._lock = threading.Lock()
        self._wake = threading.Event()
        self._stop = threading.Event()
        self._thread: threading.Thread | None = None
        self.socket: zmq.Socket | None = None
        self.bound: str | None = None

    def _open(self, endpoint: str) -> zmq.Socket:
        sock = self.context.socket(zmq.XPUB)
        sock.setsockopt(zmq.LINGER, 0)
        sock.setsockopt(zmq.SNDHWM, _SNDHWM)
        sock.setsockopt(zmq.RCVHWM, _RCVHWM)
        if _SNDBUF:
            sock.setsockopt(zmq.SNDBUF, _SNDBUF)
        sock.setsockopt(zmq.MAXMSGSIZE, MAX_SUBSCRIPTION_FRAME)
        sock.setsockopt(zmq.XPUB_MANUAL, 1)
        if self.security is not None:
            self.security.apply(sock)
        try:
            sock.bind(endpoint)
        except zmq.ZMQError:
            sock.close(0)
            raise
        return sock

    def start(self) -> None:
        try:
            sock = self._open(self.endpoint)
        except zmq.ZMQError as exc:
            raise PublishError(f"publish.data = {self.endpoint}: cannot bind ({exc}); is "
                               "another spinflip run using it?") from None
        self.bound = sock.getsockopt_string(zmq.LAST_ENDPOINT)
        self.socket = sock
        target = self.guard("publisher", self._run) if self.guard is not None else self._run
        self._thread = threading.Thread(target=target, name="publisher", daemon=True)
        self._thread.start()

    def publish(self, topic: str, header: dict, arrays: dict | None = None) -> None:
        """Queue one message; never blocks. The header gets ``seq`` (per topic)."""
        with self._lock:
            self._seq[topic] += 1
            header = dict(header, seq=self._seq[topic])
        frames = schema.encode(topic, header, arrays or {})
        with self._lock:
            q = self._queues[topic]
            if len(q) >= _QUEUE_PER_TOPIC:
                q.popleft()
                self.drops[topic] += 1
            q.append(frames)
        self._wake.set()

    def _send(self, topic: str, frames: list[bytes]) -> None:
        if self.socket is None:
            self.drops[topic] += 1
            return
        try:
            self.socket.send_multipart(frames, flags=zmq.NOBLOCK, copy=False)
            self.sent[topic] += 1
        except zmq.Again:
            self.drops[topic] += 1

    def _run(self) -> None:
        while not self._stop.is_set():
            try:
                if self.socket is None:         # a reopen failed: try again, keep dropping
                    self._stop.wait(_POLL_MS / 1000)
                    assert self.bound is not None   # start() set it before the thread ran
                    self.socket = self._open(self.bound)
                if self.socket.poll(_POLL_MS, zmq.POLLIN):
                    self._read_subscriptions()
                if self._ignored_since_open > MAX_IGNORED_SUBSCRIPTIONS:
                    self._reopen()
                self._send_replays()
            except zmq.ZMQError as exc:       # never end the thread: log, go on sending
                log.warning("data socket: %s", exc)
            self._wake.clear()
            while True:
                item = None
                with self._lock:
                    for topic, q in self._queues.items():
                        if q:
                            item = (topic, q.popleft())
                            self._latest[topic] = item[1]
                            self._replay.pop(topic, None)
                            break
                if item is None:
                    break
                self._send(*item)

    def _read_subscriptions(self) -> None:
        """Pass the (un)subscriptions that name a topic prefix to the socket (XPUB_MANUAL) and
        bring each new subscriber up to date; ignore and count any other."""
        assert self.socket is not None      # called by _run with the socket open
        for _ in range(_SUBSCRIPTION_BURST):
            try:
                msg = self.socket.recv(zmq.NOBLOCK)
            except zmq.Again:
                return
            kind, prefix = msg[:1], msg[1:]
            try:
                text = prefix.decode("ascii")
            except UnicodeDecodeError:
                text = None
            if kind not in (b"\x00", b"\x01") or text not in ACCEPTED_SUBSCRIPTIONS:
                self.refused_subscriptions += 1
                self._ignored_since_open += 1
                if self._ignored_since_open > MAX_IGNORED_SUBSCRIPTIONS:
                    return                      # the caller reopens the socket at once
                continue
            if kind == b"\x00":
                self.socket.setsockopt(zmq.UNSUBSCRIBE, prefix)
                continue
            self.socket.setsockopt(zmq.SUBSCRIBE, prefix)
            self._replay_due.update(t for t in schema.TOPICS if t.startswith(text))

    def _send_replays(self) -> None:
        """Send the latest message of each topic a new subscriber waits for, marked as a
        replay, at most once per :data:`REPLAY_MIN_INTERVAL_S` per topic."""
        now = time.monotonic()
        for topic in list(self._replay_due):
            if now - self._replayed_at.get(topic, -math.inf) < REPLAY_MIN_INTERVAL_S:
                continue
            self._replay_due.discard(topic)
            with self._lock:
                frames = self._latest.get(topic)
            if frames is None:
                continue
            replay = self._replay.get(topic)
            if replay is None:
                replay = self._replay[topic] = _as_replay(frames)
            self._replayed_at[topic] = now
            self._send(topic, replay)
            self.replayed += 1

    def _reopen(self) -> None:
        """Close the socket and bind it again at the same endpoint (module docstring)."""
        log.warning("data socket: %d subscriptions to no topic; closing and binding %s again "
                    "(subscribers reconnect)", self._ignored_since_open, self.bound)
        assert self.socket is not None and self.bound is not None   # open since start()
        self.socket.close(0)
        self.socket = None
        self._ignored_since_open = 0
        _return_freed_memory()
        deadline = time.monotonic() + 5.0
        while True:                         # libzmq releases the port a moment after close
            try:
                self.socket = self._open(self.bound)
                break
            except zmq.ZMQError:
                if time.monotonic() > deadline or self._stop.is_set():
                    raise
                time.sleep(0.02)
        self.reopened += 1

    def stop(self) -> None:
        """Send what is queued, then close (safe to call twice)."""
        if self._thread is not None:
            self._stop.set()
            self._thread.join(timeout=2)
            self._thread = None
        if self.socket is not None:
            for topic, q in self._queues.items():
                while q:
                    self._send(topic, q.popleft())
            self.socket.close(0)
            self.socket = None
