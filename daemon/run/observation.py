"""The acquisition daemon's main loop: source -> spectrometer -> flags -> calibrator -> rows ->
storage and live.

The loop (:meth:`Daemon.run`) takes Blocks from the reader thread (:mod:`.reader`), adds them to
the spectrometer (and the Tsys meter); each finished integration becomes a typed row
(:class:`spinflip.daemon.run.rows.RowMaker`: interference flags from
:class:`spinflip.daemon.rfi.interference.Interference`, the kelvin scale, the sky position)
that goes to the writer thread (:class:`spinflip.daemon.storage.writer.ScanStore`) and the live
socket (:mod:`.live_status`). Control commands are applied between blocks (:mod:`.scan_control`);
systemd hears of it through :mod:`.systemd_status`.

System temperature (:class:`spinflip.daemon.calibration.tsys_plan.TsysPlan` says where it comes
from, and the FITS header cites it):
``calibration.tsys_from = "noise_source"`` fires the noise source on the schedule's cadence and
measures T_sys at every firing (:mod:`spinflip.daemon.calibration.tsys_meter`); each row takes the newest
measurement finished by the time the row is, and its age (TSYSAGE). Rows finished before the
first measurement wait for it. A failed measurement is an error event; a row whose newest
T_sys is older than ``calibration.tsys_max_age_s`` is saved with every channel flagged, so no
spectrum is ever silently on a wrong scale. ``"loads"`` takes T_sys on the cold sky from the
newest hot/cold record (:mod:`spinflip.daemon.calibration.loads`), refused when too old or measured at other
receiver settings; ``"fixed"`` takes ``calibration.tsys_k``.

Threads: a reader thread pulls Blocks from the source into a bounded queue; the DSP loop (the
calling thread; numpy releases the GIL) consumes it; finished rows go to a writer thread whose
journal append (with fsync) never blocks the DSP loop. For a live source (the dongle, or the
simulator in real time) a full queue drops the block and counts its samples as lost; in
``--fast`` mode the reader waits instead, since simulated time does not run away.

Faults (each also an event on the live socket):

* a source that fails in mid-scan (the dongle unplugged) and can be reopened: the integration
  in progress is kept if it holds a whole switching cycle, the scan file is closed, the reader
  reopens the source with a doubling wait (1 s up to ``source.reconnect_max_s``) and a new scan
  segment begins when samples flow again; the daemon never exits for it;
* the disk refusing writes: :mod:`spinflip.daemon.storage.writer` holds finished integrations in
  memory within ``output.hold_mb`` and writes them when it can again;
* SIGTERM / SIGINT: the integration in progress is kept if it holds a whole switching cycle
  (its EXPOSURE says how long), else dropped and said so; the scan file is closed;
* the system clock stepping: forward steps end the integration and the timestamps follow;
  backward steps are recorded and the timestamps keep counting (never decrease), see
  :mod:`spinflip.daemon.sources.sample_clock`;
* under systemd (``Type=notify``) the daemon says READY=1 once observing, STATUS= lines, and
  WATCHDOG=1 while its main loop is alive (:mod:`spinflip.daemon.run.sd_notify`).
"""

from __future__ import annotations

import functools
import math
import queue
import signal
import sys
import threading
import time as _time
from collections.abc import Callable
from dataclasses import dataclass, field
from pathlib import Path
from types import FrameType
from typing import Any

import numpy as np
from astropy.time import Time

