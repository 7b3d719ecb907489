"""What the terminal UI's survey view knows: the newest scan average of each target, and the
terminal velocities and rotation curve reduced from them, in the viewer (never the daemon).

:class:`SurveyState` is fed every spectrum message of kind "average" by
:meth:`spinflip.tui.state.ViewState.apply` (cheap: it keeps a reference to the arrays) and is
brought up to date by :meth:`SurveyState.refresh`, which the survey view calls before it
draws. A refresh reduces the averages that changed since the last one, at most once a second
(:data:`REFRESH_S`), at once when a new target has arrived:

1. the average as a :class:`spinflip.reduce.profile.Stack` (:func:`stack_from_average`):
   channels sorted by velocity, flagged ones NaN, a first-order baseline fitted over the
   line-free windows (the outer :data:`LINE_FREE_FRACTION` of the band at each end, where
   the Galactic HI of a 2.4 MHz band, about +-250 km/s, has no emission) and subtracted,
   sigma = the rms of the residuals there;
2. the terminal velocity with ``spinflip.reduce.tangent.terminal_velocity`` (the code
   ``spinflip reduce`` uses), imported when first needed; when it cannot be imported the
   view says "tangent points: reduction not available";
3. the profile resampled onto the survey's common grid (:func:`spinflip.reduce.lv.resample_profile`,
   1 km/s from -250 to +250 km/s, float32) for the l-v diagram; the full average is then let go.

Memory is bounded: at most :data:`MAX_OBJECTS` targets (the newest kept), each about 2 kB
once reduced.
"""

from __future__ import annotations

import math
from collections import OrderedDict
from collections.abc import Callable
from dataclasses import dataclass
from typing import Any

import numpy as np

from spinflip.daemon.sky.hi_line import HI_COLUMN_PER_K_KM_S_CM2
from spinflip.reduce.constants import CONSTANTS, DEFAULT_CONSTANTS, GalacticConstants
from spinflip.reduce.lv import resample_profile, velocity_grid, wrap_glon_deg
from spinflip.reduce.profile import Stack

#: Most targets the view keeps (the oldest go first).
MAX_OBJECTS = 2000
#: Shortest time between two reductions of changed averages, s (new targets: at once).
REFRESH_S = 1.0
#: The survey's common velocity grid (cell centres), km/s.
GRID_STEP_KM_S = 1.0
GRID_RANGE_KM_S = (-250.0, 250.0)
#: Share of the finite channels at each end of the band taken as line-free.
LINE_FREE_FRACTION = 0.15
#: Fewest line-free channels at each end for a baseline and a noise.
MIN_LINE_FREE = 4
#: What the view says when the tangent-point code cannot be imported.
NOT_AVAILABLE = "tangent points: reduction not available"


@dataclass
class SurveyEntry:
    """One target of the survey.

    Attributes
    ----------
    object : str
    glon_deg, glat_deg : float
        Galactic position of the pointing, deg (``glon_deg`` as sent, 0..360).
    scan, time_utc : str
        The scan and the time of its newest integration in the average.
    raw : dict or None
        The average message as :class:`~spinflip.tui.state.ViewState` keeps it, until the
        next refresh reduces it.
    tb_k : numpy.ndarray or None
        float32 T_B on the survey grid after the baseline, K (NaN: no data); None until
        reduced or when the average could not be (``problem`` says why).
    sigma_k : float
        Noise per channel of the average, K (NaN until reduced).
    point : object or None
        Its ``tangent.TerminalPoint``; None when none (not in the inner Galaxy, no edge,
        reduction not available).
    problem : str
        Why the average was left out ("" when it was not).
    """

    object: str
    glon_deg: float
    glat_deg: float
    scan: str
    time_utc: str
    raw: dict | None = None
    tb_k: np.ndarray | None = None
    sigma_k: float = math.nan
    point: Any = None
    problem: str = ""


