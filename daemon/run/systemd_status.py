"""The daemon under systemd (``Type=notify``): READY=1 once observing, the watchdog pinger
while the main loop is alive, and a STATUS= line for ``systemctl status`` every few seconds
(:mod:`spinflip.daemon.run.sd_notify`)."""

from __future__ import annotations

import time as _time
from typing import TYPE_CHECKING

from spinflip.daemon.run import sd_notify

if TYPE_CHECKING:
    from spinflip.daemon.run.observation import Daemon

_STATUS_EVERY_S = 5.0


class SystemdStatus:
    """systemd's view of one run (``loop``: the daemon)."""

    def __init__(self, loop: Daemon, notifier: sd_notify.Notifier, heartbeat: sd_notify.Heartbeat):
        self.loop = loop
        self.notifier = notifier
        self.heartbeat = heartbeat
        self.pinger: sd_notify.WatchdogPinger | None = None
        self._status_at = _time.monotonic()

    def start(self) -> None:
        """READY=1 (and the watchdog pinger), when run by systemd."""
        n, loop = self.notifier, self.loop
        self._status_at = _time.monotonic()
        if not n.enabled:
            return
        n.ready(f"observing {loop.pointing.object}")
        if n.watchdog_interval_s is None:
            return
        self.pinger = sd_notify.WatchdogPinger(n, alive=self.heartbeat.alive, log=loop.log,
                                               guard=loop.supervisor.guard)
        self.pinger.start()

    def status(self) -> None:
        """A STATUS= line every few seconds."""
        loop = self.loop
        if not self.notifier.enabled or _time.monotonic() - self._status_at < _STATUS_EVERY_S:
            return
        self._status_at = _time.monotonic()
        tsys = loop.tsys.newest.tsys_k if loop.tsys.newest is not None else float("nan")
        lost = loop.counters["lost"] + loop.counters["dropped"]
        self.notifier.status(f"{loop.state}, scan {loop.scan_name or 'none'}: "
                             f"{loop.row_index} integrations, Tsys {tsys:.1f} K, "
                             f"{lost} samples lost, writing {loop.store.state}")

    def stop(self) -> None:
        """The pinger stopped and the notify socket closed."""
        if self.pinger is not None:
            self.pinger.stop()
        self.notifier.close()
