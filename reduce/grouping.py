"""Scans grouped by target: scans whose mean positions lie within a fraction of the beam.

Rule (greedy, in the order the scans come, which :func:`spinflip.reduce.scans.find_scan_files`
makes the order of their paths): each scan joins the group whose *anchor* (the mean position
of the group's first scan) is nearest to its own mean position, if that angular separation is
at most the tolerance; otherwise it starts a new group with itself as anchor. An anchor never
moves, so the result does not depend on how many scans a group already has, and a slow drift
of pointings cannot chain a whole strip of the sky into one target.

Tolerance: ``tolerance_deg`` when given, else ``fraction`` (default 0.25) times the
half-power beam width of the scan being placed, from its header's DISHDIAM
(:func:`spinflip.daemon.sky.beam.beamwidth_deg`, at its rest frequency if known): 1.2 deg for a
3 m dish at 21 cm. A file without DISHDIAM (written before the card existed) uses
:data:`FALLBACK_TOLERANCE_DEG` = 1 deg. A quarter of the beam keeps the stacked profile that
of one direction: pointings that far apart see the same gas within the beam's own smoothing.

The OBJECT of a group is the most common OBJECT of its scans (the first seen on a tie).

Separations are great-circle angles (haversine form, well conditioned at small angles).
"""

from __future__ import annotations

import math
from collections import Counter
from collections.abc import Iterable, Sequence
from typing import Protocol, TypeVar

from spinflip.daemon.sky.beam import beamwidth_deg
from spinflip.reduce.scans import mean_position_deg

#: Fraction of the beam within which two scans are one target.
DEFAULT_BEAM_FRACTION = 0.25
#: Tolerance when a scan's header has no DISHDIAM, deg.
FALLBACK_TOLERANCE_DEG = 1.0


class Positioned(Protocol):
    """What grouping needs of a scan (a ScanRows or a ScanSummary)."""

    @property
    def header(self) -> dict: ...

    @property
    def position_deg(self) -> tuple[float, float]: ...

    @property
    def object(self) -> str: ...


T = TypeVar("T", bound=Positioned)


def separation_deg(l1: float, b1: float, l2: float, b2: float) -> float:
    """Great-circle angle between (l1, b1) and (l2, b2), deg (haversine formula)."""
    p1, p2 = math.radians(b1), math.radians(b2)
    dl = math.radians(l2 - l1)
    h = math.sin((p2 - p1) / 2) ** 2 + math.cos(p1) * math.cos(p2) * math.sin(dl / 2) ** 2
    return math.degrees(2 * math.asin(min(1.0, math.sqrt(h))))


def tolerance_for(header: dict, fraction: float = DEFAULT_BEAM_FRACTION) -> float:
    """``fraction`` x HPBW from the header's DISHDIAM (m) at RESTFREQ if present, deg;
    :data:`FALLBACK_TOLERANCE_DEG` without a usable DISHDIAM."""
    try:
        dish_m = float(header["DISHDIAM"])
    except (KeyError, TypeError, ValueError):
        return FALLBACK_TOLERANCE_DEG
    if not (math.isfinite(dish_m) and dish_m > 0):
        return FALLBACK_TOLERANCE_DEG
    rest = header.get("RESTFREQ")
    if isinstance(rest, (int, float)) and math.isfinite(rest) and rest > 0:
        return fraction * beamwidth_deg(dish_m, float(rest))
    return fraction * beamwidth_deg(dish_m)


def group_by_target(scans: Iterable[T], *, tolerance_deg: float | None = None,
                    fraction: float = DEFAULT_BEAM_FRACTION) -> list[list[T]]:
    """Group scans (ScanRows or ScanSummary) by target, greedily in the order given.

    Parameters
    ----------
    scans : iterable of ScanRows or ScanSummary
        Anything with ``header``, ``position_deg`` (mean l, b in deg) and ``object``.
    tolerance_deg : float or None
        Largest separation from a group's anchor, deg; None: ``fraction`` x the beam from each
        scan's DISHDIAM (module notes).
    fraction : float
        Fraction of the half-power beam width when ``tolerance_deg`` is None; > 0.

    Returns
    -------
    list of lists
        The groups, in the order of their first scans; each keeps the order of its scans.
    """
    if tolerance_deg is not None and not (math.isfinite(tolerance_deg) and tolerance_deg >= 0):
        raise ValueError(f"tolerance_deg must be a number >= 0; got {tolerance_deg!r}")
    if not (math.isfinite(fraction) and fraction > 0):
        raise ValueError(f"fraction must be a number > 0; got {fraction!r}")
    groups: list[list[T]] = []
    anchors: list[tuple[float, float]] = []
    for scan in scans:
        lon, lat = scan.position_deg
        tol = tolerance_deg if tolerance_deg is not None else tolerance_for(scan.header, fraction)
        best, best_sep = -1, math.inf
        for i, (al, ab) in enumerate(anchors):
            sep = separation_deg(al, ab, lon, lat)
            if sep <= tol and sep < best_sep:
                best, best_sep = i, sep
        if best < 0:
            groups.append([scan])
            anchors.append((lon, lat))
        else:
            groups[best].append(scan)
    return groups


def group_object(group: Sequence[Positioned]) -> str:
    """The most common OBJECT of a group's scans (the first seen on a tie; "" if none)."""
    counts = Counter(s.object for s in group if s.object)
    return counts.most_common(1)[0][0] if counts else ""


def group_position_deg(group: Sequence[Positioned]) -> tuple[float, float]:
    """Mean (l, b) of a group's scans' mean positions, deg (each scan counted once)."""
    lons = [s.position_deg[0] for s in group]
    lats = [s.position_deg[1] for s in group]
    return mean_position_deg(lons, lats)
