"""The schedule of a plan: which target when, from the site, the limits and the clock.

Greedy in time, the usual way for a single dish (common practice, no single source): from the
start, every visit still to do (a target times its ``repeat``) is tested for the interval it
would occupy, ``[t + slew + settle, t + slew + settle + seconds]``, at its start, middle and
end:

* elevation at least ``min_elevation_deg`` and above the horizon mask at that azimuth (the mask
  is az/el pairs, linearly interpolated in azimuth, wrapping at 360 deg);
* at least ``sun_avoid_deg`` from the Sun (the strongest source in the sky at 1420 MHz; 15 deg is
  common practice);
* within the rotator's limits (``rotator.az_range``, ``el_range``) when there is one;
* ending before the plan's end (or ``start + max_hours``).

Among the visits that pass, ``order = "scheduler"`` takes the one that sets soonest (the
shortest time left above the limit, so nothing that is about to go down is lost), ties broken
by the shorter slew; ``order = "as-written"`` takes the first in file order. When none passes,
the clock moves on in ``step_s`` steps to the first moment one does (what is down is deferred
and comes back); visits that never pass before the end are skipped, each with the reason that
held for it. Slew time is the larger of the azimuth and elevation travel over
``slew_deg_s`` (both axes move at once), plus ``settle_s``; both are part of the schedule.
A drift target (the dish parked at an az/el) is fixed in the horizontal frame.

Positions come from :mod:`spinflip.daemon.sky.coordinates` (astropy, no refraction).
"""

from __future__ import annotations

from collections.abc import Callable
from dataclasses import dataclass, field

import numpy as np
from astropy.coordinates import EarthLocation, angular_separation
from astropy.time import Time, TimeDelta

from spinflip.daemon.run.plan_file import Plan, Target
from spinflip.daemon.sky import coordinates


@dataclass(frozen=True)
class Limits:
    """What the site and the mount allow."""

    min_elevation_deg: float = 15.0
    sun_avoid_deg: float = 15.0
    horizon: tuple[tuple[float, float], ...] = ()   # (az, el) deg pairs; empty: flat
    slew_deg_s: float = 2.0                          # per axis
    settle_s: float = 5.0
    step_s: float = 300.0                            # how far the clock moves when all are down
    max_hours: float = 24.0                          # the window when the plan gives no end
    az_range: tuple[float, float] | None = None      # the rotator's limits (None: none)
    el_range: tuple[float, float] | None = None


def limits_from_config(cfg: dict) -> Limits:
    """The :class:`Limits` of the ``[pointing]`` section."""
    p = cfg["pointing"]
    rot = cfg["rotator"] if p["driver"] == "rotator" else None
    return Limits(min_elevation_deg=p["min_elevation"], sun_avoid_deg=p["sun_avoid_deg"],
                  horizon=tuple((float(a), float(e)) for a, e in p["horizon"]),
                  slew_deg_s=p["slew_deg_s"], settle_s=p["settle_s"],
                  az_range=(rot["az_range"][0], rot["az_range"][1]) if rot else None,
                  el_range=(rot["el_range"][0], rot["el_range"][1]) if rot else None)


def outside_mount(limits: Limits, az_deg: np.ndarray, el_deg: np.ndarray) -> np.ndarray:
    """bool: positions the rotator cannot reach (azimuth tried as az, az - 360 and az + 360)."""
    az = np.asarray(az_deg, dtype=float)
    out = np.zeros(az.shape, dtype=bool)
    if limits.az_range is not None:
        lo, hi = limits.az_range
        a = az % 360.0
        out |= ~(((a >= lo) & (a <= hi)) | ((a - 360 >= lo) & (a - 360 <= hi))
                 | ((a + 360 >= lo) & (a + 360 <= hi)))
    if limits.el_range is not None:
        lo, hi = limits.el_range
        out |= (np.asarray(el_deg) < lo) | (np.asarray(el_deg) > hi)
    return out


