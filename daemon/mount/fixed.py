"""The ``"none"`` pointing driver: a fixed dish; the sky drifts through the beam.

Nothing moves and nothing is asked: :meth:`FixedMount.acquire` takes the target's position as
the dish's at once, :meth:`FixedMount.track` returns what it is given (the runner observes
the configured position, which is where the dish points).
"""

from __future__ import annotations

import threading
from collections.abc import Callable

from spinflip.daemon.mount.base import AzEl, MountStatus
from spinflip.daemon.sky.beam import beamwidth_deg


class FixedMount:
    """A dish that does not move (see the module docstring)."""

    driver = "none"

    def __init__(self, cfg: dict) -> None:
        #: Half the beam FWHM, as for a hand-pointed dish (nothing is compared against it here).
        self.tolerance_deg = beamwidth_deg(cfg["site"]["dish_diameter_m"]) / 2.0
        self._lock = threading.Lock()
        self._state = "idle"
        self._pos: AzEl | None = None

    def refuse(self, want: AzEl) -> str | None:
        return None

    def acquire(self, where: Callable[[], AzEl], cancel: threading.Event) -> AzEl:
        pos = where()
        with self._lock:
            self._state, self._pos = "tracking", pos
        return pos

    def track(self, want: AzEl) -> AzEl:
        with self._lock:
            self._state, self._pos = "tracking", want
        return want

    def park(self) -> AzEl | None:
        with self._lock:
            self._state = "idle"
        return None

    def wait_until_answering(self, cancel: threading.Event) -> bool:
        return not cancel.is_set()

    def status(self) -> MountStatus:
        with self._lock:
            p = self._pos
            az, el = (None, None) if p is None else (p.az_deg, p.el_deg)
            return MountStatus(driver=self.driver, state=self._state, az_deg=az, el_deg=el,
                               target_az_deg=az, target_el_deg=el, detail="fixed dish")

    def close(self) -> None:
        pass
