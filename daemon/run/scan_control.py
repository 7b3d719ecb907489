"""Control commands (pause, resume, stop, start, new_scan, point, set_integration, annotate,
calibrate; for plans: plan, skip, abort, park, pointed): submitted from the control socket's thread, applied by the main loop between
blocks (:meth:`ScanControl.apply_pending`), so that no command races the data flow.

A command refused (wrong state, pointing too low) answers with one line and changes nothing; a
command that fails for any other reason never stops acquisition.
"""

from __future__ import annotations

import queue
import threading
import time as _time
from collections.abc import Callable
from typing import TYPE_CHECKING, Any

from spinflip.daemon.config import ConfigError
from spinflip.daemon.live.schema import State
from spinflip.daemon.mount.base import AzEl
from spinflip.daemon.mount.manual import ManualMount
from spinflip.daemon.sky.pointing import Pointing
from spinflip.daemon.storage.items import Note

if TYPE_CHECKING:
    from spinflip.daemon.run.observation import Daemon
    from spinflip.daemon.run.plan_runner import PlanRunner


def as_words(args: dict) -> str:
    """Command arguments as ``key=value`` words, for the event log."""
    return " ".join(f"{k}={v}" for k, v in sorted(args.items()))


class ScanControl:
    """The commands of one run (``loop``: the daemon whose scans they control)."""

    def __init__(self, loop: Daemon):
        self.loop = loop
        self.commands: queue.Queue = queue.Queue()

    def submit(self, cmd: str, args: dict, timeout_s: float = 5.0) -> dict:
        """Run a control command in the main loop and wait for its result (or CommandError)."""
        from spinflip.daemon.live.control import CommandError
        if cmd == "status":
            return self.loop.status()
        box: dict[str, Any] = {"done": threading.Event()}
        self.commands.put((cmd, args, box))
        if not box["done"].wait(timeout_s):
            raise CommandError(f"{cmd}: the daemon did not get to it within {timeout_s:g} s")
        if "error" in box:
            raise CommandError(box["error"])
        return box["result"]

    def call(self, fn: Callable[[], Any], timeout_s: float = 30.0) -> Any:
        """Run ``fn`` in the main loop between blocks and wait for its result (from another
        thread, e.g. the plan runner). Returns None at once when the daemon is stopping (the
        main loop no longer applies anything); an exception of ``fn`` is raised here."""
        box: dict[str, Any] = {"done": threading.Event()}
        self.commands.put((fn, {}, box))
        deadline = _time.monotonic() + timeout_s
        while not box["done"].wait(0.1):
            if self.loop.stop_event.is_set() or _time.monotonic() > deadline:
                return None
        if "raised" in box:
            raise box["raised"]
        return box.get("result")

    def apply_pending(self) -> None:
        """Apply every command waiting (called by the main loop)."""
        loop = self.loop
        while True:
            try:
                cmd, args, box = self.commands.get_nowait()
            except queue.Empty:
                return
            if callable(cmd):                 # a call from another thread of the daemon
                try:
                    box["result"] = cmd()
                except Exception as exc:
                    box["raised"] = exc
                box["done"].set()
                continue
            try:
                box["result"] = self._apply(cmd, args)
                if cmd != "annotate":
                    loop.event("info", f"control: {cmd} {as_words(args)}".rstrip()
                               + f" -> {loop.state}, scan {loop.scan_name or 'none'}")
            except (ValueError, ConfigError) as exc:
                box["error"] = str(exc).splitlines()[0]
            except Exception as exc:  # a command must never stop acquisition
                box["error"] = f"{cmd} failed: {exc}"
            box["done"].set()

    def _apply(self, cmd: str, args: dict) -> dict:
        loop = self.loop
        state = loop.state
        runner = loop.runner if loop.runner is not None and not loop.runner.finished.is_set() \
            else None
        if cmd in ("start", "stop", "new_scan", "point") and runner is not None:
            what = f"plan {runner.plan.name!r}" if runner.progress is not None else \
                f"pointing.driver = '{loop.mount.driver}'"
            raise ValueError(f"{cmd}: {what} is running: skip or abort it first (spinflip ctl "
                             "abort), or load a plan (spinflip ctl plan path=FILE)")
        if cmd in ("skip", "abort", "park", "pointed", "plan"):
            return self._plan_command(cmd, args, runner)
        if cmd == "resume" and runner is not None and runner.phase == "parked":
            runner.resume()
            return {"state": str(loop.state), "scan": loop.scan_name}
        if cmd == "pause":
            if state != State.OBSERVING:
                raise ValueError(f"pause: the daemon is {state}, not observing")
            loop.end_integration("paused")
            loop.state = State.PAUSED
        elif cmd == "resume":
            if state != State.PAUSED:
                raise ValueError(f"resume: the daemon is {state}, not paused")
            loop.restart_stream()
            loop.state = State.OBSERVING
        elif cmd == "stop":
            if state not in (State.OBSERVING, State.PAUSED, State.RECONNECTING):
                raise ValueError(f"stop: the daemon is {state}; nothing to stop")
            if state != State.RECONNECTING:     # a lost source's scan is closed already
                loop.end_integration("stopped")
                loop.close_scan()
            loop.scan_name = None
            loop.state = State.IDLE
        elif cmd in ("start", "new_scan"):
            if cmd == "start" and state != State.IDLE:
                raise ValueError(f"start: the daemon is already {state} (new_scan starts "
                                 "another)")
            if cmd == "new_scan" and state == State.IDLE:
                raise ValueError("new_scan: the daemon is idle; use start")
            loop.end_integration("new scan")
            loop.restart_stream()
            loop.open_scan(loop.now())
            loop.state = State.OBSERVING
        elif cmd == "point":
            self._point(args)
        elif cmd == "set_integration":
            loop.end_integration("new integration length")
            return {"integration_s": loop.set_integration_s(float(args["seconds"]))}
        elif cmd == "annotate":
            if loop.scan_name is None:
                raise ValueError("annotate: no scan is open (start one first)")
            loop.store.put(Note(loop.now().isot, str(args["text"])))
        elif cmd == "calibrate":
            if loop.tsys_plan.kind != "noise_source" or not loop.source.can_fire_noise_source():
                raise ValueError(f"calibrate: calibration.tsys_from = "
                                 f"'{loop.cfg['calibration']['tsys_from']}' has no noise source "
                                 "to fire")
            loop.source.request_firing()
        else:
            raise ValueError(f"{cmd}: not a command this daemon knows")
        return {"state": str(loop.state), "scan": loop.scan_name}

    def _point(self, args: dict) -> None:
        loop = self.loop
        frame, lon, lat = args["frame"], float(args["lon_deg"]), float(args["lat_deg"])
        p = loop.cfg["pointing"]
        new = {"frame": frame, "lon": lon, "lat": lat, "object": args.get("object", ""),
               "min_elevation": p["min_elevation"]}
        t = loop.now()
        trial = Pointing({"pointing": new}, loop.location, t)
        el = trial.elevation_deg(t)
        if el < p["min_elevation"]:
            raise ValueError(f"point {trial.object}: elevation {el:.1f} deg is below "
                             f"pointing.min_elevation = {p['min_elevation']:g} deg")
        loop.end_integration("new pointing")
        loop.set_pointing(trial)
        loop.restart_stream()
        if loop.state != State.IDLE:
            loop.open_scan(t)

    def _plan_command(self, cmd: str, args: dict, runner: PlanRunner | None) -> dict:
        """plan, skip, abort, park, pointed."""
        loop = self.loop
        if cmd == "plan":
            loop.load_plan(str(args["path"]))
        elif cmd == "pointed":
            if not isinstance(loop.mount, ManualMount):
                raise ValueError(f"pointed: pointing.driver = '{loop.mount.driver}': only a "
                                 "dish pointed by hand (driver = 'manual') is confirmed")
            az, el = args.get("az_deg"), args.get("el_deg")
            if (az is None) != (el is None):
                raise ValueError("pointed: give both az_deg and el_deg, or neither (the dish "
                                 "is where it was asked to point)")
            loop.mount.confirm(None if az is None or el is None else AzEl(float(az), float(el)))
        elif runner is None:
            if cmd != "park":
                raise ValueError(f"{cmd}: no plan is running")
            loop.park_now()
        else:
            runner.command(cmd)
        return {"state": str(loop.state), "scan": loop.scan_name}
