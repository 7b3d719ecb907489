"""``spinflip collect``: gather the live data of several stations, relay it, archive it.

``spinflip collect NAME=ENDPOINT ... [--relay ENDPOINT] [--archive DIR] [--keys DIR]
[--duration S]`` connects one SUB socket to each station's data PUB socket (every topic),
checks each message against the wire schema (:mod:`spinflip.daemon.live.schema`), and

* re-publishes it on one PUB socket bound at ``--relay``, with ``header["station"]`` set to
  the station's NAME and nothing else changed (the payload is re-encoded bit for bit);
* with ``--archive DIR``, appends every spectrum of kind ``"integration"`` to that station's
  archive (format below).

Which station a message belongs to is decided by the socket it arrived on, one socket per
station, never by its content: a message from station A is relayed and archived as A.
A message that fails the schema is counted as a decode error of its station, dropped and
logged in one line of at most about 200 characters (the 1st, 2nd, 4th, 8th ... of a station),
and collecting goes on for it and the others. Each SUB socket takes frames of at most
:data:`spinflip.daemon.live.schema.MAX_FRAME_BYTES` (``zmq.MAXMSGSIZE``): ZeroMQ drops the connection
of a station that announces a larger frame before buffering it, and reconnects. A message
marked ``"replay": true`` that is the latest one already taken from its station and topic
(same ``seq`` and ``time_utc``; a station re-sends its latest messages to every subscriber
when one joins) is counted as ``replayed`` and neither relayed nor archived again.

Security: with ``--keys DIR`` each SUB socket is a CURVE client with the keys of
:class:`spinflip.daemon.live.keys.ClientSecurity` (``DIR/client.key``, ``DIR/client.key_secret``,
``DIR/server.key``). Stations with their own server key: put that station's three files in
``DIR/NAME/``; a station without such a folder uses ``DIR`` itself. The relay socket has no
keys, so it binds only to this computer (127.0.0.0/8, ``::1``, ``localhost``, ``ipc://``).

With ``--archive DIR`` every integration goes to ``DIR/NAME/spectra-YYYYMMDD.bin`` and
``.jsonl``: the format, and reading it back, are :mod:`spinflip.daemon.live.spectrum_archive`.

References
----------
ZeroMQ RFC 29/PUBSUB (subscriptions, one socket per peer here), from memory.
"""

from __future__ import annotations

import ipaddress
import logging
import math
import re
import signal
import sys
import threading
import time
from collections.abc import Callable
from dataclasses import dataclass, field
from pathlib import Path
from typing import TYPE_CHECKING

import zmq
from zmq.utils.monitor import recv_monitor_message

from spinflip.daemon.error_line import one_line
from spinflip.daemon.live import schema
from spinflip.daemon.live.publisher import MAX_SUBSCRIPTION_FRAME
from spinflip.daemon.live.replays import ReplayFilter
from spinflip.daemon.live.spectrum_archive import SpectrumArchive

try:  # POSIX advisory locks
    import fcntl
except ImportError:  # pragma: no cover - non-POSIX
    fcntl = None  # type: ignore[assignment]  # the module is absent; callers test for None

if TYPE_CHECKING:  # imported lazily below: collecting without keys never needs it
    from spinflip.daemon.live.keys import ClientSecurity

log = logging.getLogger("spinflip.collect")

_NAME_RE = re.compile(r"[A-Za-z0-9][A-Za-z0-9_.-]{0,31}\Z")
_TCP_RE = re.compile(r"tcp://(\[[0-9A-Fa-f:.]+\]|[A-Za-z0-9][A-Za-z0-9.-]*):([0-9]{1,5})\Z")

#: Longest the receive loop waits before it looks at the stop event and the clock, s.
POLL_S = 0.1

#: Messages read from one station before the loop turns to the next (fairness).
BURST = 64


# ----------------------------------------------------------------------------------------------
# station specs and endpoints
# ----------------------------------------------------------------------------------------------
def _check_endpoint(what: str, endpoint: str) -> None:
    """One-line ValueError unless ``endpoint`` is tcp://HOST:PORT or ipc://PATH."""
    m = _TCP_RE.match(endpoint)
    if m:
        if not 1 <= int(m.group(2)) <= 65535:
            raise ValueError(f"{what} {endpoint!r}: port {m.group(2)} is outside 1..65535")
        return
    if endpoint.startswith("ipc://") and len(endpoint) > len("ipc://"):
        return
    raise ValueError(f"{what} {endpoint!r}: expected tcp://HOST:PORT (e.g. "
                     "tcp://192.168.1.20:5621) or ipc://PATH")


