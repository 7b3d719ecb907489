"""No worker thread of the daemon dies silently.

The daemon's work is spread over threads: the reader (source -> queue), the writer (scans onto
the disk), the publisher and the control server (ZeroMQ), the status loop and the systemd
watchdog pinger. An unexpected exception in one of them would, left alone, print a traceback
to stderr and end that thread while the others carry on as if nothing happened (the writer
gone, the status still saying "writing"). Each thread body therefore runs under
:meth:`Supervisor.guard`:

* the exception is logged with its traceback (the journal keeps it) and becomes an ``error``
  event the live UI shows; the failure is counted per worker and carried in the status message
  (``worker_failures``);
* a worker marked restartable runs its body again in the same thread, up to ``max_restarts``
  times in ``window_s`` seconds (the state it keeps, e.g. the writer's queue of held
  integrations, survives the restart);
* past that, or for a worker that cannot be restarted, the supervisor records the failure as
  fatal and asks the daemon to stop: the daemon finishes and saves what it can, then exits with
  status 1 so that systemd's ``Restart=on-failure`` starts it again.

:func:`threading.excepthook` is chained as a backstop, so a thread started without a guard
still becomes an event and a fatal failure rather than a line on stderr.

This is common practice for long-running services (supervision trees in Erlang/OTP and the
restart policies of systemd.service(5)), no single source.
"""

from __future__ import annotations

import collections
import threading
import time as _time
import traceback
from collections.abc import Callable
from dataclasses import dataclass

from spinflip.daemon import error_line

MAX_RESTARTS = 3          # restarts of one worker allowed within WINDOW_S
WINDOW_S = 600.0


class WorkerFailed(RuntimeError):
    """A worker thread failed for good; the daemon stops with a non-zero exit."""


@dataclass
class Failure:
    """One unexpected exception of a worker."""

    worker: str
    text: str            # one line: exception type and message
    restarted: bool
    mono_s: float


def one_line(exc: BaseException, limit: int = 200) -> str:
    """``Type: message`` on one line, at most ``limit`` characters
    (:func:`spinflip.daemon.error_line.one_line`)."""
    return error_line.one_line(f"{type(exc).__name__}: {exc}", limit)


class Supervisor:
    """Guards the daemon's worker threads.

    Parameters
    ----------
    event : callable(severity, text)
        The daemon's event log (logged and published).
    log : callable(text)
        Plain log lines (the traceback goes here).
    on_fatal : callable()
        Called once when a failure is fatal (the daemon sets its stop flag).
    max_restarts, window_s : int, float
        A restartable worker runs again at most ``max_restarts`` times within ``window_s``.
    """

    def __init__(self, event: Callable[[str, str], None], log: Callable[[str], None],
                 on_fatal: Callable[[], None], max_restarts: int = MAX_RESTARTS,
                 window_s: float = WINDOW_S):
        self.event = event
        self.log = log
        self.on_fatal = on_fatal
        self.max_restarts = int(max_restarts)
        self.window_s = float(window_s)
        self.failures: list[Failure] = []
        self.fatal: Failure | None = None
        self._lock = threading.Lock()
        self._recent: dict[str, collections.deque] = collections.defaultdict(collections.deque)
        self._previous_hook: Callable[[threading.ExceptHookArgs], object] | None = None

    # -- guarding ------------------------------------------------------------------------------
    def guard(self, worker: str, body: Callable[[], None], restart: bool = True
              ) -> Callable[[], None]:
        """A thread target that runs ``body``; see the module docstring for what a failure does.

        ``body`` returning normally ends the thread normally.
        """
        def run() -> None:
            while True:
                try:
                    body()
                    return
                except BaseException as exc:   # noqa: BLE001 - every failure is reported
                    if not self.failed(worker, exc, restart):
                        return
        return run

    def failed(self, worker: str, exc: BaseException, restart: bool = True) -> bool:
        """Report an unexpected exception of ``worker``; True if it should run again."""
        now = _time.monotonic()
        with self._lock:
            recent = self._recent[worker]
            while recent and now - recent[0] > self.window_s:
                recent.popleft()
            again = restart and len(recent) < self.max_restarts and self.fatal is None
            recent.append(now)
            text = one_line(exc)
            failure = Failure(worker, text, again, now)
            self.failures.append(failure)
            del self.failures[:-50]
            first_fatal = not again and self.fatal is None
            if first_fatal:
                self.fatal = failure
        self.log("".join(traceback.format_exception(exc)).rstrip())
        if again:
            self.event("error", f"the {worker} thread failed ({text}); restarted "
                       f"({len(recent)} of {self.max_restarts} restarts in "
                       f"{self.window_s / 60:.0f} min)")
        else:
            why = "restarted too often" if restart else "it cannot be restarted"
            self.event("error", f"the {worker} thread failed ({text}) and {why}: the daemon "
                       "saves what it has and exits with status 1 (systemd restarts it)")
            if first_fatal:
                self.on_fatal()
        return again

    # -- what the status shows -----------------------------------------------------------------
    def counts(self) -> dict[str, int]:
        """Failures per worker since the start (only workers that failed)."""
        with self._lock:
            return dict(collections.Counter(f.worker for f in self.failures))

    def check(self) -> None:
        """Raise :class:`WorkerFailed` if a failure was fatal."""
        if self.fatal is not None:
            raise WorkerFailed(f"the {self.fatal.worker} thread failed ({self.fatal.text}); "
                               "see the log for its traceback")

    # -- backstop for threads started without a guard --------------------------------------------
    def install_excepthook(self) -> None:
        """Chain :func:`threading.excepthook`: an unguarded thread's death is a fatal failure."""
        self._previous_hook = threading.excepthook

        def hook(args: threading.ExceptHookArgs) -> None:
            if args.exc_type is SystemExit or args.exc_value is None:
                return
            name = args.thread.name if args.thread is not None else "unnamed"
            self.failed(name, args.exc_value, restart=False)

        threading.excepthook = hook

    def remove_excepthook(self) -> None:
        if self._previous_hook is not None:
            threading.excepthook = self._previous_hook
            self._previous_hook = None
