"""Observing plans: a TOML file of targets and surveys, read into typed values.

A plan names the night's pointings: ``[[target]]`` tables (one position each) and
``[[survey]]`` tables that generate targets (a cut along the Galactic plane, a grid in l and b,
or a drift scan with the dish parked at an az/el). Every key is checked as the configuration's
are: a wrong key, type or value stops the program with one line naming it (exit 2)::

    name = "plane-north"             # goes into every scan's header
    start = "2026-10-15T18:00:00"    # optional, UTC: nothing is observed before it
    end = "2026-10-15T23:00:00"      # optional, UTC: nothing is observed after it
    order = "scheduler"              # "as-written" or "scheduler" (default): up first, short slews
    [[target]]
    frame = "galactic"               # galactic | radec | azel
    lon = 30.0                       # deg: l, RA or azimuth
    lat = 0.0                        # deg: b, Dec or elevation
    object = "G030+00"               # optional; made from the position when left out
    seconds = 600                    # on-source time
    repeat = 1                       # visits of this target
    cal_interval_s = 120             # optional: noise-source cadence while on this target
    [[survey]]
    kind = "galactic-plane"          # galactic-plane | grid | drift
    lon_from = 10.0
    lon_to = 90.0
    lon_step = 10.0
    lat = 0.0
    seconds = 300

A ``grid`` takes ``lon_from``, ``lon_to``, ``lon_step``, ``lat_from``, ``lat_to``,
``lat_step`` (Galactic l and b, deg); a ``drift`` takes ``az``, ``el`` and ``seconds`` (the dish
parked, the sky passing by). Ranges include both ends when the step reaches them.
"""

from __future__ import annotations

import datetime as _dt
import math
from dataclasses import dataclass
from pathlib import Path
from typing import Any

from spinflip.daemon.config import ConfigError, utc_start
from spinflip.daemon.error_line import quoted
from spinflip.daemon.sky.pointing import object_name
from spinflip.daemon.toml_file import TomlFileError, read_toml

#: Longest OBJECT and plan name (a FITS string card's value, printable ASCII).
NAME_MAX_CHARS = 68
#: Most targets a plan may expand to (a survey with a tiny step is a mistake, not a night).
MAX_TARGETS = 2000
#: Longest on-source time of one target, s (a day).
MAX_SECONDS = 86400.0

FRAMES = ("galactic", "radec", "azel")
SURVEY_KINDS = ("galactic-plane", "grid", "drift")
ORDERS = ("scheduler", "as-written")


class PlanError(ConfigError):
    """A plan file that cannot be used; one line naming the file, the key and the value."""


@dataclass(frozen=True)
class Target:
    """One pointing of a plan.

    ``frame``/``lon_deg``/``lat_deg`` give the position (Galactic l/b, RA/Dec J2000 or az/el);
    ``drift`` marks a parked dish (az/el) that records the sky passing by; ``source`` says
    where in the file the target came from (``target[2]``, ``survey[1]``) for messages.
    """

    object: str
    frame: str
    lon_deg: float
    lat_deg: float
    seconds: float
    repeat: int = 1
    cal_interval_s: float | None = None
    drift: bool = False
    source: str = ""


@dataclass(frozen=True)
class Plan:
    """A whole plan: its name, the UTC window (ISO text or None) and the targets in file order."""

    name: str
    targets: tuple[Target, ...]
    start: str | None = None
    end: str | None = None
    order: str = "scheduler"
    path: str = ""


def load_plan(path: str | Path) -> Plan:
    """Read and check the plan at ``path``.

    Raises
    ------
    PlanError
        One line: the file unreadable or not TOML, or a key unknown, of the wrong type or out of
        range (naming the table, e.g. ``survey[1].lon_step``), or a plan with no target.
    """
    try:
        data = read_toml(path, "plan")
    except TomlFileError as exc:
        raise PlanError(str(exc)) from None
    return plan_from_dict(data, str(path))


