"""The ``"rotator"`` pointing driver: a motorised az/el mount behind ``rotctld`` ([rotator]).

Acquiring a target: command it, read the position every ``poll_s``, command again when the
target has moved more than the tracking step (:func:`~spinflip.daemon.mount.beam.tracking_step_deg`)
since the last command, and return when the reported position is within ``tolerance_deg`` of
the target; ``timeout_s`` without arriving is a fault, a cancel stops the rotator.

Azimuth wrap: a rotator's azimuth range may be wider than a turn (e.g. -180..450) or narrower
(a mount with a cable stop). The commanded azimuth is the equivalent one (``az + 360 k``)
inside ``rotator.az_range`` nearest the rotator's present azimuth, so it never swings the long
way round when a short way exists.
"""

from __future__ import annotations

import math
import threading
import time
from collections.abc import Callable

from spinflip.daemon.mount.base import AzEl, MountCancelled, MountError, MountStatus, separation_deg
from spinflip.daemon.mount.beam import tracking_step_deg
from spinflip.daemon.mount.rotctld import RotctldClient


def command_az(az_deg: float, current_az_deg: float | None, lo: float, hi: float) -> float | None:
    """The azimuth to command for ``az_deg``: of ``az_deg + 360 k`` inside ``[lo, hi]``, the
    one nearest ``current_az_deg`` (the lowest when it is not known); None when none is inside.
    """
    base = az_deg % 360.0
    k0 = math.floor((lo - base) / 360.0)
    inside = [base + 360.0 * k for k in range(k0, k0 + 4) if lo <= base + 360.0 * k <= hi]
    if not inside:
        return None
    if current_az_deg is None:
        return inside[0]
    return min(inside, key=lambda a: abs(a - current_az_deg))


def _pair(x: list[float]) -> str:
    return f"[{x[0]:g}, {x[1]:g}]"