def parse_station(text: str) -> tuple[str, str]:
    """Split a ``NAME=ENDPOINT`` station spec.

    Parameters
    ----------
    text : str
        E.g. ``"dish1=tcp://192.168.1.20:5621"``. NAME: 1 to 32 letters, digits, ``_ . -``,
        starting with a letter or digit (it names the archive folder). ENDPOINT:
        ``tcp://HOST:PORT`` or ``ipc://PATH``, the station's data PUB socket.

    Returns
    -------
    (name, endpoint) : tuple[str, str]

    Raises
    ------
    ValueError
        One line naming the spec and what is allowed.
    """
    name, sep, endpoint = text.partition("=")
    if not sep:
        raise ValueError(f"station {text!r}: expected NAME=ENDPOINT, e.g. "
                         "dish1=tcp://192.168.1.20:5621")
    if not _NAME_RE.match(name):
        raise ValueError(f"station {text!r}: name {name!r} must be 1 to 32 letters, digits, "
                         "_ . - starting with a letter or digit")
    _check_endpoint(f"station {name}", endpoint)
    return name, endpoint


def _is_local(endpoint: str) -> bool:
    """True for endpoints only this computer can reach: loopback tcp, ipc://, inproc://."""
    if endpoint.startswith(("ipc://", "inproc://")):
        return True
    m = _TCP_RE.match(endpoint)
    if not m:
        return False
    host = m.group(1).strip("[]")
    if host == "localhost":
        return True
    try:
        return ipaddress.ip_address(host).is_loopback
    except ValueError:
        return False


# ----------------------------------------------------------------------------------------------
# the collector
# ----------------------------------------------------------------------------------------------
@dataclass
class StationCount:
    """What one station sent: messages received, per topic, relayed, archived, refused."""

    name: str
    endpoint: str
    received: int = 0
    relayed: int = 0
    archived: int = 0
    decode_errors: int = 0
    repeated: int = 0
    replayed: int = 0
    disconnects: int = 0
    replays: ReplayFilter = field(default_factory=ReplayFilter, repr=False)
    by_topic: dict = field(default_factory=dict)
    last_error: str | None = None

    def line(self) -> str:
        topics = ", ".join(f"{t} {n}" for t, n in sorted(self.by_topic.items())) or "none"
        text = (f"{self.name} ({self.endpoint}): {self.received} messages ({topics}), "
                f"{self.relayed} relayed, {self.archived} spectra archived, "
                f"{self.decode_errors} decode errors")
        if self.repeated:
            text += f", {self.repeated} repeated spectra not archived again"
        if self.replayed:
            text += f", {self.replayed} replayed messages already had"
        if self.disconnects:
            text += f", {self.disconnects} connections ended"
        if self.last_error:
            text += f"; last: {self.last_error}"
        return text


@dataclass
class CollectReport:
    """The counts of one :func:`run_collect`, per station (in the order given)."""

    stations: dict = field(default_factory=dict)
    elapsed_s: float = 0.0

    def lines(self) -> list[str]:
        return [s.line() for s in self.stations.values()]


def _check_args(stations: list[tuple[str, str]], relay_endpoint: str | None,
                duration_s: float | None) -> None:
    if not stations:
        raise ValueError("collect needs at least one station NAME=ENDPOINT")
    names: dict[str, str] = {}
    endpoints: dict[str, str] = {}
    for name, endpoint in stations:
        parse_station(f"{name}={endpoint}")
        if name in names:
            raise ValueError(f"station name {name!r} is given twice: names must differ")
        if endpoint in endpoints:
            raise ValueError(f"endpoint {endpoint} is given for both {endpoints[endpoint]} and "
                             f"{name}: one name per station")
        names[name] = endpoint
        endpoints[endpoint] = name
    if relay_endpoint is not None:
        _check_endpoint("--relay", relay_endpoint)
        if not _is_local(relay_endpoint):
            raise ValueError(f"--relay {relay_endpoint} binds beyond this computer: the relay "
                             "has no keys, use 127.0.0.1, localhost, [::1] or ipc://")
    if duration_s is not None and not (isinstance(duration_s, (int, float))
                                       and 0 < duration_s < math.inf):
        raise ValueError(f"--duration {duration_s!r}: expected a positive number of seconds")


def _station_security(keys_dir: Path, name: str) -> ClientSecurity:
    from spinflip.daemon.live.keys import (
        ClientSecurity,  # lazily: collecting without keys never needs it
    )
    own = keys_dir / name
    return ClientSecurity.from_dir(own if own.is_dir() else keys_dir)


def _warn_decode_error(count: StationCount, log_line: Callable[[str], None]) -> None:
    n = count.decode_errors
    if n & (n - 1) == 0:                 # the 1st, 2nd, 4th, 8th ... error: no flood
        log_line(f"station {count.name}: message refused ({n} so far): {count.last_error}")