def plan_from_dict(data: dict[str, Any], where: str = "plan") -> Plan:
    """The :class:`Plan` of a parsed TOML document; see :func:`load_plan`."""
    top = _Table(data, where, ("name", "start", "end", "order", "target", "survey"))
    name = top.text("name", required=True)
    start = top.time("start")
    end = top.time("end")
    if start is not None and end is not None and end <= start:
        raise PlanError(f"{where}: end = {quoted(end)} is not after start = {quoted(start)}")
    order = top.choice("order", ORDERS, "scheduler")
    targets: list[Target] = []
    for i, raw in enumerate(top.tables("target"), 1):
        targets.append(_target(_Table(raw, f"{where}: target[{i}]", _TARGET_KEYS)))
    for i, raw in enumerate(top.tables("survey"), 1):
        targets.extend(_survey(_Table(raw, f"{where}: survey[{i}]", _SURVEY_KEYS)))
        if len(targets) > MAX_TARGETS:
            raise PlanError(f"{where}: survey[{i}] makes the plan longer than {MAX_TARGETS} "
                            "targets; use a larger step")
    if not targets:
        raise PlanError(f"{where}: no [[target]] or [[survey]]: nothing to observe")
    return Plan(name=name, targets=tuple(targets), start=start, end=end, order=order,
                path=where)


_TARGET_KEYS = ("frame", "lon", "lat", "object", "seconds", "repeat", "cal_interval_s")
_SURVEY_KEYS = ("kind", "lon_from", "lon_to", "lon_step", "lat", "lat_from", "lat_to",
                "lat_step", "az", "el", "seconds", "repeat", "cal_interval_s")


def _target(t: _Table) -> Target:
    frame = t.choice("frame", FRAMES, None, required=True)
    lon, lat = _position(t, frame, "lon", "lat")
    return Target(object=t.text("object") or object_name(frame, lon, lat), frame=frame,
                  lon_deg=lon, lat_deg=lat, seconds=t.seconds(), repeat=t.repeat(),
                  cal_interval_s=t.number("cal_interval_s", 1.0, MAX_SECONDS),
                  source=t.where.split(": ")[-1])


def _survey(t: _Table) -> list[Target]:
    kind = t.choice("kind", SURVEY_KINDS, None, required=True)
    allowed = {"galactic-plane": ("lon_from", "lon_to", "lon_step", "lat"),
               "grid": ("lon_from", "lon_to", "lon_step", "lat_from", "lat_to", "lat_step"),
               "drift": ("az", "el")}[kind]
    common = ("kind", "seconds", "repeat", "cal_interval_s")
    t.only(allowed + common, f"kind = {quoted(kind)}")
    seconds, repeat = t.seconds(), t.repeat()
    cal = t.number("cal_interval_s", 1.0, MAX_SECONDS)
    source = t.where.split(": ")[-1]
    if kind == "drift":
        az, el = _position(t, "azel", "az", "el")
        return [Target(object=object_name("azel", az, el), frame="azel", lon_deg=az,
                       lat_deg=el, seconds=seconds, repeat=repeat, cal_interval_s=cal,
                       drift=True, source=source)]
    lons = _steps(t, "lon_from", "lon_to", "lon_step", -360.0, 360.0)
    if kind == "galactic-plane":
        lats = [t.number("lat", -90.0, 90.0, required=True)]
    else:
        lats = _steps(t, "lat_from", "lat_to", "lat_step", -90.0, 90.0)
    return [Target(object=object_name("galactic", lon % 360.0, lat), frame="galactic",
                   lon_deg=lon % 360.0, lat_deg=lat, seconds=seconds, repeat=repeat,
                   cal_interval_s=cal, source=source)
            for lat in lats for lon in lons]


def _position(t: _Table, frame: str, lon_key: str, lat_key: str) -> tuple[float, float]:
    """The two angles of a position, each in its range for ``frame``."""
    lon = t.number(lon_key, -360.0, 360.0, required=True)
    lat = t.number(lat_key, 0.0 if frame == "azel" else -90.0, 90.0, required=True)
    return lon % 360.0, lat


