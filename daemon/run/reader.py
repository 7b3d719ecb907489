"""The reader thread: Blocks from the source into a bounded queue for the main loop.

For a live source (the dongle, or the simulator in real time) a full queue drops the block and
counts its samples as lost (``counters["dropped"]``); in ``--fast`` mode the reader waits
instead, since simulated time does not run away. A source that fails and can be reopened
(:meth:`spinflip.daemon.sources.base.Source.can_reopen`) is reopened with a doubling wait (1 s
up to ``source.reconnect_max_s``); the queue carries :class:`SourceLost` and
:class:`SourceBack` markers around the outage, and :data:`END` once the source ends or fails
for good (its error in ``counters["error"]``).
"""

from __future__ import annotations

import queue
import threading
import time as _time
from collections.abc import Callable
from dataclasses import dataclass

from spinflip.daemon.sources.base import Source, SourceError

END = object()          # the last item the reader queues


@dataclass(frozen=True)
class SourceLost:
    """The source failed (``why``); the reader is reopening it."""

    why: str


@dataclass(frozen=True)
class SourceBack:
    """The source delivers again after ``outage_s`` seconds."""

    outage_s: float


class BlockReader:
    """Reads ``source`` on a thread of its own (its body under ``guard``, so it runs again
    after a failure) into :attr:`q`.

    Parameters
    ----------
    source : the source (opened by the caller)
    fast : wait for room in the queue instead of dropping blocks
    stop : the run's stop event
    guard : callable(worker, body) -> target: the supervisor's guard
    counters : the run's counters; the reader adds to ``dropped`` and sets ``error``
    reconnect_max_s : longest wait between reconnection attempts, s
    log : callable(text)
    maxsize : blocks the queue holds
    """

    def __init__(self, source: Source, fast: bool, stop: threading.Event,
                 guard: Callable[[str, Callable[[], None]], Callable[[], None]], counters: dict,
                 reconnect_max_s: float, log: Callable[[str], None], maxsize: int):
        self.source = source
        self.fast = fast
        self.stop = stop
        self.guard = guard
        self.counters = counters
        self.reconnect_max_s = reconnect_max_s
        self.log = log
        self.q: queue.Queue = queue.Queue(maxsize=maxsize)
        self.thread = threading.Thread(target=self._run, daemon=True, name="reader")

    def start(self) -> None:
        self.thread.start()

    def join(self, timeout: float | None = None) -> None:
        if self.thread.ident is not None:
            self.thread.join(timeout=timeout)

    def depth(self) -> int:
        """Blocks waiting in the queue."""
        return self.q.qsize()

    def _run(self) -> None:
        try:
            self.guard("reader", self._read_blocks)()
        finally:
            self.q.put(END)

    def _put_waiting(self, item: object) -> bool:
        """Queue ``item``, waiting for room; False if a stop came first."""
        while not self.stop.is_set():
            try:
                self.q.put(item, timeout=0.2)
                return True
            except queue.Full:
                continue
        return False

    def _read_blocks(self) -> None:
        try:
            while not self.stop.is_set():
                try:
                    block = self.source.read()
                except SourceError as exc:
                    if not self.source.can_reopen():
                        raise
                    lost_at = _time.monotonic()
                    if not self._put_waiting(SourceLost(str(exc))) or not self._reconnect():
                        break
                    self._put_waiting(SourceBack(_time.monotonic() - lost_at))
                    continue
                if block is None:
                    break
                if self.fast:
                    self._put_waiting(block)
                else:
                    try:
                        self.q.put_nowait(block)
                    except queue.Full:
                        self.counters["dropped"] += block.n_samples
        except (SourceError, OSError) as exc:
            self.counters["error"] = exc

    def _reconnect(self) -> bool:
        """Reopen a lost source, waiting 1, 2, 4 ... s (at most ``reconnect_max_s``) between
        attempts; True once it delivers again, False if a stop came first."""
        wait_s, cap_s = 1.0, self.reconnect_max_s
        attempt = 0
        while not self.stop.wait(wait_s):
            attempt += 1
            try:
                self.source.reopen()
                return True
            except (SourceError, OSError) as exc:
                self.log(f"info: reconnection attempt {attempt} failed "
                         f"({str(exc).splitlines()[0]}); next in {min(2 * wait_s, cap_s):.0f} s")
            wait_s = min(2 * wait_s, cap_s)
        return False
