"""Pointing drivers behind one interface, :class:`Mount`: what moves the dish (or asks someone to)
and says where it points.

Three kinds of station (``[pointing] driver``):

* ``"rotator"``: a motorised az/el mount behind the network protocol of the ham-radio rotator
  daemon ``rotctld`` (:mod:`spinflip.daemon.mount.rotator`);
* ``"manual"``: someone turns the dish by hand; the daemon asks and waits for the observer to
  confirm (:mod:`spinflip.daemon.mount.manual`);
* ``"none"``: a fixed dish; the sky drifts through the beam (:mod:`spinflip.daemon.mount.fixed`).

The plan runner (:mod:`spinflip.daemon.run.plan_runner`) calls, from its own thread:
:meth:`Mount.refuse` before a visit, :meth:`Mount.acquire` to bring the dish onto a target,
:meth:`Mount.track` about every ``poll_s`` while it observes, :meth:`Mount.park` at the end.
A failure is a :class:`MountError` with one line; the runner abandons the visit, parks when
it can, and goes on. :meth:`Mount.status` is read by the status thread at any time.

Angles are degrees; azimuth from north through east, elevation above the horizon (no
refraction: the rotator is commanded to the geometric position).
"""

from __future__ import annotations

import math
import threading
from collections.abc import Callable
from dataclasses import dataclass
from typing import Protocol, runtime_checkable


class MountError(RuntimeError):
    """The mount failed: no answer, a refusal, never arrived, outside its limits. One line."""


class PointAgain(MountError):
    """A dish that does not track (pointed by hand) is too far from its moving target: the
    observer must point it again. Not a fault: the visit goes on after."""


class MountCancelled(Exception):
    """The wait was cancelled (skip, abort, park, stop): not a fault."""


@dataclass(frozen=True)
class AzEl:
    """A horizontal position, deg."""

    az_deg: float
    el_deg: float


def separation_deg(a: AzEl, b: AzEl) -> float:
    """Great-circle angle between two horizontal positions, deg (the Vincenty form of the
    spherical law, well-conditioned at all angles; Vincenty 1975, Survey Review 23, 88)."""
    az1, el1 = math.radians(a.az_deg), math.radians(a.el_deg)
    az2, el2 = math.radians(b.az_deg), math.radians(b.el_deg)
    d = az2 - az1
    num = math.hypot(math.cos(el2) * math.sin(d),
                     math.cos(el1) * math.sin(el2) - math.sin(el1) * math.cos(el2) * math.cos(d))
    den = math.sin(el1) * math.sin(el2) + math.cos(el1) * math.cos(el2) * math.cos(d)
    return math.degrees(math.atan2(num, den))


@dataclass(frozen=True)
class MountStatus:
    """The status message's ``mount`` object (see :mod:`spinflip.daemon.live.schema`)."""

    driver: str                           # "none" | "manual" | "rotator"
    state: str                            # idle | slewing | tracking | waiting | parking | parked | fault
    az_deg: float | None = None           # where the dish is (reported / confirmed)
    el_deg: float | None = None
    target_az_deg: float | None = None    # where it should be
    target_el_deg: float | None = None
    detail: str = ""                      # endpoint, prompt or fault, one line

    @property
    def error_deg(self) -> float | None:
        if None in (self.az_deg, self.el_deg, self.target_az_deg, self.target_el_deg):
            return None
        return separation_deg(AzEl(self.az_deg, self.el_deg),              # type: ignore[arg-type]
                              AzEl(self.target_az_deg, self.target_el_deg))  # type: ignore[arg-type]

    def as_json(self) -> dict:
        return {"driver": self.driver, "state": self.state, "az_deg": self.az_deg,
                "el_deg": self.el_deg, "target_az_deg": self.target_az_deg,
                "target_el_deg": self.target_el_deg, "error_deg": self.error_deg,
                "detail": self.detail}


@runtime_checkable
class Mount(Protocol):
    """What the plan runner asks of a pointing driver."""

    driver: str                 # "none" | "manual" | "rotator"
    tolerance_deg: float        # on target when the reached position is this close

    def refuse(self, want: AzEl) -> str | None:
        """Why the mount cannot go to ``want`` (outside its limits), or None."""
        ...

    def acquire(self, where: Callable[[], AzEl], cancel: threading.Event) -> AzEl:
        """Bring the dish onto the target, whose position now is ``where()`` (it moves with the
        sky), and return the position reached, within ``tolerance_deg`` of ``where()``.

        Raises MountError (no answer, timeout, refused) or MountCancelled (``cancel`` set).
        """
        ...

    def track(self, want: AzEl) -> AzEl:
        """One tracking step while observing: command again when ``want`` has moved more than
        the tracking step since the last command; return the position the dish reports.

        Raises MountError when the mount does not answer or ends farther than
        ``tolerance_deg`` from ``want``.
        """
        ...

    def park(self) -> AzEl | None:
        """Send the dish to its park position (waits until there, or a MountError); the
        position reached, or None when the driver cannot say."""
        ...

    def wait_until_answering(self, cancel: threading.Event) -> bool:
        """After a fault: block until the mount answers again (True) or ``cancel`` is set."""
        ...

    def status(self) -> MountStatus:
        """Where the dish is and what the driver is doing (any thread)."""
        ...

    def close(self) -> None: ...