def run_collect(stations: list[tuple[str, str]], relay_endpoint: str | None,
                archive_dir: Path | None, keys_dir: Path | None, duration_s: float | None,
                stop_event: threading.Event,
                log_line: Callable[[str], None] | None = None) -> CollectReport:
    """Receive from every station, relay under the station's name, archive integrations.

    Parameters
    ----------
    stations : list of (name, endpoint)
        As from :func:`parse_station`; names and endpoints must be unique.
    relay_endpoint : str or None
        Where to bind the relay PUB socket (loopback or ipc:// only); None: no relay.
    archive_dir : Path or None
        Root of the :class:`SpectrumArchive`; None: nothing is written.
    keys_dir : Path or None
        CURVE client keys (see the module docstring); None: plain connections.
    duration_s : float or None
        Stop after this many seconds (wall clock); None: until ``stop_event`` is set.
    stop_event : threading.Event
        Set it (from a signal handler or another thread) to stop within about
        :data:`POLL_S` s.
    log_line : callable(str), optional
        Receives the warnings (refused messages); default: the ``spinflip.collect`` logger.

    Returns
    -------
    CollectReport
        Messages per station: received, per topic, relayed, archived, decode errors.

    Raises
    ------
    ValueError
        Bad station list, relay endpoint, duration or keys (one line), or an endpoint
        ZeroMQ refuses.
    OSError
        The archive could not be written.

    Notes
    -----
    One SUB socket per station and a poller over them; the station of a message is the
    socket it came from. Relaying never blocks: a PUB socket drops for slow subscribers.
    """
    _check_args(stations, relay_endpoint, duration_s)
    log_line = log_line or log.warning
    if keys_dir is not None:
        keys_dir = Path(keys_dir)
        if not keys_dir.is_dir():
            raise ValueError(f"--keys {keys_dir}: no such folder (make one with spinflip keys)")
    report = CollectReport({n: StationCount(n, e) for n, e in stations})
    ctx = zmq.Context()
    sockets: dict = {}
    monitors: dict = {}
    archive = SpectrumArchive(archive_dir) if archive_dir is not None else None
    relay = None
    t0 = time.monotonic()
    try:
        if relay_endpoint is not None:
            relay = ctx.socket(zmq.PUB)
            relay.linger = 0
            relay.setsockopt(zmq.MAXMSGSIZE, MAX_SUBSCRIPTION_FRAME)   # it reads subscriptions
            try:
                relay.bind(relay_endpoint)
            except zmq.ZMQError as exc:
                raise ValueError(f"--relay {relay_endpoint}: cannot bind ({exc})") from None
        poller = zmq.Poller()
        for name, endpoint in stations:
            sock = ctx.socket(zmq.SUB)
            sock.linger = 0
            sock.setsockopt(zmq.MAXMSGSIZE, schema.MAX_FRAME_BYTES)
            sockets[sock] = report.stations[name]
            if keys_dir is not None:
                _station_security(keys_dir, name).apply(sock)
            sock.setsockopt(zmq.SUBSCRIBE, b"")
            try:
                sock.connect(endpoint)
            except zmq.ZMQError as exc:
                raise ValueError(f"station {name} {endpoint}: cannot connect ({exc})") from None
            poller.register(sock, zmq.POLLIN)
            monitor = sock.get_monitor_socket(zmq.EVENT_DISCONNECTED)
            monitors[monitor] = (sock, endpoint)
            poller.register(monitor, zmq.POLLIN)
        deadline = None if duration_s is None else t0 + duration_s
        while not stop_event.is_set():
            wait_s = POLL_S if deadline is None else min(POLL_S, deadline - time.monotonic())
            if wait_s <= 0:
                break
            for sock, _ev in poller.poll(int(math.ceil(wait_s * 1000))):
                if sock in monitors:
                    try:
                        recv_monitor_message(sock, zmq.NOBLOCK)
                    except zmq.Again:
                        continue
                    _reconnect(monitors[sock], sockets[monitors[sock][0]], log_line)
                    continue
                count = sockets[sock]
                for _ in range(BURST):
                    try:
                        frames = sock.recv_multipart(zmq.NOBLOCK)
                    except zmq.Again:
                        break
                    _handle(count, frames, relay, archive, log_line)
    finally:
        for monitor, (sock, _endpoint) in monitors.items():
            sock.disable_monitor()
            monitor.close()
        for sock in sockets:
            sock.close()
        if relay is not None:
            relay.close()
        ctx.term()
        if archive is not None:
            archive.close()
        report.elapsed_s = time.monotonic() - t0
    return report