from spinflip.daemon.calibration.noise_source import CalControl
from spinflip.daemon.calibration.noise_switch import NoiseSwitchError, make_noise_switch
from spinflip.daemon.calibration.tsys_meter import TsysMeasurement, TsysMeter
from spinflip.daemon.calibration.tsys_plan import TsysTracker, plan_tsys
from spinflip.daemon.config import ConfigError
from spinflip.daemon.dsp.block import Block
from spinflip.daemon.dsp.channel_grid import ChannelGrid
from spinflip.daemon.dsp.spectrometer import FlagSettings, Integration, Spectrometer
from spinflip.daemon.live import schema
from spinflip.daemon.live.messages import RunningAverage, spectrum_message
from spinflip.daemon.live.schema import State
from spinflip.daemon.mount.base import Mount, MountCancelled, MountError
from spinflip.daemon.mount.factory import make_mount
from spinflip.daemon.products.row import Row
from spinflip.daemon.products.scan_average import scan_products
from spinflip.daemon.rfi.interference import Interference
from spinflip.daemon.run import sd_notify
from spinflip.daemon.run.live_status import LiveStatus
from spinflip.daemon.run.plan_file import MAX_SECONDS, Plan, Target, load_plan
from spinflip.daemon.run.plan_progress import PlanProgress
from spinflip.daemon.run.plan_runner import PlanRunner, Visit
from spinflip.daemon.run.reader import END, BlockReader, SourceBack, SourceLost
from spinflip.daemon.run.rows import RowMaker, emission_mask, scan_header
from spinflip.daemon.run.scan_control import ScanControl
from spinflip.daemon.run.scheduler import limits_from_config
from spinflip.daemon.run.supervisor import Supervisor, WorkerFailed
from spinflip.daemon.run.systemd_status import SystemdStatus
from spinflip.daemon.sky import coordinates
from spinflip.daemon.sky.pointing import Pointing
from spinflip.daemon.sources.base import SourceError, make_source
from spinflip.daemon.storage import archive
from spinflip.daemon.storage.items import CloseScan, Note, OpenScan, TsysRecord
from spinflip.daemon.storage.writer import ScanStore

_QUEUE_SECONDS = 0.9             # blocks waiting for the main loop: about 0.9 s of samples
_WATCHDOG_STALL_S = 10.0         # a main loop silent this long is hung: no more WATCHDOG=1
_PARK_AT_EXIT_S = 10.0           # longest the daemon waits for the rotator to park as it stops


def queue_blocks(block_s: float) -> int:
    """Blocks the reader may queue: :data:`_QUEUE_SECONDS` of samples, at least 2.

    Sized in time, so the memory it can hold follows the sample rate (8 blocks of 262 144
    samples at 2.4 MS/s: 4 MB of raw bytes); a longer wait is a loss the reader counts.
    """
    return max(2, round(_QUEUE_SECONDS / block_s))


@dataclass
class RunResult:
    files: list = field(default_factory=list)
    file_rows: dict = field(default_factory=dict)   # str(path) -> integrations in it
    rows: int = 0
    observed_s: float = 0.0
    lost_samples: int = 0
    recovered: list = field(default_factory=list)


def check_output_dir(path: Path) -> Path:
    """Create the output folder if needed and prove it writable, or raise ConfigError."""
    path = Path(path).expanduser()
    try:
        path.mkdir(parents=True, exist_ok=True)
        probe = path / ".spinflip-write-test"
        probe.write_bytes(b"ok")
        probe.unlink()
    except OSError as exc:
        raise ConfigError(f"output folder {path}: not writable ({exc.strerror or exc})") from None
    return path


def check_plan_for_mount(plan: Plan, driver: str, source_kind: str) -> None:
    """A fixed dish (driver "none") observes drift targets only: refuse others in one line.
    The simulator's dish follows any target (for demos, tests and simulated surveys)."""
    if driver != "none" or source_kind == "sim":
        return
    for t in plan.targets:
        if t.frame != "azel":
            raise ConfigError(
                f"plan {plan.path}: {t.source} ({t.object}) is a {t.frame} position, but "
                "pointing.driver = 'none' is a fixed dish: it observes drift targets (frame = "
                "'azel', or a survey of kind 'drift'); use driver = 'manual' or 'rotator'")