def stack_from_average(spec: dict) -> Stack:
    """A :class:`Stack` of one scan's running average (a spectrum message as the view keeps it).

    Parameters
    ----------
    spec : dict
        Header fields and ``"arrays"`` (``v_lsrk_km_s``, ``data``, ``flagged``; see
        :mod:`spinflip.tui.state`); the data in K.

    Returns
    -------
    Stack
        On the average's own channels, ascending velocity; flagged or non-finite channels
        NaN; a first-order baseline over the line-free windows (the outer
        :data:`LINE_FREE_FRACTION` of the finite channels at each end) subtracted; sigma_k =
        the rms of the residuals in those windows (ddof 2) for every finite channel; weight
        1/sigma^2; W and N(HI) (optically thin: N = 1.823e18 W cm^-2, Dickey & Lockman 1990,
        ARA&A 28, 215) over the channels between the windows, flagged ones bridged by linear
        interpolation.

    Raises
    ------
    ValueError
        Data not in K, fewer than 2 channels, a velocity axis that is not uniform, or too
        few line-free channels; one line.
    """
    arrays = spec["arrays"]
    unit = str(spec.get("unit", (spec.get("units") or {}).get("data", "")))
    if unit != "K":
        raise ValueError(f"average in {unit or 'no unit'!r}, not K (not calibrated)")
    v = np.asarray(arrays["v_lsrk_km_s"], dtype=float)
    data = np.asarray(arrays["data"], dtype=float)
    flagged = np.asarray(arrays.get("flagged", np.zeros(data.shape, bool)), dtype=bool)
    if not (v.shape == data.shape == flagged.shape) or v.size < 2:
        raise ValueError(f"average with {v.size} velocities, {data.size} values and "
                         f"{flagged.size} flags: expected equal lengths of at least 2")
    order = np.argsort(v, kind="stable")
    v, data, flagged = v[order], data[order], flagged[order]
    dv = np.diff(v)
    if not (np.all(np.isfinite(dv)) and dv.min() > 0
            and np.ptp(dv) <= 1e-3 * float(np.mean(dv))):
        raise ValueError("average's velocity axis is not uniform")
    tb = np.where(flagged | ~np.isfinite(data), np.nan, data)
    finite = np.flatnonzero(np.isfinite(tb))
    n_free = int(LINE_FREE_FRACTION * finite.size)
    if n_free < MIN_LINE_FREE:
        raise ValueError(f"average with {finite.size} usable channels: too few for a baseline")
    free = np.concatenate([finite[:n_free], finite[-n_free:]])
    coef = np.polyfit(v[free], tb[free], 1)
    tb = tb - np.polyval(coef, v)
    resid = tb[free]
    sigma = float(np.sqrt(np.sum(resid ** 2) / max(1, resid.size - 2)))
    inner = finite[n_free:-n_free]
    step = float(np.mean(dv))
    span = np.arange(inner[0], inner[-1] + 1) if inner.size else inner
    filled = np.interp(v[span], v[finite], tb[finite])        # flagged channels bridged
    w = float(np.sum(filled) * step)
    w_err = float(sigma * step * math.sqrt(span.size))
    sigma_k = np.where(np.isfinite(tb), sigma, np.nan)
    weight = np.where(np.isfinite(tb) & (sigma > 0), 1.0 / max(sigma, 1e-30) ** 2, 0.0)
    window = (float(v[inner[0]]), float(v[inner[-1]])) if inner.size else (math.nan, math.nan)
    return Stack(object=str(spec.get("object", "")), glon_deg=float(spec["glon_deg"]),
                 glat_deg=float(spec["glat_deg"]), v_km_s=v, tb_k=tb, sigma_k=sigma_k,
                 weight=weight, exposure_s=float(spec.get("exposure_s", 0.0)),
                 n_rows=int(spec.get("row", 0)) + 1, n_scans=1, w_k_km_s=w,
                 w_err_k_km_s=w_err, nhi_cm2=HI_COLUMN_PER_K_KM_S_CM2 * w,
                 nhi_err_cm2=HI_COLUMN_PER_K_KM_S_CM2 * w_err, line_window_km_s=window,
                 baseline_order=1, scans=(str(spec.get("scan", "")),))


def _load_terminal_velocity() -> Callable[..., Any] | None:
    """``spinflip.reduce.tangent.terminal_velocity``, or None when it cannot be imported."""
    try:
        from spinflip.reduce.tangent import terminal_velocity
    except ImportError:
        return None
    return terminal_velocity