def _reconnect(entry: tuple[zmq.Socket, str], count: StationCount,
               log_line: Callable[[str], None]) -> None:
    """A station's connection ended: count it, say so (1st, 2nd, 4th ...), connect anew.

    ZeroMQ reconnects by itself after a lost connection, but not after a protocol error such
    as a frame over ``MAXMSGSIZE``; disconnect + connect covers both without a second
    connection to the station."""
    sock, endpoint = entry
    count.disconnects += 1
    n = count.disconnects
    if n & (n - 1) == 0:
        log_line(f"station {count.name}: connection ended ({n} so far; the station stopped, "
                 f"or sent a frame over {schema.MAX_FRAME_BYTES} bytes): connecting again")
    try:
        sock.disconnect(endpoint)
    except zmq.ZMQError:
        pass                             # the session is gone already (protocol error)
    sock.connect(endpoint)


def _handle(count: StationCount, frames: list[bytes], relay: zmq.Socket | None,
            archive: SpectrumArchive | None, log_line: Callable[[str], None]) -> None:
    """Check, restamp, relay and archive one message of station ``count.name``."""
    count.received += 1
    try:
        msg = schema.decode(frames)
        header = dict(msg.header)
        header["station"] = count.name
        out = schema.encode(msg.topic, header,
                          {d["name"]: (msg.arrays[d["name"]], d["unit"])
                           for d in msg.header["arrays"]})
    except (schema.WireError, ValueError, TypeError, RecursionError) as exc:
        count.decode_errors += 1
        count.last_error = one_line(str(exc) or type(exc).__name__, schema.MAX_ERROR_CHARS)
        _warn_decode_error(count, log_line)
        return
    count.by_topic[msg.topic] = count.by_topic.get(msg.topic, 0) + 1
    if not count.replays.take(msg.topic, header):
        count.replayed += 1               # the latest message of this topic, already taken
        return
    if relay is not None:
        try:
            relay.send_multipart(out, zmq.NOBLOCK)
            count.relayed += 1
        except zmq.Again:                # PUB drops rather than blocks; kept for safety
            pass
    if archive is not None and msg.topic == "spectrum" and msg.header["kind"] == "integration":
        if archive.append(count.name, out) is None:
            count.repeated += 1
        else:
            count.archived += 1


# ----------------------------------------------------------------------------------------------
# command line
# ----------------------------------------------------------------------------------------------
def main_collect(stations: list[str], relay: str | None = None, archive: str | None = None,
                 keys: str | None = None, duration: float | None = None) -> int:
    """Run ``spinflip collect`` (its options are parsed by :mod:`spinflip.cli`); returns the
    exit code.

    Parameters
    ----------
    stations : list of str
        ``"NAME=ENDPOINT"`` of each station.
    relay : str or None
        Endpoint to re-publish everything on.
    archive : str or None
        Folder to store every received integration in.
    keys : str or None
        Folder of CURVE client keys.
    duration : float or None
        Seconds to collect; None: until SIGINT or SIGTERM.

    Returns
    -------
    int
        0 when stopped (duration over, SIGINT or SIGTERM); 2 for bad input (one line on
        standard error); 1 when the archive could not be written or ZeroMQ failed.

    Notes
    -----
    Prints one line per station at the end (messages, per topic, relayed, archived, decode
    errors) and warns about stations nothing was received from. SIGINT and SIGTERM stop the
    collector cleanly when called from the main thread.
    """
    stop_event = threading.Event()
    old_handlers = {}
    try:
        parsed = [parse_station(t) for t in stations]
        archive_dir = Path(archive) if archive else None
        keys_dir = Path(keys) if keys else None
        _check_args(parsed, relay, duration)
        if threading.current_thread() is threading.main_thread():
            for sig in (signal.SIGINT, signal.SIGTERM):
                old_handlers[sig] = signal.signal(sig, lambda *_: stop_event.set())
        where = "; ".join(f"{n} {e}" for n, e in parsed)
        print(f"spinflip collect: from {where}"
              + (f"; relaying on {relay}" if relay else "")
              + (f"; archiving to {archive_dir}" if archive_dir else ""), flush=True)
        report = run_collect(parsed, relay, archive_dir, keys_dir, duration, stop_event,
                             log_line=lambda s: print(f"spinflip collect: {s}",
                                                      file=sys.stderr, flush=True))
    except ValueError as exc:
        print(f"spinflip collect: {exc}", file=sys.stderr)
        return 2
    except (OSError, zmq.ZMQError) as exc:
        print(f"spinflip collect: {exc}", file=sys.stderr)
        return 1
    finally:
        for sig, handler in old_handlers.items():
            signal.signal(sig, handler)
    for line in report.lines():
        print(line)
    for count in report.stations.values():
        if count.received == 0:
            print(f"spinflip collect: nothing received from {count.name} ({count.endpoint}) "
                  f"in {report.elapsed_s:.1f} s: is spinflip run going there, and are the "
                  "keys right?", file=sys.stderr)
    return 0
