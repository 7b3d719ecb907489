"""The daemon on the live socket: the endpoints and keys checked at start-up, the publisher and
control server started and stopped, and the status and progress messages published every
second by a thread of their own (:mod:`spinflip.daemon.live.schema`)."""

from __future__ import annotations

import shutil
import threading
import time as _time
from typing import TYPE_CHECKING, Any

import numpy as np
import zmq

from spinflip import __version__
from spinflip.daemon.calibration.kelvin import fold_covered
from spinflip.daemon.config import ConfigError
from spinflip.daemon.live import schema
from spinflip.daemon.live.publisher import Publisher, PublishError

if TYPE_CHECKING:
    from spinflip.daemon.run.observation import Daemon


class LiveStatus:
    """Publishing for one run (``loop``: the daemon it reports on)."""

    def __init__(self, loop: Daemon, pub_cfg: dict):
        self.loop = loop
        self.cfg = pub_cfg
        self.publisher: Publisher | None = None
        self.control: Any = None            # ControlServer, once started
        self.security: Any = None           # ServerSecurity, when keys are configured
        self.insecure: str | None = None    # the warning of an endpoint left open
        self._stop = threading.Event()
        self._thread: threading.Thread | None = None

    @property
    def enabled(self) -> bool:
        return bool(self.cfg["data"] or self.cfg["control"])

    def check(self) -> None:
        """Check the endpoints and keys at start-up (ConfigError, exit 2, when refused)."""
        from spinflip.daemon.live.keys import KeysError, ServerSecurity, check_bind
        pub = self.cfg
        if not self.enabled:
            return
        try:
            self.security = ServerSecurity.from_config(pub)
            for key in ("data", "control"):
                if pub[key]:
                    warning = check_bind(pub[key], self.security, pub["allow_insecure"],
                                         key=f"publish.{key}")
                    self.insecure = warning or self.insecure
        except KeysError as exc:
            raise ConfigError(str(exc)) from None

    def publish(self, topic: str, header: dict, arrays: dict | None = None) -> None:
        """Publish a message when a publisher runs (else nothing)."""
        if self.publisher is not None:
            self.publisher.publish(topic, header, arrays or {})

    def start(self) -> None:
        """Bind the endpoints and start the status thread (ConfigError when refused)."""
        from spinflip.daemon.live.control import ControlServer
        pub, loop = self.cfg, self.loop
        if not self.enabled:
            return
        if self.security is not None:
            self.security.start(zmq.Context.instance())
        try:
            if pub["data"]:
                self.publisher = Publisher(pub["data"], self.security,
                                           guard=loop.supervisor.guard)
                self.publisher.start()
            if pub["control"]:
                self.control = ControlServer(pub["control"], loop.submit, self.security,
                                             guard=loop.supervisor.guard)
                self.control.start()
        except (PublishError, OSError, RuntimeError) as exc:
            self.stop()
            raise ConfigError(str(exc).splitlines()[0]) from None
        if self.insecure:
            loop.event("warning", self.insecure)
        self._thread = threading.Thread(
            target=loop.supervisor.guard("status", self._status_loop), name="status",
            daemon=True)
        self._thread.start()

    def stop(self) -> None:
        """The last status message, then everything closed."""
        if self._thread is not None:
            self._stop.set()
            self._thread.join(timeout=2)
        if self.publisher is not None:
            try:
                self.publisher.publish(*self.status_message())
            except Exception:
                pass
            self.publisher.stop()
        if self.control is not None:
            self.control.stop()
        if self.security is not None:
            self.security.stop()

    def _status_loop(self) -> None:
        """Status and progress every second (a failure is the supervisor's: an event, then
        the loop runs again)."""
        while not self._stop.wait(1.0):
            if self.publisher is not None:
                self.publisher.publish(*self.status_message())
                self.publisher.publish(*self.progress_message())

    def status_message(self) -> tuple[str, dict, dict]:
        """(topic, header, arrays) of the status message."""
        loop = self.loop
        sch, src = loop.source.schedule, loop.cfg["source"]
        tsys = loop.tsys.current_k()
        try:
            free = shutil.disk_usage(loop.out_dir).free
        except OSError:
            free = -1
        store = loop.store
        header = {
            "state": str(loop.state), "source": loop.source.kind, "lo_hz": sch.sig_lo_hz,
            "gain_db": src["gain"], "sample_rate_hz": src["sample_rate"],
            "tsys_k": float(tsys) if tsys is not None and np.isfinite(tsys) else None,
            "tsys_source": loop.tsys_plan.text,
            "samples_received": int(loop.counters["received"]),
            "samples_lost": int(loop.counters["lost"] + loop.counters["dropped"]),
            "queue_depth": loop.reader.depth(),
            "disk_free_bytes": int(free),
            "writing": store.state,
            "held_integrations": store.held_rows,
            "dropped_integrations": store.dropped_rows + store.failed_rows,
            "uptime_s": _time.monotonic() - loop.started_mono, "version": __version__,
            "scan": loop.scan_name,
            "pointing": loop.pointing.as_status(),
            "mount": loop.mount.status().as_json(),
            "drops": dict(self.publisher.drops) if self.publisher is not None else {},
            "worker_failures": loop.supervisor.counts(),
            "rfi": dict(loop.interference.totals), "time_utc": schema.now_utc_iso(),
            "station": "",
        }
        # the newest integration: interference apart from the channels the fold does not cover
        last = loop.last_row
        rfi = header["rfi"]
        rfi["flagged_rfi_fraction"] = float(last.rfi_fraction) if last is not None else None
        rfi["uncovered_fraction"] = float(last.uncovered_fraction) if last is not None else None
        rfi["uncovered_hz"] = None
        if last is not None and last.folded:
            k = np.flatnonzero(~fold_covered(loop.grid.nchan, sch.shift_channels))
            if k.size:
                f = loop.grid.sky_hz(sch.sig_lo_hz, k)
                rfi["uncovered_hz"] = [float(f.min()), float(f.max())]
        return "status", header, {}

    def progress_message(self) -> tuple[str, dict, dict]:
        """(topic, header, arrays) of the progress message."""
        loop = self.loop
        integ_total = loop.blocks_per_integration * loop.block_s
        elapsed = loop.integ_blocks * loop.block_s
        scan_elapsed = loop.total_blocks * loop.block_s
        total = loop.duration_s
        eta = None if total is None else max(0.0, total - scan_elapsed)
        visit, runner = loop.visit, loop.runner
        if visit is not None:            # a plan's visit: the scan is the visit
            scan_elapsed = visit.blocks * loop.block_s
            total = visit.target.seconds
            eta = max(0.0, total - scan_elapsed)
        plan = runner.as_progress() if runner is not None and runner.progress is not None \
            else None
        header = {"scan": loop.scan_name, "integration": int(loop.row_index),
                  "integration_elapsed_s": elapsed, "integration_total_s": integ_total,
                  "scan_elapsed_s": scan_elapsed, "scan_total_s": total, "eta_s": eta,
                  "plan": plan, "time_utc": schema.now_utc_iso(), "station": ""}
        return "progress", header, {}