@dataclass(frozen=True)
class Entry:
    """One visit of a target: scheduled (times and positions) or skipped (why)."""

    target: Target
    visit: int                      # 1 .. target.repeat
    status: str                     # "scheduled" or "skipped"
    reason: str = ""
    start_utc: str = ""             # on source (after slew and settle)
    end_utc: str = ""
    slew_s: float = 0.0
    az_start_deg: float = float("nan")
    el_start_deg: float = float("nan")
    az_end_deg: float = float("nan")
    el_end_deg: float = float("nan")
    sun_distance_deg: float = float("nan")   # the least of start, middle and end

    def as_json(self) -> dict:
        """The ``spinflip plan --json`` entry (units in the names)."""
        t = self.target
        return {"object": t.object, "visit": self.visit, "frame": t.frame,
                "lon_deg": t.lon_deg, "lat_deg": t.lat_deg, "seconds": t.seconds,
                "start_utc": self.start_utc or None, "end_utc": self.end_utc or None,
                "az_deg": _none(self.az_start_deg), "el_deg": _none(self.el_start_deg),
                "az_end_deg": _none(self.az_end_deg), "el_end_deg": _none(self.el_end_deg),
                "slew_s": self.slew_s, "sun_distance_deg": _none(self.sun_distance_deg),
                "status": self.status, "reason": self.reason}


def _range(r: tuple[float, float] | None) -> str:
    return "any" if r is None else f"{r[0]:g}..{r[1]:g}"


def _none(x: float) -> float | None:
    return None if not np.isfinite(x) else float(x)


@dataclass
class _Visit:
    target: Target
    visit: int
    reasons: set[str] = field(default_factory=set)


def horizon_el_deg(horizon: tuple[tuple[float, float], ...], az_deg: np.ndarray) -> np.ndarray:
    """The horizon mask's elevation at each azimuth (0 where no mask is given)."""
    if not horizon:
        return np.zeros_like(np.asarray(az_deg, dtype=float))
    pts = sorted((a % 360.0, e) for a, e in horizon)
    az = np.array([a for a, _ in pts])
    el = np.array([e for _, e in pts])
    return np.interp(np.asarray(az_deg, dtype=float) % 360.0, az, el, period=360.0)


def azel(targets: list[Target], location: EarthLocation, times: Time
         ) -> tuple[np.ndarray, np.ndarray]:
    """Azimuth and elevation (deg) of each target (rows) at ``times``: one time axis for all
    (1-D) or a row of times per target (2-D, one row per target)."""
    per_row = times.ndim == 2
    shape = (len(targets), times.shape[-1])
    az = np.empty(shape)
    el = np.empty(shape)
    for frame in ("galactic", "radec"):
        idx = [i for i, t in enumerate(targets) if t.frame == frame]
        if idx:
            lon = np.array([targets[i].lon_deg for i in idx])[:, None]
            lat = np.array([targets[i].lat_deg for i in idx])[:, None]
            when = times[idx] if per_row else times[None, :]
            a, e = coordinates.sky_to_azel(frame, lon, lat, location, when)
            az[idx] = np.broadcast_to(a, (len(idx), shape[1]))
            el[idx] = np.broadcast_to(e, (len(idx), shape[1]))
    for i, t in enumerate(targets):
        if t.frame == "azel":                  # a parked dish: fixed in the horizontal frame
            az[i], el[i] = t.lon_deg, t.lat_deg
    return az, el


def schedule(plan: Plan, location: EarthLocation, start: Time, limits: Limits,
             park: tuple[float, float] | None = None,
             ended: Callable[[Target, int], bool] | None = None) -> list[Entry]:
    """The plan's visits in the order they would be observed, then the skipped ones.

    Parameters
    ----------
    plan : the plan (its ``start``, if later than ``start``, is when observing begins)
    location : the site
    start : UTC time the schedule starts
    limits : elevation, Sun, horizon and mount limits
    park : (az, el) where the dish is at the start (None: the first slew is not counted)
    ended : callable(target, visit) -> True for a visit that has ended already (a plan resumed
        or under way): left out
    """
    t0 = start
    if plan.start is not None and Time(plan.start, scale="utc") > t0:
        t0 = Time(plan.start, scale="utc")
    t_end = (Time(plan.end, scale="utc") if plan.end is not None
             else t0 + TimeDelta(limits.max_hours * 3600.0, format="sec"))
    todo = [_Visit(t, k) for t in plan.targets for k in range(1, t.repeat + 1)
            if ended is None or not ended(t, k)]
    done: list[Entry] = []
    now, here = t0, park
    while todo and now < t_end:
        picked = _pick(todo, location, now, here, t_end, limits, plan.order)
        if picked is None:
            now = now + TimeDelta(limits.step_s, format="sec")
            continue
        entry, visit = picked
        todo.remove(visit)
        done.append(entry)
        now = Time(entry.end_utc, scale="utc")
        here = (entry.az_end_deg, entry.el_end_deg)
    for v in todo:
        why = "; ".join(sorted(v.reasons)) or "the plan's window ended before its turn came"
        done.append(Entry(v.target, v.visit, "skipped", reason=why))
    return done