class Daemon:
    """One observation run; see :meth:`run`."""

    def __init__(self, cfg: dict, fast: bool = False, duration_s: float | None = None,
                 log: Callable[[str], None] | None = None, plan: Plan | None = None):
        self.cfg = cfg
        self.fast = fast
        self.duration_s = duration_s
        self.log = log or (lambda msg: print(msg, file=sys.stderr, flush=True))
        self.events: list = []          # (severity, text), newest last
        self.stop_event = threading.Event()
        self.live = LiveStatus(self, cfg["publish"])
        self.supervisor = Supervisor(self.event, self.log, on_fatal=self.stop_event.set)
        self.result = RunResult()       # what run() did so far (read after a failure too)
        self.out_dir = check_output_dir(Path(cfg["output"]["dir"]))
        self.source = make_source(cfg, fast=fast)
        site = cfg["site"]
        self.location = coordinates.site_location(site["lat"], site["lon"], site["height_m"])
        self.t_start = self.source.t_start if self.source.t_start is not None else Time.now()
        self.tsys_plan = plan_tsys(cfg, self.source.kind, float(Time.now().unix))
        self._warned: set = set()
        self.tsys = TsysTracker(self.tsys_plan, cfg["calibration"], self.warn_once)
        try:
            self.switch = make_noise_switch(cfg["calibration"])
        except ValueError as exc:
            raise ConfigError(str(exc)) from None
        if self.source.can_fire_noise_source():
            self.source.attach_noise_source(
                CalControl(self.switch if self.switch.can_switch else None, event=self.event))
        self.pointing = Pointing(cfg, self.location, self.t_start)
        self.mount = make_mount(cfg, prompt=lambda text: self.event("info", text))
        self.visit: Visit | None = None            # the plan's visit being observed
        self._visit_cards: dict[str, Any] = {}
        self._next_firing_s = math.inf             # a target's own noise-source cadence
        self.runner: PlanRunner | None = None
        if (plan is not None or self.mount.driver != "none") and self.source.kind == "replay":
            raise ConfigError("source.kind = 'replay' replays a capture whose pointing is fixed:"
                              " plans and pointing drivers need the simulator or a dongle")
        if plan is not None:
            check_plan_for_mount(plan, self.mount.driver, self.source.kind)
            self.runner = self._runner_for(plan, exit_at_end=True)
        elif self.mount.driver != "none":          # the dish goes to [pointing] first
            self.runner = self._runner_for(self._pointing_plan(), exit_at_end=False)
        el = self.pointing.elevation_deg(self.t_start)
        if self.runner is None and el < cfg["pointing"]["min_elevation"]:
            raise ConfigError(f"pointing {self.pointing.object}: elevation {el:.1f} deg at "
                              f"{self.t_start.isot[:19]} UTC is below pointing.min_elevation = "
                              f"{cfg['pointing']['min_elevation']:g} deg")
        self.source.set_pointing(self.pointing)
        eop = coordinates.check_eop(self.t_start)
        if eop:
            self.event("warning", eop)
        sp, sch = cfg["spectrometer"], self.source.schedule
        self.grid = ChannelGrid.from_schedule(sp["channels"], sch)
        self.nchan = self.grid.nchan
        self.spectrometer = Spectrometer(self.nchan, sp["method"], sp["taps"],
                                         FlagSettings.from_config(cfg["rfi"]))
        self.interference = Interference(self.grid, cfg["rfi"], self._emission_mask)
        self.rows = RowMaker(cfg, self.grid, sch, self.location, self.tsys, self.interference,
                             self.warn_once)
        self.block_s = self.source.block_samples / cfg["source"]["sample_rate"]
        self.blocks_per_integration = self._blocks_for(sp["integration_s"])
        self.meter = (TsysMeter(sch.blocks_per_cycle, self.nchan, self.tsys_plan.tcal_k,
                                self._emission_mask)
                      if self.tsys_plan.kind == "noise_source" else None)
        if self.tsys_plan.kind == "noise_source" and self.switch.can_switch:
            try:                      # prove the switch works (it turns the source off)
                self.switch.open()
            except (NoiseSwitchError, OSError) as exc:
                raise ConfigError(f"noise source switch failed at start-up: {exc}") from None
        self.live.check()
        self.state = State.OBSERVING if self.runner is None else State.WAITING
        self.control = ScanControl(self)
        self.scan_name: str | None = None
        self.integ_blocks = 0           # blocks in the integration being made
        self.total_blocks = 0           # blocks observed (paused and idle ones not counted)
        self.started_mono = _time.monotonic()
        self.counters: dict[str, Any] = {"received": 0, "lost": 0, "dropped": 0, "error": None}
        self.heartbeat = sd_notify.Heartbeat(_WATCHDOG_STALL_S)   # the main loop's pulse
        self.systemd = SystemdStatus(self, sd_notify.Notifier.from_env(log=self.log),
                                     self.heartbeat)
        self._products = functools.partial(scan_products, baseline_cfg=cfg["baseline"])
        self.store = ScanStore(self.out_dir, self.nchan, self._products, self.event,
                               hold_bytes=int(cfg["output"]["hold_mb"] * 1e6),
                               on_open=self._scan_opened, guard=self.supervisor.guard)
        self.reader = BlockReader(self.source, fast, self.stop_event, self.supervisor.guard,
                                  self.counters, cfg["source"]["reconnect_max_s"], self.log,
                                  queue_blocks(self.block_s))
        self.row_index = 0
        self.average = RunningAverage()
        self.last_row: Row | None = None
        self.pending: list = []         # integrations waiting for the first measurement
        self._gave_up_waiting = False   # rows no longer wait for a first measurement
        self._scan_names: set = set()   # scan names used in this run
        self._last_block_end: float | None = None
        self._state_before_loss = State.OBSERVING

    @property
    def notifier(self) -> sd_notify.Notifier:
        return self.systemd.notifier

    def _blocks_for(self, seconds: float) -> int:
        """Blocks per integration of about ``seconds``: whole switching cycles, at least one."""
        cycle = self.source.schedule.blocks_per_cycle
        return cycle * max(1, math.ceil(seconds / (self.block_s * cycle)))

    def _emission_mask(self, phase: str, t_unix_s: float) -> np.ndarray:
        """bool[nchan]: channels of ``phase`` where HI of the current pointing may appear."""
        return emission_mask(self.grid, self.source.schedule.lo_of(phase), self.pointing,
                             self.location, t_unix_s)

    def event(self, severity: str, text: str) -> None:
        """An event the observer must see: logged now (and kept for the publisher)."""
        self.events.append((severity, text))
        del self.events[:-200]
        self.log(f"{severity}: {text}")
        self.live.publish("event", {"severity": severity, "text": text,
                                    "time_utc": schema.now_utc_iso(), "station": ""})

    def warn_once(self, key: str, severity: str, text: str) -> None:
        """An event said once per ``key`` in a run."""
        if key not in self._warned:
            self._warned.add(key)
            self.event(severity, text)

    # -- what the control commands and the live status see --------------------------------------
    def submit(self, cmd: str, args: dict, timeout_s: float = 5.0) -> dict:
        """Run a control command in the main loop and wait for its result (or CommandError)."""
        return self.control.submit(cmd, args, timeout_s)

    def status(self) -> dict:
        """The daemon's state, as the status message carries it (units in the names)."""
        return self.live.status_message()[1]

    def now(self) -> Time:
        """The time of the newest sample (the start before any)."""
        end = self._last_block_end
        return Time(end, format="unix", scale="utc") if end else self.t_start

    def set_pointing(self, pointing: Pointing) -> None:
        self.pointing = pointing
        self.source.set_pointing(pointing)

    def set_integration_s(self, seconds: float) -> float:
        """Integrate about ``seconds`` per row from now; returns the length in effect, s."""
        self.blocks_per_integration = self._blocks_for(seconds)
        return self.blocks_per_integration * self.block_s

    # -- rows ------------------------------------------------------------------------------------
    def _finish(self, integ: Integration, observed_s: float) -> None:
        """Hand a finished integration on: now, or after the first T_sys measurement."""
        self.result.rows += 1
        self.result.observed_s += observed_s
        if self.meter is not None and self.tsys.newest is None and not self._gave_up_waiting:
            self.pending.append(integ)
            return
        self._put_row(integ)

    def _put_row(self, integ: Integration) -> None:
        runner = self.runner if self.visit is not None else None
        row, log = self.rows.make(integ, self.pointing,
                                  runner.reached_at if runner is not None else None)
        self.store.put(row)
        for rec in log:
            self.store.put(rec)
        self.last_row = row
        if self.live.publisher is not None:
            unit = "K" if self.source.schedule.mode == "frequency" else "count"
            scan = self.scan_name or ""
            self.average.add(row, self.nchan)
            self.live.publish(*spectrum_message(row, self.nchan, "integration", scan,
                                                self.row_index, unit))
            self.live.publish(*spectrum_message(row, self.nchan, "average", scan,
                                                self.row_index, unit, self.average))
        self.row_index += 1

    def _flush_pending(self, give_up: bool = False) -> None:
        """Rows waiting for a first T_sys written now; ``give_up``: fully flagged, with none."""
        if give_up:
            if not self.pending:
                return
            self._gave_up_waiting = True
        for integ in self.pending:
            self._put_row(integ)
        self.pending.clear()

    def _on_measurement(self, meas: TsysMeasurement) -> None:
        self.store.put(TsysRecord.of(meas, Time(meas.t_unix_s, format="unix", scale="utc").isot))
        if meas.ok:
            self.tsys.newest = meas
            self._flush_pending()
        else:
            self.event("error", meas.message)
            self._flush_pending(give_up=True)

    def end_integration(self, why: str) -> None:
        """Close the integration being made: kept as a shorter row if it holds at least one
        whole switching cycle (its EXPOSURE says how long), else dropped and said so."""
        partial = self.integ_blocks
        self.integ_blocks = 0
        if partial >= self.source.schedule.blocks_per_cycle:
            self._finish(self.spectrometer.take(), partial * self.block_s)
        else:
            self.spectrometer.take()
            if partial:
                self.log(f"note: the unfinished integration ({partial * self.block_s:.1f} s) "
                         f"was dropped ({why}): shorter than one switching cycle")

    def restart_stream(self) -> None:
        """After a gap (pause, idle, new pointing): no spectrum or Tsys firing spans it."""
        self.spectrometer.restart()
        if self.meter is not None:
            self.meter.reset()

    # -- scans -----------------------------------------------------------------------------------
    def open_scan(self, t: Time) -> None:
        """Start a new scan file (named after its start time; -1, -2 ... if taken)."""
        self._flush_before_switch()
        base = name = "scan-" + t.strftime("%Y%m%dT%H%M%S")
        k = 0                 # the name the file will have, so a control reply can say it
        while name in self._scan_names or any(
                (self.out_dir / f"{name}{ext}").exists() for ext in (".fits", ".journal")):
            k += 1
            name = f"{base}-{k}"
        self._scan_names.add(name)
        self.scan_name = name
        self.average.reset()
        self.row_index = 0
        header = scan_header(
            self.cfg, self.source.schedule, self.source.kind, self.block_s, self.tsys_plan,
            self.switch.describe() if self.tsys_plan.kind == "noise_source" else "none",
            self.pointing)
        header.update(self._visit_cards)
        self.store.put(OpenScan(name, header))

    def close_scan(self) -> None:
        """End the scan file (rows still waiting for a first T_sys go into it first)."""
        self._flush_before_switch()
        self.store.put(CloseScan())

    def _flush_before_switch(self) -> None:
        """Rows still waiting for a first Tsys belong to the scan being closed: write them
        there now (fully flagged, as at the end of a run)."""
        if self.pending:
            self._flush_pending(give_up=True)
            self._gave_up_waiting = False

    def _scan_opened(self, name: str) -> None:
        """The writer opened the scan under ``name`` (with -1, -2 ... if the name was taken)."""
        if self.scan_name is not None:
            self.scan_name = name

    # -- plans (called in the main loop, by the plan runner through control.call) --------------
    def _runner_for(self, plan: Plan, exit_at_end: bool) -> PlanRunner:
        progress = None
        if plan.name:
            progress = PlanProgress.open(self.out_dir, plan)
            if progress.note:
                self.events.append(("info", progress.note))
                self.log(f"info: {progress.note}")
        return PlanRunner(self, plan, self.mount, limits_from_config(self.cfg), progress,
                          exit_at_end=exit_at_end)

    def _pointing_plan(self) -> Plan:
        """The configured pointing as a plan of one visit without a name (no progress kept)."""
        p = self.pointing
        seconds = self.duration_s if self.duration_s is not None else MAX_SECONDS
        return Plan(name="", targets=(Target(object=p.object, frame=p.frame, lon_deg=p.lon,
                                             lat_deg=p.lat, seconds=seconds,
                                             drift=p.frame == "azel", source="[pointing]"),))

    def load_plan(self, path: str) -> None:
        """The ``plan`` command: read the plan and run it (PlanError: one line)."""
        if self.runner is not None and not self.runner.finished.is_set():
            raise ValueError(f"plan: plan {self.runner.plan.name!r} is running: abort it first")
        plan = load_plan(path)
        check_plan_for_mount(plan, self.mount.driver, self.source.kind)
        if self.scan_name is not None:
            self.end_integration("a plan was loaded")
            self.close_scan()
            self.scan_name = None
        self.state = State.WAITING
        self.runner = self._runner_for(plan, exit_at_end=False)
        self.runner.start()

    def plan_wait(self, why: str, state: State = State.WAITING) -> None:
        """Between visits: no scan open, nothing integrated (``why``: for the log)."""
        if self.scan_name is not None and self.visit is None:
            self.end_integration(why)
            self.close_scan()
            self.scan_name = None
        if self.state != State.PAUSED:
            self.state = state

    def begin_visit(self, visit: Visit, plan: Plan, mount: Mount) -> None:
        """The dish is on the visit's target: a scan opens and the on-source time counts."""
        if self.scan_name is not None:
            self.end_integration("new visit")
            self.close_scan()
        t = visit.target
        self.pointing = visit.pointing
        if mount.driver == "none":
            self.source.set_pointing(visit.pointing)    # a fixed dish: the beam is the target
        visit.goal_blocks = max(1, round(t.seconds / self.block_s))
        cards: dict[str, Any] = {"OBJECT": t.object, "MOUNT": mount.driver,
                                 "PNTLON": float(t.lon_deg), "PNTLAT": float(t.lat_deg),
                                 "DRIFT": bool(t.drift)}
        if mount.driver == "rotator":
            cards["PNTTOL"] = float(mount.tolerance_deg)
        if plan.name:
            cards.update({"PLANNAME": plan.name, "PLANSTEP": visit.step,
                          "PLANSIZE": visit.steps, "PLANVIST": visit.entry.visit})
        self._visit_cards = cards
        self.visit = visit
        self.restart_stream()
        self.open_scan(self.now())
        visit.scan = self.scan_name
        self.state = State.OBSERVING
        self._next_firing_s = math.inf
        if self.source.can_fire_noise_source() and self.tsys_plan.kind == "noise_source":
            self.source.request_firing()     # a fresh T_sys on each target (common practice)
            if t.cal_interval_s is not None:
                self._next_firing_s = float(self.now().unix) + t.cal_interval_s

    def _count_visit(self, visit: Visit, block: Block) -> None:
        """One more on-source block; the visit ends at its on-source time."""
        visit.blocks += 1
        t_end = block.t0_unix_s + block.duration_s
        if t_end >= self._next_firing_s and visit.target.cal_interval_s is not None:
            self.source.request_firing()
            self._next_firing_s = t_end + visit.target.cal_interval_s
        if visit.blocks >= visit.goal_blocks:
            self.end_visit(visit, keep_partial=True, why="the visit's time is up")

    def end_visit(self, visit: Visit, keep_partial: bool, why: str) -> None:
        """Close the visit's scan: the integration in progress kept (a whole switching cycle)
        or dropped (``keep_partial`` False: the dish may have moved)."""
        if self.visit is not visit:
            visit.ended.set()
            return
        if keep_partial:
            self.end_integration(why)
        elif self.integ_blocks:
            self.spectrometer.take()
            self.log(f"note: the integration in progress ({self.integ_blocks * self.block_s:.1f}"
                     f" s) was dropped ({why}): the dish may not have been on target")
            self.integ_blocks = 0
        visit.scan = self.scan_name
        self.close_scan()
        self.scan_name = None
        self.visit = None
        self._visit_cards = {}
        self._next_firing_s = math.inf
        if self.state != State.STOPPING:
            self.state = State.WAITING
        visit.ended.set()

    def hold_visit(self, on: bool) -> None:
        """Stop counting while the observer points the dish again (on), or go on (off)."""
        if self.visit is None:
            return
        if on:
            self.end_integration("pointing again")
            self.state = State.WAITING
        else:
            self.restart_stream()
            self.state = State.OBSERVING

    def plan_ended(self, runner: PlanRunner) -> None:
        """The plan is over: the daemon idles (or stops, for a plan given at the start)."""
        if self.scan_name is not None and self.visit is None:
            self.close_scan()
            self.scan_name = None
        if self.state != State.STOPPING:
            self.state = State.IDLE

    def park_now(self) -> None:
        """The ``park`` command with no plan running: park in a thread of its own."""
        threading.Thread(target=self.supervisor.guard("park", self._park), name="park",
                         daemon=True).start()

    def _park(self) -> None:
        try:
            self.mount.park()
        except (MountError, MountCancelled) as exc:
            self.event("error", f"parking failed: {exc}")

    def _park_at_exit(self) -> None:
        """A rotator goes to its park position when the daemon stops (waited for up to
        ``_PARK_AT_EXIT_S``; it goes on moving by itself after that)."""
        if self.mount.driver != "rotator":
            self.mount.close()
            return
        parker = threading.Thread(target=self._park, name="park", daemon=True)
        parker.start()
        parker.join(_PARK_AT_EXIT_S)
        self.mount.close()

    # -- the run ---------------------------------------------------------------------------------
    def run(self) -> RunResult:
        """Acquire until the duration is reached, the source ends, or a stop signal."""
        result = self.result = RunResult()
        self._gave_up_waiting = False
        try:
            self.source.open()        # a source that cannot start leaves nothing behind
        except BaseException:
            self.switch.close()
            raise
        try:
            self.live.start()
        except BaseException:
            self.source.close()
            self.switch.close()
            raise
        result.recovered = archive.recover(self.out_dir, products=self._products,
                                           report=self.event)
        self.supervisor.install_excepthook()
        self.reader.start()
        self.store.start()
        if self.runner is None:
            self.open_scan(self.t_start)
        else:
            self.runner.start()
        max_blocks = None if self.duration_s is None else max(
            1, round(self.duration_s / self.block_s))
        self.heartbeat.beat()
        self.systemd.start()
        try:
            self._loop(max_blocks)
        finally:
            self._shut_down()
        return self._outcome()

    def _loop(self, max_blocks: int | None) -> None:
        """The data flow: block -> spectrometer (and Tsys meter) -> integration -> row."""
        counters, result = self.counters, self.result
        while not self.stop_event.is_set():
            self.heartbeat.beat()
            self.control.apply_pending()
            self.systemd.status()
            try:
                block = self.reader.q.get(timeout=0.2)
            except queue.Empty:
                continue
            if block is END:
                if counters["error"] is None and not self.stop_event.is_set():
                    self.end_integration("the source ended")   # replay
                return
            if isinstance(block, (SourceLost, SourceBack)):
                self._source_fault(block)
                continue
            counters["received"] += block.n_samples
            counters["lost"] += block.lost_before
            result.lost_samples += block.lost_before
            self._last_block_end = block.t0_unix_s + block.duration_s
            if block.clock_step_s:
                self._clock_stepped(block)
            if self.state != State.OBSERVING:
                continue
            s1, m = self.spectrometer.add(block)
            if self.meter is not None:
                meas = self.meter.add(block, s1, m)
                if meas is not None:
                    self._on_measurement(meas)
            self.integ_blocks += 1
            self.total_blocks += 1
            if self.integ_blocks >= self.blocks_per_integration:
                self.integ_blocks = 0
                self._finish(self.spectrometer.take(), self.blocks_per_integration * self.block_s)
            if self.visit is not None:
                self._count_visit(self.visit, block)
            if max_blocks is not None and self.total_blocks >= max_blocks:
                self.end_integration("planned end")
                return

    def _shut_down(self) -> None:
        """Keep what can be kept, then close everything (in this order)."""
        stopped_by_signal = self.stop_event.is_set() and self.supervisor.fatal is None
        self.stop_event.set()
        self.state = State.STOPPING
        if self.runner is not None:
            self.runner.stop()
        self.notifier.stopping("stopping: writing the scan")
        try:
            if self.integ_blocks:
                self.end_integration("stop signal" if stopped_by_signal
                                     else "stopped by a failure")
        finally:
            self._flush_pending(give_up=True)   # no measurement ever came: kept, fully flagged
            self.store.finish()
            self.systemd.stop()
            self._park_at_exit()
            self.reader.join(timeout=5)
            self.source.close()
            self.switch.close()
            self.live.stop()
            self.supervisor.remove_excepthook()

    def _outcome(self) -> RunResult:
        """The result, or the exception saying what went wrong."""
        result = self.result
        result.files, result.file_rows = self.store.files, self.store.file_rows
        result.lost_samples += self.counters["dropped"]
        unsaved = self.store.unsaved_text()
        if self.supervisor.fatal is not None:
            raise WorkerFailed(f"the {self.supervisor.fatal.worker} thread failed "
                               f"({self.supervisor.fatal.text})" + (f"; {unsaved}" if unsaved
                                                                    else ""))
        if unsaved:
            raise OSError(f"writing {self.out_dir}: {unsaved}")
        if self.counters["error"] is not None:
            raise SourceError(str(self.counters["error"]))
        return result

    # -- faults ----------------------------------------------------------------------------------
    def _source_fault(self, marker: SourceLost | SourceBack) -> None:
        """The reader lost the source (:class:`SourceLost`) or got it back (``SourceBack``)."""
        if isinstance(marker, SourceLost):
            self.event("error", f"source lost: {marker.why}; every finished integration is "
                       "saved, reconnecting")
            self._state_before_loss = self.state
            if self.state in (State.OBSERVING, State.PAUSED):
                self.end_integration("source lost")
                self.close_scan()
                self.scan_name = None
                self.state = State.RECONNECTING
        else:
            self.event("info", f"source back after {marker.outage_s:.0f} s: a new scan segment "
                       "begins")
            self.restart_stream()
            if self.state == State.RECONNECTING:
                self.state = self._state_before_loss
                self.open_scan(Time.now())

    def _clock_stepped(self, block: Block) -> None:
        """Record a step of the system clock; after a forward one no integration spans it."""
        step = block.clock_step_s
        t = Time(block.t0_unix_s, format="unix", scale="utc").isot
        if step > 0:
            text = (f"system clock stepped forward by {step:.1f} s at {t[:19]}: timestamps "
                    "follow it from here; the integration in progress ends at the step")
            self.end_integration("clock step")
            self.restart_stream()
        else:
            text = (f"system clock stepped back by {-step:.1f} s near {t[:19]}: timestamps keep "
                    f"counting, now {-step:.1f} s ahead of the system clock; check time sync")
        self.event("warning", text)
        if self.scan_name is not None:
            self.store.put(Note(t, text))

    def install_signal_handlers(self) -> None:
        def _stop(signum: int, _frame: FrameType | None) -> None:
            self.log(f"received signal {signum}: finishing")
            self.stop_event.set()
        signal.signal(signal.SIGTERM, _stop)
        signal.signal(signal.SIGINT, _stop)
