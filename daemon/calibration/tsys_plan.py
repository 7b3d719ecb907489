"""Where the kelvin scale's system temperature comes from (:class:`TsysPlan`, resolved from
``[calibration]`` by :func:`plan_tsys`), and which value a row takes (:class:`TsysTracker`).

``calibration.tsys_from = "noise_source"`` fires the noise source on the schedule's cadence and
measures T_sys at every firing (:mod:`spinflip.daemon.calibration.tsys_meter`); each row takes the
newest measurement finished by the time the row is, and its age (TSYSAGE). A row whose newest
T_sys is older than ``calibration.tsys_max_age_s`` is not trustworthy (saved with every channel
flagged). ``"loads"`` takes T_sys on the cold sky from the newest hot/cold record
(:mod:`spinflip.daemon.calibration.loads`), refused when too old or measured at other receiver
settings; ``"fixed"`` takes ``calibration.tsys_k``.
"""

from __future__ import annotations

import time as _time
from collections.abc import Callable
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

from spinflip.daemon.calibration import loads as loads_mod
from spinflip.daemon.calibration.tsys_meter import TsysMeasurement
from spinflip.daemon.config import ConfigError


@dataclass
class TsysPlan:
    """Where the kelvin scale's system temperature comes from, and the FITS cards citing it."""

    kind: str                 # "noise_source", "loads", "fixed" or "none"
    tsys_k: float = float("nan")       # loads / fixed: the value
    tcal_k: float = float("nan")       # noise_source: the source's excess temperature
    text: str = ""                     # TSYSSRC
    cards: dict = field(default_factory=dict)
    record: Any = None                 # loads.LoadsRecord, when a record is cited


def records_dir(cfg: dict) -> Path:
    """Folder of hot/cold records: ``calibration.records`` or ``<output.dir>/calibration``."""
    folder = cfg["calibration"]["records"] or str(Path(cfg["output"]["dir"]) / "calibration")
    return Path(folder).expanduser()


def _usable_record(cfg: dict, now_unix_s: float) -> loads_mod.LoadsRecord | None:
    """The newest hot/cold record, checked for age and receiver settings (LoadsError if not)."""
    folder = records_dir(cfg)
    record = loads_mod.latest_record(folder)
    if record is None:
        return None
    cal, src = cfg["calibration"], cfg["source"]
    loads_mod.check_record_age(record, now_unix_s, cal["max_record_age_s"])
    loads_mod.check_record_matches(record, src["gain"], src["center_freq"], src["sample_rate"])
    return record


def plan_tsys(cfg: dict, source_kind: str, now_unix_s: float) -> TsysPlan:
    """Resolve ``[calibration]`` into a :class:`TsysPlan`, or ConfigError (exit 2) naming why."""
    cal = cfg["calibration"]
    how = cal["tsys_from"]
    if source_kind == "replay" and how == "noise_source":
        return TsysPlan("none", text="none: a capture cannot fire a noise source")
    if how == "fixed":
        return TsysPlan("fixed", tsys_k=cal["tsys_k"], text="fixed: calibration.tsys_k",
                        cards={"TSYSFIX": cal["tsys_k"]})
    try:
        record = _usable_record(cfg, now_unix_s)
    except loads_mod.LoadsError as exc:
        if how == "loads" or (how == "noise_source" and cal["noise_source_k"] <= 0
                              and source_kind != "sim"):
            raise ConfigError(str(exc)) from None
        record = None
    if how == "loads":
        if record is None:
            raise ConfigError(f"calibration.tsys_from = 'loads' but there is no hot/cold record in "
                              f"{records_dir(cfg)}: run 'spinflip loads' first")
        return TsysPlan("loads", tsys_k=record.tsys_cold_k, record=record,
                        text=f"loads record {record.name}: Trx + Tcold",
                        cards=loads_mod.header_cards(record))
    # the noise source
    if cal["noise_source_k"] > 0:
        tcal, why = cal["noise_source_k"], "calibration.noise_source_k"
    elif record is not None and record.noise_source_k:
        tcal, why = record.noise_source_k, f"loads record {record.name}"
    elif source_kind == "sim":
        tcal, why = cfg["sim"]["noise_source_k"], "sim.noise_source_k (simulated)"
    else:
        raise ConfigError("config calibration.noise_source_k is not given (0): calibration.tsys_from"
                          " = 'noise_source' needs the noise source's excess temperature in K "
                          "(> 0), or a hot/cold record that measured it, or tsys_from = 'loads' "
                          "or 'fixed'")
    if source_kind == "rtlsdr" and cal["switch"] == "none":
        raise ConfigError("config calibration.switch = 'none': calibration.tsys_from = "
                          "'noise_source' needs a way to switch it ('command' or 'gpio')")
    cards = {"TCAL": tcal, "TCALSRC": why, "CALEVERY": cal["cal_interval_s"],
             "CALON": cal["cal_on_s"]}
    if record is not None and why.startswith("loads"):
        cards.update(loads_mod.header_cards(record))
    return TsysPlan("noise_source", tcal_k=tcal, cards=cards,
                    text=f"noise source, TCAL {tcal:g} K from {why}", record=record)


class TsysTracker:
    """The T_sys each row takes under a :class:`TsysPlan`: the newest good measurement (noise
    source), the record's (loads, checked for age against the wall clock) or the fixed value.

    Parameters
    ----------
    plan : the plan
    cal_cfg : the ``[calibration]`` table (``tsys_max_age_s``, ``max_record_age_s``)
    warn_once : callable(key, severity, text): an event said once per key
    """

    def __init__(self, plan: TsysPlan, cal_cfg: dict,
                 warn_once: Callable[[str, str, str], None]):
        self.plan = plan
        self.cal_cfg = cal_cfg
        self.warn_once = warn_once
        self.newest: TsysMeasurement | None = None   # newest good one (noise source)

    def current_k(self) -> float | None:
        """The newest value for the status message (None when there is none)."""
        if self.newest is not None:
            return self.newest.tsys_k
        return self.plan.tsys_k if self.plan.kind in ("fixed", "loads") else None

    def tsys_for(self, t_end_s: float) -> tuple[float, float, bool]:
        """(T_sys for the kelvin scale, its age in s (NaN if not measured), trustworthy)."""
        plan = self.plan
        if plan.kind == "fixed":
            return plan.tsys_k, float("nan"), True
        if plan.kind == "loads":       # records are dated by the wall clock, so is their age
            age = _time.time() - plan.record.time_unix_s
            if age > self.cal_cfg["max_record_age_s"]:
                self.warn_once("old-record", "error", f"calibration record {plan.record.name} "
                               "is now older than calibration.max_record_age_s: rows are saved "
                               "fully flagged; repeat the hot/cold calibration (spinflip loads)")
                return plan.tsys_k, age, False
            return plan.tsys_k, age, True
        if plan.kind == "none" or self.newest is None:
            return float("nan"), float("nan"), False
        age = t_end_s - self.newest.t_unix_s
        return self.newest.tsys_k, age, age <= self.cal_cfg["tsys_max_age_s"]
