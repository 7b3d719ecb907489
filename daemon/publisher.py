"""The live data socket: a ZeroMQ XPUB that never slows acquisition down.

The DSP thread hands messages to :meth:`Publisher.publish`, which only encodes them
(:mod:`spinflip.daemon.wire`) and appends them to a short queue per topic; a thread of its own
sends them with ``NOBLOCK``. If the sending thread falls behind, the oldest queued message of
that topic is dropped and counted (``drops``): the queue never grows and ``publish`` never
waits. ZeroMQ itself keeps a send queue of ``SNDHWM`` messages per subscriber and drops beyond
it for a subscriber that stops reading, without slowing the others; subscribers see such gaps in
the per-topic sequence number ``seq`` of the header.

Late joiners: the socket is an XPUB, so a new subscription arrives as a message; the
publisher then sends the latest message of every topic at once, so a viewer that joins has the
newest spectrum, status and progress within a moment.
"""

from __future__ import annotations

import collections
import threading

import zmq

from . import wire

_QUEUE_PER_TOPIC = 8
_SNDHWM = 200
_SNDBUF = 0          # kernel send buffer per connection, bytes; 0: the system's default
_POLL_MS = 50


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

    def __init__(self, endpoint: str, security=None, context=None, guard=None):
        self.endpoint = endpoint
        self.guard = guard
        self.security = security
        self.context = context or zmq.Context.instance()
        self.drops = {t: 0 for t in wire.TOPICS}
        self.sent = {t: 0 for t in wire.TOPICS}
        self._seq = {t: 0 for t in wire.TOPICS}
        self._queues = {t: collections.deque() for t in wire.TOPICS}
        self._latest: dict = {}
        self._lock = threading.Lock()
        self._wake = threading.Event()
        self._stop = threading.Event()
        self._thread = None
        self.socket = None
        self.bound = None

    def start(self) -> None:
        sock = self.context.socket(zmq.XPUB)
        sock.setsockopt(zmq.LINGER, 0)
        sock.setsockopt(zmq.SNDHWM, _SNDHWM)
        if _SNDBUF:
            sock.setsockopt(zmq.SNDBUF, _SNDBUF)
        sock.setsockopt(zmq.XPUB_VERBOSE, 1)
        if self.security is not None:
            self.security.apply(sock)
        try:
            sock.bind(self.endpoint)
        except zmq.ZMQError as exc:
            sock.close(0)
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
        frames = wire.encode(topic, header, arrays or {})
        with self._lock:
            q = self._queues[topic]
            if len(q) >= _QUEUE_PER_TOPIC:
                q.popleft()
                self.drops[topic] += 1
            q.append(frames)
        self._wake.set()

    def _send(self, topic: str, frames) -> None:
        try:
            self.socket.send_multipart(frames, flags=zmq.NOBLOCK, copy=False)
            self.sent[topic] += 1
        except zmq.Again:
            self.drops[topic] += 1

    def _run(self) -> None:
        poller = zmq.Poller()
        poller.register(self.socket, zmq.POLLIN)
        while not self._stop.is_set():
            if dict(poller.poll(_POLL_MS)).get(self.socket):
                try:
                    msg = self.socket.recv(zmq.NOBLOCK)
                except zmq.Again:
                    msg = b""
                if msg[:1] == b"\x01":                 # a new subscription: bring it up to date
                    with self._lock:
                        latest = list(self._latest.items())
                    for topic, frames in latest:
                        self._send(topic, frames)
            self._wake.clear()
            while True:
                item = None
                with self._lock:
                    for topic, q in self._queues.items():
                        if q:
                            item = (topic, q.popleft())
                            self._latest[topic] = item[1]
                            break
                if item is None:
                    break
                self._send(*item)

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
