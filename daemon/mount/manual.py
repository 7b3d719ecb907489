"""The ``"manual"`` pointing driver: someone turns the dish by hand.

:meth:`ManualMount.acquire` asks (``prompt``: the runner publishes the text as an event) and
waits until the observer confirms from another thread (:meth:`ManualMount.confirm`, which the
control command calls) with the asked position or where the dish really points. While
observing, the dish stays where it was pointed and the sky moves on: :meth:`ManualMount.track`
raises :class:`~spinflip.daemon.mount.base.PointAgain` once the target is more than half the
beam FWHM away, so the runner asks again.
"""

from __future__ import annotations

import math
import threading
from collections.abc import Callable

from spinflip.daemon.mount.base import (
    AzEl,
    MountCancelled,
    MountError,
    MountStatus,
    PointAgain,
    separation_deg,
)
from spinflip.daemon.sky.beam import beamwidth_deg

#: How often a waiting acquire looks at its cancel event, s.
CANCEL_POLL_S = 0.05


def pointing_prompt(want: AzEl) -> str:
    """What the observer is asked to do for ``want``."""
    return (f"point the dish at az {want.az_deg % 360.0:.1f} el {want.el_deg:.1f} deg, then "
            "confirm: spinflip ctl pointed (or az_deg=... el_deg=... where it really points), "
            "or p in spinflip watch")


class ManualMount:
    """A hand-pointed dish (see the module docstring).

    Parameters
    ----------
    cfg : dict
        The configuration (``site.dish_diameter_m`` for the beam).
    prompt : callable
        Called with one line of text asking the observer to do something.
    """

    driver = "manual"

    def __init__(self, cfg: dict, prompt: Callable[[str], None]) -> None:
        self.prompt = prompt
        self.beam_fwhm_deg = beamwidth_deg(cfg["site"]["dish_diameter_m"])
        #: The target may drift this far from where the dish was pointed: half the beam FWHM.
        self.tolerance_deg = self.beam_fwhm_deg / 2.0
        self._lock = threading.Lock()
        self._confirmed = threading.Event()
        self._state = "idle"
        self._pointed: AzEl | None = None          # where the dish points (confirmed)
        self._asked: AzEl | None = None
        self._target: AzEl | None = None
        self._detail = ""

    def refuse(self, want: AzEl) -> str | None:
        if not 0.0 <= want.el_deg <= 90.0:
            return f"el {want.el_deg:.1f} deg is outside 0..90 deg: a dish cannot point there"
        return None

    def acquire(self, where: Callable[[], AzEl], cancel: threading.Event) -> AzEl:
        want = where()
        reason = self.refuse(want)
        if reason is not None:
            raise MountError(f"manual pointing: {reason}")
        text = pointing_prompt(want)
        with self._lock:
            self._confirmed.clear()
            self._state, self._asked, self._target, self._detail = "waiting", want, want, text
            self._pointed = None
        self.prompt(text)
        while not self._confirmed.wait(CANCEL_POLL_S):
            if cancel.is_set():
                with self._lock:
                    if not self._confirmed.is_set():
                        self._state, self._asked, self._detail = "idle", None, ""
                        raise MountCancelled("waiting for the dish to be pointed: cancelled")
                break                                   # confirmed just as it was cancelled
        with self._lock:
            assert self._pointed is not None
            return self._pointed

    def confirm(self, reached: AzEl | None = None) -> AzEl:
        """The observer says the dish points at the asked position (``reached`` None) or at
        ``reached``; returns the position taken.

        Raises
        ------
        ValueError
            Nothing is waiting for a confirmation, or ``reached`` is not a position (one line).
        """
        if reached is not None:
            if not (math.isfinite(reached.az_deg) and math.isfinite(reached.el_deg)
                    and 0.0 <= reached.el_deg <= 90.0):
                raise ValueError(f"pointed: az_deg = {reached.az_deg!r}, el_deg = "
                                 f"{reached.el_deg!r}: expected numbers, el from 0 to 90")
            reached = AzEl(reached.az_deg % 360.0, reached.el_deg)
        with self._lock:
            if self._state != "waiting" or self._asked is None:
                raise ValueError("pointed: the daemon is not waiting for the dish to be pointed")
            self._pointed = reached or self._asked
            self._state, self._asked = "tracking", None
            self._detail = (f"pointed by hand at az {self._pointed.az_deg:.1f} "
                            f"el {self._pointed.el_deg:.1f}")
            self._confirmed.set()
            return self._pointed

    def track(self, want: AzEl) -> AzEl:
        with self._lock:
            self._target = want
            pointed = self._pointed
        if pointed is None:
            raise PointAgain("manual pointing: the dish has not been pointed yet: point it")
        off = separation_deg(pointed, want)
        if off > self.tolerance_deg:
            line = (f"manual pointing: the target has moved {off:.1f} deg from where the dish "
                    f"was pointed (more than half the beam, {self.tolerance_deg:.1f} deg): "
                    "point again")
            with self._lock:
                self._detail = line               # not a fault: the runner asks again
            raise PointAgain(line)
        return pointed

    def park(self) -> AzEl | None:
        """Ask the observer to park the dish; nothing to wait for."""
        text = "observing is over: park the dish (no confirmation needed)"
        with self._lock:
            self._state, self._target, self._pointed, self._asked = "parked", None, None, None
            self._detail = text
        self.prompt(text)
        return None

    def wait_until_answering(self, cancel: threading.Event) -> bool:
        """An observer always 'answers' (by confirming the next prompt)."""
        return not cancel.is_set()

    def status(self) -> MountStatus:
        with self._lock:
            p, t = self._pointed, self._target
            return MountStatus(
                driver=self.driver, state=self._state,
                az_deg=None if p is None else p.az_deg, el_deg=None if p is None else p.el_deg,
                target_az_deg=None if t is None else t.az_deg,
                target_el_deg=None if t is None else t.el_deg, detail=self._detail)

    def close(self) -> None:
        pass