class SurveyState:
    """The survey so far: newest average per target, reduced lazily (see the module).

    Parameters
    ----------
    consts : GalacticConstants, optional
        For R and Theta; default the reduction's default set.
    max_objects : int
        Targets kept, the newest (by arrival).
    terminal_velocity : callable, optional
        ``(stack, consts) -> TerminalPoint | None``; default: imported from
        ``spinflip.reduce.tangent`` at the first refresh (None there: not available).

    Attributes
    ----------
    entries : OrderedDict of str -> SurveyEntry
        By target name, the most recently updated last.
    grid_km_s : numpy.ndarray
        The common velocity grid of every entry's ``tb_k``.
    available : bool or None
        Whether the tangent-point code could be imported (None before the first refresh).
    reductions : int
        Averages reduced so far (each refresh reduces only what changed).
    refreshed_s : float or None
        When the last refresh reduced something (the caller's clock), s.
    """

    def __init__(self, consts: GalacticConstants | None = None, max_objects: int = MAX_OBJECTS,
                 terminal_velocity: Callable[..., Any] | None = None):
        self.consts = consts if consts is not None else CONSTANTS[DEFAULT_CONSTANTS]
        self.max_objects = int(max_objects)
        self.entries: OrderedDict[str, SurveyEntry] = OrderedDict()
        self.grid_km_s = velocity_grid(GRID_STEP_KM_S, GRID_RANGE_KM_S)
        self._terminal_velocity = terminal_velocity
        self.available: bool | None = None if terminal_velocity is None else True
        self.reductions = 0
        self.refreshed_s: float | None = None
        self._dirty: set[str] = set()
        self._new_object = False

    def __len__(self) -> int:
        return len(self.entries)

    def take(self, spec: dict) -> None:
        """Keep one average spectrum (as ``ViewState`` keeps it) as its target's newest."""
        name = str(spec.get("object") or "")
        try:
            glon, glat = float(spec["glon_deg"]), float(spec["glat_deg"])
        except (KeyError, TypeError, ValueError):
            return
        if not name:
            name = f"l{glon:.2f}b{glat:+.2f}"
        entry = self.entries.get(name)
        if entry is None:
            entry = SurveyEntry(name, glon, glat, "", "")
            self.entries[name] = entry
            self._new_object = True
        else:
            self.entries.move_to_end(name)
        entry.glon_deg, entry.glat_deg = glon, glat
        entry.scan, entry.time_utc = str(spec.get("scan", "")), str(spec.get("time_utc", ""))
        entry.raw = spec
        self._dirty.add(name)
        while len(self.entries) > self.max_objects:
            old, _ = self.entries.popitem(last=False)
            self._dirty.discard(old)

    def due(self, now_s: float) -> bool:
        """True when :meth:`refresh` at ``now_s`` would reduce something."""
        if not self._dirty:
            return False
        return (self._new_object or self.refreshed_s is None
                or now_s - self.refreshed_s >= REFRESH_S)

    def refresh(self, now_s: float) -> int:
        """Reduce the averages that changed, if due (see the module); returns how many."""
        if not self.due(now_s):
            return 0
        if self._terminal_velocity is None and self.available is None:
            self._terminal_velocity = _load_terminal_velocity()
            self.available = self._terminal_velocity is not None
        done = 0
        for name in list(self._dirty):
            entry = self.entries.get(name)
            if entry is not None and entry.raw is not None:
                self._reduce(entry)
                done += 1
        self._dirty.clear()
        self._new_object = False
        self.refreshed_s = float(now_s)
        self.reductions += done
        return done

    def _reduce(self, entry: SurveyEntry) -> None:
        spec, entry.raw = entry.raw, None
        assert spec is not None
        entry.point = None
        try:
            stack = stack_from_average(spec)
        except (ValueError, KeyError, TypeError) as exc:
            entry.tb_k, entry.sigma_k, entry.problem = None, math.nan, str(exc)
            return
        entry.problem = ""
        entry.sigma_k = float(np.nanmax(stack.sigma_k)) if np.isfinite(stack.sigma_k).any() \
            else math.nan
        entry.tb_k = resample_profile(stack.v_km_s, stack.tb_k,
                                      self.grid_km_s).astype(np.float32)
        if self._terminal_velocity is not None:
            try:
                entry.point = self._terminal_velocity(stack, self.consts)
            except (ValueError, ArithmeticError) as exc:
                entry.problem = f"terminal velocity: {exc}"

    # what the view draws ------------------------------------------------------------------
    def reduced(self) -> list[SurveyEntry]:
        """Entries with a profile on the grid, by ascending wrapped longitude (-180..180]."""
        out = [e for e in self.entries.values() if e.tb_k is not None]
        out.sort(key=lambda e: float(wrap_glon_deg(e.glon_deg)))
        return out

    def points(self) -> list[Any]:
        """The terminal-velocity points so far, by ascending Galactocentric radius."""
        pts = [e.point for e in self.entries.values() if e.point is not None]
        pts.sort(key=lambda p: float(p.r_kpc))
        return pts

    def left_out(self) -> int:
        """Averages that could not be reduced (e.g. not in K)."""
        return sum(1 for e in self.entries.values() if e.problem and e.tb_k is None)
