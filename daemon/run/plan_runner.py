"""Running a plan: one visit after another, the dish brought onto each target by the pointing
driver, observed for its on-source time, one scan file per visit.

The runner is a thread of its own (supervised like the others); the data flow stays in the
main loop, which it drives through calls applied between blocks
(:meth:`spinflip.daemon.run.scan_control.ScanControl.call`). For each visit:

1. **What next.** The visits not yet ended are scheduled from the data clock's now
   (:func:`spinflip.daemon.run.scheduler.schedule`: elevation limit, horizon mask, Sun, slew and
   settle, the rotator's limits) and the first scheduled one is taken. So a late start, a long
   slew, an observer who took their time or a restart all re-plan from the moment they end;
   what is down is deferred and comes back; what never rises is skipped with its reason.
2. **Wait** until its slew must begin (state ``waiting``, phase ``deferred``). A simulator under
   ``--fast`` jumps ahead (:meth:`Source.skip`); a dongle waits in real time.
3. **Acquire** (state ``slewing``, or ``waiting`` for the observer with the manual driver):
   :meth:`Mount.acquire` until the dish is within tolerance of where the target is now, then
   ``pointing.settle_s``. Meanwhile a fast simulator is held to the wall clock
   (:meth:`Source.set_real_time`): a slew takes the time it takes, and simulated time
   advances with it as it would in real time. Nothing is integrated while the dish moves.
4. **Observe** (state ``observing``): a scan opens with the plan's cards (PLANNAME, PLANSTEP,
   PLANSIZE, PLANVIST, MOUNT, ...); the main loop counts on-source blocks and ends the visit
   after the target's ``seconds``. Every ``rotator.poll_s`` the runner tracks
   (:meth:`Mount.track`) and logs the position the mount reports; each row takes the report
   nearest its middle as AZIMUTH/ELEVATIO, and PNTERR (its angle from the target).
5. **Record** the visit as done in the progress file (:mod:`.plan_progress`), so a restart
   never repeats it.

Faults: a mount that stops answering or never arrives is an error event; the visit is
abandoned (the integration in progress dropped: it may hold samples taken while the dish was
off target; finished ones stay in the scan), the runner waits until the mount answers again,
and the plan goes on. A hand-pointed dish whose target has moved more than half a beam is
asked to be pointed again (the integration in progress is kept; counting pauses meanwhile).

Commands (from the control socket, through the main loop): ``skip`` ends the visit and
records it skipped; ``abort`` ends the plan; ``park`` ends the visit (to be observed again)
and parks, and the plan waits for ``resume``; ``pause``/``resume`` pause the counting.
"""

from __future__ import annotations

import bisect
import math
import threading
from collections import deque
from dataclasses import dataclass, field
from typing import TYPE_CHECKING

from astropy.time import Time, TimeDelta

from spinflip.daemon.live.schema import State
from spinflip.daemon.live.schema.fields import PLAN_LIST_MAX
from spinflip.daemon.mount.base import AzEl, Mount, MountCancelled, MountError, PointAgain
from spinflip.daemon.run.plan_file import Plan, Target
from spinflip.daemon.run.plan_progress import PlanProgress, visit_key
from spinflip.daemon.run.scheduler import Entry, Limits, azel, schedule
from spinflip.daemon.sky.pointing import Pointing
from spinflip.daemon.utc import utc_iso

if TYPE_CHECKING:
    from spinflip.daemon.run.observation import Daemon

#: How often the runner looks at the data clock while it waits, wall s.
_WAIT_POLL_S = 0.2
#: Reports of the dish's position kept for the rows (at 2 per s: over half an hour).
_REPORTS_KEPT = 4096
#: A report farther than this from a row's middle is not used for it, s of data time.
_REPORT_MAX_AGE_S = 30.0