class RotatorMount:
    """A rotator behind ``rotctld`` at ``rotator.endpoint`` (see the module docstring).

    Parameters
    ----------
    cfg : dict
        The configuration (``[rotator]``, ``site.dish_diameter_m``).
    client : RotctldClient, optional
        The protocol client (the tests pass one that records the commands).
    """

    driver = "rotator"

    def __init__(self, cfg: dict, client: RotctldClient | None = None) -> None:
        rot = cfg["rotator"]
        self.endpoint: str = rot["endpoint"]
        self.tolerance_deg = float(rot["tolerance_deg"])
        self.timeout_s = float(rot["timeout_s"])
        self.poll_s = float(rot["poll_s"])
        self.az_range: list[float] = list(rot["az_range"])
        self.el_range: list[float] = list(rot["el_range"])
        self.park_position = AzEl(*rot["park"])
        self.step_deg = tracking_step_deg(cfg)
        self.client = client or RotctldClient(self.endpoint, rot["answer_s"])
        self._lock = threading.Lock()              # guards the status fields below
        self._state = "idle"
        self._pos: AzEl | None = None
        self._target: AzEl | None = None
        self._detail = self.endpoint
        self._commanded: AzEl | None = None        # the sky position last commanded
        self._closing = threading.Event()

    # -- the Mount interface -----------------------------------------------------------------
    def refuse(self, want: AzEl) -> str | None:
        lo, hi = self.el_range
        if not lo <= want.el_deg <= hi:
            return (f"el {want.el_deg:.1f} deg is outside the rotator's limits "
                    f"(rotator.el_range = {_pair(self.el_range)})")
        if command_az(want.az_deg, None, *self.az_range) is None:
            return (f"az {want.az_deg % 360.0:.1f} deg is outside the rotator's limits "
                    f"(rotator.az_range = {_pair(self.az_range)})")
        return None

    def acquire(self, where: Callable[[], AzEl], cancel: threading.Event) -> AzEl:
        want = where()
        reason = self.refuse(want)
        if reason is not None:
            raise MountError(f"rotator at {self.endpoint}: {reason}")
        self._set(state="slewing", target=want)
        pos = self._read()
        self._command(want, pos)
        deadline = time.monotonic() + self.timeout_s
        while True:
            if cancel.is_set() or self._closing.is_set():
                self._halt("idle")
                raise MountCancelled("acquire cancelled: the rotator was stopped")
            pos = self._read()
            want = where()
            self._set(target=want)
            if separation_deg(pos, want) <= self.tolerance_deg:
                self._set(state="tracking")
                return pos
            if time.monotonic() > deadline:
                line = (f"rotator at {self.endpoint}: never arrived within {self.timeout_s:g} s"
                        f" (rotator.timeout_s): at az {pos.az_deg:.1f} el {pos.el_deg:.1f}, "
                        f"{separation_deg(pos, want):.1f} deg from the target az "
                        f"{want.az_deg:.1f} el {want.el_deg:.1f}; stopped")
                self._halt("fault", line)
                raise MountError(line)
            assert self._commanded is not None
            if separation_deg(want, self._commanded) > self.step_deg:
                self._command(want, pos)
            cancel.wait(self.poll_s)

    def track(self, want: AzEl) -> AzEl:
        self._set(target=want)
        pos = self._read()
        if self._commanded is None or separation_deg(want, self._commanded) > self.step_deg:
            self._command(want, pos)
        off = separation_deg(pos, want)
        if off > self.tolerance_deg:
            line = (f"rotator at {self.endpoint}: the dish is {off:.1f} deg from the target "
                    f"(tolerance {self.tolerance_deg:g} deg): at az {pos.az_deg:.1f} el "
                    f"{pos.el_deg:.1f}, target az {want.az_deg:.1f} el {want.el_deg:.1f}")
            self._set(state="fault", detail=line)
            raise MountError(line)
        self._set(state="tracking", detail=self.endpoint)
        return pos

    def park(self) -> AzEl | None:
        """Command the park position and wait until there (``timeout_s``); MountCancelled when
        the mount is closed meanwhile."""
        want = self.park_position
        self._set(state="parking", target=want)
        pos = self._read()
        self._command(want, pos)
        deadline = time.monotonic() + self.timeout_s
        while True:
            pos = self._read()
            if separation_deg(pos, want) <= self.tolerance_deg:
                self._set(state="parked")
                return pos
            if time.monotonic() > deadline:
                line = (f"rotator at {self.endpoint}: never arrived at the park position az "
                        f"{want.az_deg:g} el {want.el_deg:g} within {self.timeout_s:g} s "
                        f"(rotator.timeout_s): at az {pos.az_deg:.1f} el {pos.el_deg:.1f}; stopped")
                self._halt("fault", line)
                raise MountError(line)
            if self._closing.wait(self.poll_s):
                raise MountCancelled("parking interrupted: the mount was closed")

    def wait_until_answering(self, cancel: threading.Event) -> bool:
        while not cancel.is_set() and not self._closing.is_set():
            try:
                pos = self.client.get_position()
            except MountError:
                cancel.wait(self.poll_s)
                continue
            self._set(state="idle", pos=pos, detail=self.endpoint)
            self._commanded = None
            return True
        return False

    def status(self) -> MountStatus:
        with self._lock:
            pos, target = self._pos, self._target
            return MountStatus(
                driver=self.driver, state=self._state,
                az_deg=None if pos is None else pos.az_deg,
                el_deg=None if pos is None else pos.el_deg,
                target_az_deg=None if target is None else target.az_deg,
                target_el_deg=None if target is None else target.el_deg,
                detail=self._detail)

    def close(self) -> None:
        self._closing.set()
        self.client.close()

    # -- helpers -----------------------------------------------------------------------------
    def _set(self, state: str | None = None, pos: AzEl | None = None,
             target: AzEl | None = None, detail: str | None = None) -> None:
        with self._lock:
            if state is not None:
                self._state = state
            if pos is not None:
                self._pos = pos
            if target is not None:
                self._target = target
            if detail is not None:
                self._detail = detail

    def _fault(self, exc: MountError) -> MountError:
        self._set(state="fault", detail=str(exc))
        return exc

    def _read(self) -> AzEl:
        try:
            pos = self.client.get_position()
        except MountError as exc:
            raise self._fault(exc) from None
        self._set(pos=pos)
        return pos

    def _command(self, want: AzEl, pos: AzEl) -> None:
        """Command ``want`` (its azimuth wrapped into the range, nearest ``pos``)."""
        reason = self.refuse(want)
        if reason is not None:                    # the target, not the mount: no fault
            raise MountError(f"rotator at {self.endpoint}: {reason}")
        az = command_az(want.az_deg, pos.az_deg, *self.az_range)
        assert az is not None                     # refuse() said it is inside
        try:
            self.client.set_position(az, want.el_deg)
        except MountError as exc:
            raise self._fault(exc) from None
        self._commanded = want
        self._set(detail=self.endpoint)

    def _halt(self, state: str, detail: str | None = None) -> None:
        """Stop the rotator (best effort: a failure to stop is said in the detail)."""
        try:
            self.client.stop()
        except MountError as exc:
            detail = f"{detail + '; ' if detail else ''}stop failed: {exc}"
            state = "fault"
        self._commanded = None
        self._set(state=state, detail=detail if detail is not None else self.endpoint)