def _steps(t: _Table, k_from: str, k_to: str, k_step: str, lo: float, hi: float
           ) -> list[float]:
    """``from``, ``from + step`` ... up to ``to`` (included when a step reaches it, to 1e-9)."""
    a = t.number(k_from, lo, hi, required=True)
    b = t.number(k_to, lo, hi, required=True)
    step = t.number(k_step, 1e-3, hi - lo, required=True)
    if b < a:
        raise PlanError(f"{t.where}.{k_to} = {b:g}: must not be below {k_from} = {a:g}")
    n = int(math.floor((b - a) / step + 1e-9)) + 1
    if n > MAX_TARGETS:
        raise PlanError(f"{t.where}.{k_step} = {step:g}: makes {n} positions, more than "
                        f"{MAX_TARGETS}; use a larger step")
    return [round(a + i * step, 9) for i in range(n)]


class _Table:
    """One TOML table of the plan with its place in the file, and typed getters that raise
    :class:`PlanError` naming ``<where>.<key>``."""

    def __init__(self, raw: Any, where: str, keys: tuple[str, ...]):
        if not isinstance(raw, dict):
            raise PlanError(f"{where}: expected a table of keys, got {quoted(raw)}")
        self.raw, self.where = raw, where
        self.only(keys)

    def only(self, keys: tuple[str, ...], why: str = "") -> None:
        for key in self.raw:
            if key not in keys:
                extra = f" with {why}" if why else ""
                raise PlanError(f"{self.where}: unknown key {quoted(key)}{extra}: allowed keys "
                                f"are {', '.join(keys)}")

    def _get(self, key: str, required: bool) -> Any:
        if key not in self.raw:
            if required:
                raise PlanError(f"{self.where}: {key} is missing")
            return None
        return self.raw[key]

    def text(self, key: str, required: bool = False) -> str:
        v = self._get(key, required)
        if v is None:
            return ""
        if not (isinstance(v, str) and v.isascii() and v.isprintable()
                and 0 < len(v) <= NAME_MAX_CHARS):
            raise PlanError(f"{self.where}.{key} = {quoted(v)}: expected printable ASCII text of "
                            f"1 to {NAME_MAX_CHARS} characters (it goes into FITS headers)")
        return v

    def choice(self, key: str, allowed: tuple[str, ...], default: str | None,
               required: bool = False) -> str:
        v = self._get(key, required)
        if v is None:
            assert default is not None          # required keys raised above
            return default
        if v not in allowed:
            raise PlanError(f"{self.where}.{key} = {quoted(v)}: expected one of "
                            + ", ".join(repr(a) for a in allowed))
        return str(v)

    def number(self, key: str, lo: float, hi: float, required: bool = False) -> Any:
        v = self._get(key, required)
        if v is None:
            return None
        if isinstance(v, bool) or not isinstance(v, (int, float)) or not math.isfinite(v) \
                or not lo <= v <= hi:
            raise PlanError(f"{self.where}.{key} = {quoted(v)}: expected a number from {lo:g} "
                            f"to {hi:g}")
        return float(v)

    def seconds(self) -> float:
        v = self.number("seconds", 1.0, MAX_SECONDS, required=True)
        return float(v)

    def repeat(self) -> int:
        v = self._get("repeat", False)
        if v is None:
            return 1
        if isinstance(v, bool) or not isinstance(v, int) or not 1 <= v <= 100:
            raise PlanError(f"{self.where}.repeat = {quoted(v)}: expected an integer from 1 "
                            "to 100")
        return v

    def time(self, key: str) -> str | None:
        v = self._get(key, False)
        if v is None:
            return None
        if isinstance(v, _dt.datetime):      # a TOML date-time without quotes
            v = v.isoformat()
        if not isinstance(v, str) or v == "now":
            raise PlanError(f"{self.where}.{key} = {quoted(v)}: expected a UTC time in ISO 8601 "
                            "as a string, e.g. '2026-10-15T23:00:00'")
        try:
            return utc_start(v)
        except ConfigError:
            raise PlanError(f"{self.where}.{key} = {quoted(v)}: expected a UTC time in ISO "
                            "8601, e.g. '2026-10-15T23:00:00'") from None

    def tables(self, key: str) -> list[Any]:
        v = self._get(key, False)
        if v is None:
            return []
        if not isinstance(v, list):
            raise PlanError(f"{self.where}: {key} must be an array of tables ([[{key}]]), got "
                            f"{quoted(v)}")
        return v