@dataclass
class Visit:
    """One visit being made: its schedule entry, where it stands, and how the main loop ends it."""

    entry: Entry
    key: str                       # plan_progress.visit_key
    step: int                      # 1-based, of ``steps``
    steps: int
    pointing: Pointing             # the target (OBJECT, GLON/GLAT of the rows)
    goal_blocks: int = 0           # on-source blocks to observe (set by the main loop)
    blocks: int = 0
    scan: str | None = None
    ended: threading.Event = field(default_factory=threading.Event)

    @property
    def target(self) -> Target:
        return self.entry.target


class PlanRunner:
    """Runs ``plan`` on ``loop`` (the daemon) with ``mount``; see the module docstring.

    Parameters
    ----------
    loop : the daemon
    plan : the plan
    mount : the pointing driver
    limits : the scheduler's limits (the site's and the rotator's)
    progress : the plan's progress file; None for a pointing given without a plan (one
        visit, nothing resumed)
    exit_at_end : stop the daemon when the plan ends (a plan given on the command line)
    """

    def __init__(self, loop: Daemon, plan: Plan, mount: Mount, limits: Limits,
                 progress: PlanProgress | None, exit_at_end: bool = False):
        self.loop = loop
        self.plan = plan
        self.mount = mount
        self.limits = limits
        self.progress = progress
        self.exit_at_end = exit_at_end
        self.keys = {id(t): i for i, t in enumerate(plan.targets)}
        self.steps = sum(t.repeat for t in plan.targets)
        self.phase = "deferred"
        self.visit: Visit | None = None
        self.step = 0
        self.upcoming: list[Entry] = []
        self.skipped: list[Entry] = []
        self.abandoned = 0
        self.cancel = threading.Event()      # ends the wait or visit in progress
        self.request: str | None = None      # "skip", "abort" or "park": why cancel is set
        self.resumed = threading.Event()     # set by resume after park
        self.finished = threading.Event()
        self._reports: deque[tuple[float, AzEl]] = deque(maxlen=_REPORTS_KEPT)
        self._lock = threading.Lock()
        self._beam: AzEl | None = None
        self._thread: threading.Thread | None = None
        self._ended_keys: set[str] = set(progress.visits) if progress is not None else set()

    # -- from other threads ------------------------------------------------------------------
    def start(self) -> None:
        self._thread = threading.Thread(
            target=self.loop.supervisor.guard("plan", self.run), name="plan", daemon=True)
        self._thread.start()

    def command(self, cmd: str) -> None:
        """``skip``, ``abort`` or ``park`` (from the main loop's control commands)."""
        if self.finished.is_set():
            raise ValueError(f"{cmd}: the plan {self.plan.name!r} has ended")
        if cmd == "skip" and self.visit is None and self.phase != "deferred":
            raise ValueError("skip: no visit is in progress")
        self.request = cmd
        self.cancel.set()

    def resume(self) -> bool:
        """Resume after ``park``; False when the plan is not parked."""
        if self.phase != "parked":
            return False
        self.resumed.set()
        return True

    def stop(self, timeout_s: float = 5.0) -> None:
        self.request = "stop"
        self.cancel.set()
        self.resumed.set()
        if self._thread is not None:
            self._thread.join(timeout=timeout_s)

    def reached_at(self, t_unix: float) -> AzEl | None:
        """The dish's reported position nearest ``t_unix`` (data time), or None."""
        with self._lock:
            reports = list(self._reports)
        if not reports:
            return None
        times = [t for t, _ in reports]
        i = bisect.bisect_left(times, t_unix)
        best = min((k for k in (i - 1, i) if 0 <= k < len(reports)),
                   key=lambda k: abs(times[k] - t_unix))
        if abs(times[best] - t_unix) > _REPORT_MAX_AGE_S:
            return None
        return reports[best][1]

    def as_progress(self) -> dict:
        """The progress message's ``plan`` object."""
        visit = self.visit
        block_s = self.loop.block_s
        now = self.loop.now()
        eta = None
        if self.upcoming:
            end = Time(self.upcoming[-1].end_utc, scale="utc")
            eta = max(0.0, float((end - now).to_value("sec")))
        elif visit is not None:
            eta = max(0.0, (visit.goal_blocks - visit.blocks) * block_s)
        done = self.progress.count("done") if self.progress is not None else 0
        return {
            "name": self.plan.name, "step": self.step, "steps": self.steps,
            "object": visit.target.object if visit is not None else None,
            "phase": self.phase,
            "visit_elapsed_s": visit.blocks * block_s if visit is not None else 0.0,
            "visit_total_s": visit.target.seconds if visit is not None else None,
            "eta_s": eta, "done": done, "abandoned": self.abandoned,
            "upcoming": [{"object": e.target.object, "start_utc": e.start_utc}
                         for e in self.upcoming[:PLAN_LIST_MAX]],
            "skipped": [{"object": e.target.object, "reason": e.reason}
                        for e in self.skipped[:PLAN_LIST_MAX]],
        }

    # -- the thread ------------------------------------------------------------------------
    def run(self) -> None:
        loop = self.loop
        self._find_dish()
        while not loop.stop_event.is_set() and not self.finished.is_set():
            if self.phase == "parked":
                self._wait_for_resume()
                continue
            entry = self._next()
            if entry is None:
                self._end("finished")
                return
            self.cancel.clear()
            self.request = None
            if not self._wait_for_slew(entry):
                self._after_cancel(None)
                continue
            self._visit(entry)

    def _visit(self, entry: Entry) -> None:
        t = entry.target
        self.step = self._step_of(entry)
        visit = Visit(entry, visit_key(self.keys[id(t)], entry.visit), self.step, self.steps,
                      Pointing.at(t.frame, t.lon_deg, t.lat_deg, self.loop.location,
                                  t.object))
        self.visit = visit
        try:
            self._acquire(visit, first=True)
            self._observe(visit)
        except MountCancelled:
            self._after_cancel(visit)
        except MountError as exc:
            self._abandon(visit, str(exc))
        finally:
            self.visit = None

    def _find_dish(self) -> None:
        """Before the first schedule: where the rotator is (the first slew counts), waiting
        for it to answer (said once when it does not at once)."""
        if self.mount.driver != "rotator" or self._dish() is not None:
            return
        self.phase = "waiting"
        loop = self.loop
        loop.source.set_real_time(True)
        slow = threading.Timer(2 * loop.cfg["rotator"]["answer_s"], lambda: loop.event(
            "warning", f"the rotator at {loop.cfg['rotator']['endpoint']} does not answer: "
            f"plan {self.plan.name!r} waits for it"))
        slow.daemon = True
        slow.start()
        try:
            self.mount.wait_until_answering(self.cancel)
        finally:
            slow.cancel()
            loop.source.set_real_time(False)
        self.phase = "deferred"

    # -- steps of a visit ------------------------------------------------------------------
    def _next(self) -> Entry | None:
        """The first scheduled visit from now (None: nothing left that can be observed)."""
        todo = [t for t in self.plan.targets
                if any(not self._ended(t, k) for k in range(1, t.repeat + 1))]
        if not todo:
            self.upcoming, self.skipped = [], self.skipped
            return None
        here = self._dish()
        entries = schedule(self.plan, self.loop.location, self.loop.now(), self.limits,
                           park=(here.az_deg, here.el_deg) if here is not None else None,
                           ended=self._ended)
        self.upcoming = [e for e in entries if e.status == "scheduled"]
        self.skipped = [e for e in entries if e.status == "skipped"]
        return self.upcoming[0] if self.upcoming else None

    def _ended(self, target: Target, visit: int) -> bool:
        return visit_key(self.keys[id(target)], visit) in self._ended_keys

    def _step_of(self, entry: Entry) -> int:
        """1-based number of this visit among the plan's visits in file order."""
        k = self.keys[id(entry.target)]
        return sum(t.repeat for t in self.plan.targets[:k]) + entry.visit

    def _wait_for_slew(self, entry: Entry) -> bool:
        """Wait until the visit's slew must begin; False when cancelled."""
        loop = self.loop
        begin = Time(entry.start_utc, scale="utc") - TimeDelta(entry.slew_s, format="sec")
        gap = float((begin - loop.now()).to_value("sec"))
        if gap <= 1.0:
            return True
        self.phase = "deferred"
        loop.control.call(lambda: loop.plan_wait(f"{entry.target.object} starts at "
                                                 f"{entry.start_utc}"))
        if loop.source.skip(gap):
            loop.event("info", f"plan {self.plan.name!r}: nothing to observe until "
                       f"{begin.isot[:19]}Z; the simulator skips {gap:.0f} s ahead")
        while loop.now() < begin:
            if self.cancel.wait(_WAIT_POLL_S) or loop.stop_event.is_set():
                return False
        return True

    def _where(self, target: Target) -> AzEl:
        """Where ``target`` is at the data clock's now (and the simulated beam follows the dish)."""
        now = self.loop.now()
        az, el = azel([target], self.loop.location, now.reshape((1,)))
        self._follow_beam()
        return AzEl(float(az[0, 0]), float(el[0, 0]))

    def _acquire(self, visit: Visit, first: bool) -> None:
        """Bring the dish onto the visit's target (MountError / MountCancelled on failure)."""
        loop, t = self.loop, visit.target
        manual = self.mount.driver == "manual"
        self.phase = "waiting" if manual else "slewing"
        state = State.WAITING if manual else State.SLEWING
        if first:
            loop.control.call(lambda: loop.plan_wait(f"{t.object}: {self.phase}", state))
        want = self._where(t)
        why = self.mount.refuse(want)
        if why is not None:
            raise MountError(f"{t.object}: {why}")
        loop.source.set_real_time(True)      # the mount moves in real time
        try:
            reached = self.mount.acquire(lambda: self._where(t), self.cancel)
            self._report(reached)
            settle = self.loop.cfg["pointing"]["settle_s"] if self.mount.driver == "rotator" \
                else 0.0
            if settle and self.cancel.wait(settle):
                raise MountCancelled()
        finally:
            loop.source.set_real_time(False)

    def _observe(self, visit: Visit) -> None:
        """Observe until the main loop ends the visit; track meanwhile."""
        loop = self.loop
        loop.control.call(lambda: loop.begin_visit(visit, self.plan, self.mount))
        self.phase = "observing"
        poll_s = loop.cfg["rotator"]["poll_s"]
        while not visit.ended.wait(poll_s):
            if self.cancel.is_set() or loop.stop_event.is_set():
                raise MountCancelled()
            if self.phase == "observing" and loop.state == State.PAUSED:
                self.phase = "paused"
            elif self.phase == "paused" and loop.state == State.OBSERVING:
                self.phase = "observing"
            try:
                self._report(self.mount.track(self._where(visit.target)))
            except PointAgain as exc:
                loop.event("warning", f"{visit.target.object}: {exc}")
                loop.control.call(lambda: loop.hold_visit(True))
                try:
                    self._acquire(visit, first=False)
                finally:
                    loop.control.call(lambda: loop.hold_visit(False))
                self.phase = "observing"
        self._record(visit, "done", "")
        loop.event("info", f"plan {self.plan.name!r} visit {visit.step}/{visit.steps} "
                   f"{visit.target.object}: done, scan {visit.scan}")

    # -- endings -----------------------------------------------------------------------------
    def _record(self, visit: Visit, outcome: str, reason: str) -> None:
        self._ended_keys.add(visit.key)
        if self.progress is not None:
            try:
                self.progress.record(visit.key, outcome, visit.scan, utc_iso(zulu=True), reason)
            except OSError as exc:
                self.loop.event("error", f"plan progress {self.progress.path}: not written "
                                f"({exc.strerror or exc}); a restart would repeat this visit")

    def _abandon(self, visit: Visit, why: str) -> None:
        """The mount failed: the visit ends (its in-progress integration dropped), recorded
        abandoned; wait until the mount answers again, then the plan goes on."""
        loop = self.loop
        self.abandoned += 1
        loop.control.call(lambda: loop.end_visit(visit, keep_partial=False,
                                                 why="the mount failed"))
        self._record(visit, "abandoned", why)
        loop.event("error", f"plan {self.plan.name!r} visit {visit.step}/{visit.steps} "
                   f"{visit.target.object} abandoned: {why}")
        self.phase = "waiting"
        loop.control.call(lambda: loop.plan_wait("the mount does not answer"))
        loop.source.set_real_time(True)
        try:
            if self.mount.wait_until_answering(self.cancel):
                loop.event("info", f"the {self.mount.driver} answers again: plan "
                           f"{self.plan.name!r} goes on")
        finally:
            loop.source.set_real_time(False)
        if self.request in ("abort", "park"):
            self._after_cancel(None)

    def _after_cancel(self, visit: Visit | None) -> None:
        """A command (or the stop) ended the wait or the visit."""
        loop, why = self.loop, self.request or "stop"
        if visit is not None:
            loop.control.call(lambda: loop.end_visit(visit, keep_partial=True, why=why))
            if why == "skip":
                self._record(visit, "skipped", "skipped by the observer")
        self.cancel.clear()
        self.request = None
        if why == "abort":
            self._end("aborted")
        elif why == "park":
            self._park()
            self.phase = "parked"
            self.resumed.clear()
            loop.control.call(lambda: loop.plan_wait("parked: resume to go on"))
        elif why == "stop":
            self.finished.set()

    def _wait_for_resume(self) -> None:
        while not self.resumed.wait(_WAIT_POLL_S):
            if self.loop.stop_event.is_set():
                return
        self.resumed.clear()
        if self.request == "stop":
            return
        if self.request == "abort":
            self._end("aborted")
            return
        self.cancel.clear()
        self.request = None
        self.phase = "deferred"

    def _end(self, how: str) -> None:
        """The plan is over: park, say so, and stop the daemon when it was given at start."""
        loop = self.loop
        self.upcoming = []
        self._park()
        self.phase = "finished"
        done = self.progress.count("done") if self.progress is not None else 0
        skipped = ", ".join(f"{e.target.object} ({e.reason})" for e in self.skipped[:5])
        loop.event("info", f"plan {self.plan.name!r} {how}: {done} of {self.steps} visits "
                   f"done, {self.abandoned} abandoned, {len(self.skipped)} skipped"
                   + (f": {skipped}" if skipped else ""))
        self.finished.set()
        loop.control.call(lambda: loop.plan_ended(self))
        if self.exit_at_end and how == "finished":
            loop.stop_event.set()

    def _park(self) -> None:
        try:
            at = self.mount.park()
        except (MountError, MountCancelled) as exc:
            self.loop.event("error", f"parking failed: {exc}")
            return
        if at is not None:
            self._report(at)

    # -- the dish's position ----------------------------------------------------------------
    def _dish(self) -> AzEl | None:
        st = self.mount.status()
        if st.az_deg is None or st.el_deg is None:
            return None
        return AzEl(st.az_deg, st.el_deg)

    def _report(self, at: AzEl) -> None:
        """Log where the mount says the dish is, at the data clock's now (for the rows)."""
        if self.mount.driver == "none":
            return                        # a fixed dish reports nothing
        with self._lock:
            self._reports.append((float(self.loop.now().unix), at))
        self._follow_beam()

    def _follow_beam(self) -> None:
        """The simulated beam points where the dish is (re-set when it moved 0.05 deg)."""
        at = self._dish() if self.mount.driver != "none" else None
        if at is None:
            return
        old = self._beam
        if old is not None and math.hypot(at.az_deg - old.az_deg, at.el_deg - old.el_deg) < 0.05:
            return
        self._beam = at
        self.loop.source.set_pointing(
            Pointing.at("azel", at.az_deg, at.el_deg, self.loop.location))