def _slew_s(here: tuple[float, float] | None, az: np.ndarray, el: np.ndarray,
            limits: Limits) -> np.ndarray:
    if here is None:
        return np.zeros_like(az)
    daz = np.abs((az - here[0] + 180.0) % 360.0 - 180.0)
    travel = np.maximum(daz, np.abs(el - here[1]))
    return travel / limits.slew_deg_s + limits.settle_s


def _pick(todo: list[_Visit], location: EarthLocation, now: Time,
          here: tuple[float, float] | None, t_end: Time, limits: Limits,
          order: str) -> tuple[Entry, _Visit] | None:
    """The visit to observe next from ``now`` (None: nothing can be observed now)."""
    targets = [v.target for v in todo]
    az0, el0 = azel(targets, location, now.reshape((1,)))
    slew = _slew_s(here, az0[:, 0], el0[:, 0], limits)
    dur = np.array([t.seconds for t in targets])
    # start, middle and end of each visit's on-source time, in seconds from now
    offs = np.stack([slew, slew + dur / 2, slew + dur], axis=1)
    times = now + TimeDelta(offs.ravel(), format="sec")
    az, el = azel(targets, location, times.reshape(offs.shape))
    saz, sel = coordinates.sun_azel(location, times)
    sun = np.degrees(angular_separation(np.radians(az), np.radians(el),
                                        np.radians(np.reshape(saz, offs.shape)),
                                        np.radians(np.reshape(sel, offs.shape))))
    mask = horizon_el_deg(limits.horizon, az)
    low = el < limits.min_elevation_deg
    unreachable = outside_mount(limits, az, el)
    hidden = el < mask
    sunny = sun < limits.sun_avoid_deg
    late = (now + TimeDelta(slew + dur, format="sec")) > t_end
    ok = ~(low | hidden | sunny | unreachable).any(axis=1) & ~late
    why_low = [bool(row.any()) for row in low]
    why_hidden = [bool(row.any()) for row in hidden]
    why_sun = [bool(row.any()) for row in sunny]
    why_mount = [bool(row.any()) for row in unreachable]
    for v, lo, hi, su, mo in zip(todo, why_low, why_hidden, why_sun, why_mount, strict=True):
        if mo and not lo:
            v.reasons.add(f"outside the rotator's limits (az {_range(limits.az_range)}, el "
                          f"{_range(limits.el_range)} deg) whenever its turn came")
        elif lo:
            v.reasons.add(f"below the elevation limit of {limits.min_elevation_deg:g} deg "
                          "whenever its turn came")
        elif hi:
            v.reasons.add("behind the horizon mask whenever its turn came")
        elif su:
            v.reasons.add(f"within {limits.sun_avoid_deg:g} deg of the Sun whenever its turn "
                          "came")
    if not ok.any():
        return None
    candidates = [int(k) for k in np.flatnonzero(ok)]
    if order == "as-written":
        i = candidates[0]
    else:
        # how long each candidate stays up: sample ahead until it drops below a limit
        left = _time_left_s(targets, candidates, location, now, t_end, limits)
        i = min(candidates, key=lambda k: (left[k], float(slew[k]), k))
    v = todo[i]
    start = now + TimeDelta(slew[i], format="sec")
    end = start + TimeDelta(dur[i], format="sec")
    entry = Entry(v.target, v.visit, "scheduled", start_utc=start.isot[:19] + "Z",
                  end_utc=end.isot[:19] + "Z", slew_s=float(slew[i]),
                  az_start_deg=float(az[i, 0]), el_start_deg=float(el[i, 0]),
                  az_end_deg=float(az[i, 2]), el_end_deg=float(el[i, 2]),
                  sun_distance_deg=float(sun[i].min()))
    return entry, v


def _time_left_s(targets: list[Target], candidates: list[int], location: EarthLocation,
                 now: Time, t_end: Time, limits: Limits) -> dict[int, float]:
    """Seconds until each candidate first fails the elevation or horizon limit (sampled every
    ``step_s``; the end of the window if it never does)."""
    span = max(0.0, (t_end - now).to_value("sec"))
    steps = np.arange(0.0, span + limits.step_s, limits.step_s)
    times = now + TimeDelta(steps, format="sec")
    chosen = [targets[k] for k in candidates]
    az, el = azel(chosen, location, times)
    bad = (el < limits.min_elevation_deg) | (el < horizon_el_deg(limits.horizon, az))
    out = {}
    for row, k in enumerate(candidates):
        hits = np.flatnonzero(bad[row])
        out[k] = float(steps[hits[0]]) if hits.size else float(span)
    return out
