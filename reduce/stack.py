"""The rows of every scan of one target stacked into one HI profile (:class:`Stack`).

Grid
----
A common LSRK radio-velocity grid, ascending, of step ``grid_step_km_s`` (default: the first
row's channel width |CDELT1A|), anchored on the first row's channel centres (so rows on the same
axis are not interpolated at all) and extended by whole steps to cover every row (optionally
clipped to ``v_range_km_s``). Row r's channel k lies at (FITS WCS paper III, alternate axis A)

    v_rk = CRVAL1A_r + (k + 1 - CRPIX1A_r) CDELT1A_r,        k 0-based, m/s.

Weights and regridding
----------------------
Each saved channel is a radiometer measurement: noise sigma_rk = s_r T_sys,r / sqrt(B_r t_rk)
(the radiometer equation; Dicke 1946) with B_r the channel width |CDELT1| in Hz, t_rk its
exposure (CHANEXP, else EXPOSURE) and s_r the brightness-scale factor below. Its weight is

    w_rk = 1 / sigma_rk^2 = B_r t_rk / (s_r T_sys,r)^2,      0 if flagged, not finite or t <= 0,

so a flagged channel never contributes. Grid point j falls between channels k and k + 1 of the
row at fraction f (linear interpolation, a_k = 1 - f, a_{k+1} = f); with c running over the
(one or two) channels of every row that touch j,

    W_j     = sum_c a_c w_c                         (the ``weight`` of the stack)
    T_j     = sum_c a_c w_c x_c / W_j               (weighted mean)
    sigma_j = sqrt(sum_c a_c^2 w_c) / W_j           (propagated noise, independent channels)

For rows on the grid (f = 0) this is sigma_j = 1 / sqrt(sum of weights), the radiometer
equation for the stack; interpolated rows give a smaller per-channel noise (and neighbouring
channels become correlated), which the propagation follows exactly.

Baseline and measured noise
---------------------------
Line-free channels: outside the velocity range where HI toward the target's (l, b) can be
(:func:`spinflip.daemon.sky.kinematics.expected_velocity_range_km_s`) and, when rows are folded
frequency-switched spectra, outside that range moved by +- the switching offset (the fold's
negative ghosts; :func:`spinflip.daemon.products.scan_average.expected_emission`; in the
stack those ghost channels outside the line window are left out, NaN with weight 0, as they
hold no sky signal of their own). A polynomial
(order ``baseline_order``, default 1) is fitted over them with the daemon's fit
(:func:`spinflip.daemon.products.baseline.fit_baseline`, unweighted least squares with
iterative 3-sigma clipping of what still stands out) and subtracted, when at least
:data:`MIN_BASELINE_CHANNELS` of them hold data; else no baseline (``baseline_order = -1``).

When at least ``min_line_free`` (:data:`MIN_LINE_FREE`) line-free channels remain after the
fit, sigma is scaled by the measured noise: the robust rms (1.4826 MAD) of the residuals in
units of their predicted sigma, corrected for the degrees of freedom of the fit
(sqrt(n / (n - order - 1))). This folds in what the radiometer prediction leaves out (the
switching factor of a folded spectrum, the channel's equivalent noise bandwidth, residual
interference). With fewer (a folded spectrum whose line and ghosts fill the band), the scale
comes from the robust rms of channel-to-channel differences, which an HI profile barely
changes over one channel; only when that cannot be had either does sigma stay the radiometer
prediction;
:attr:`StackDetails.noise_source` says which ("measured" or "radiometer").

Brightness temperature
----------------------
TEMPSCAL = 'TMB': the rows are already main-beam brightness temperature (the calibration
divided by BEAMEFF), s = 1. TEMPSCAL = 'TA' (or absent): antenna temperature, and
T_B = T_A / BEAMEFF, s = 1 / BEAMEFF (Kutner & Ulich 1981; BEAMEFF absent: 1). Each scan gets
its own factor before stacking, so scans of either scale stack together.

Line integral and column density
--------------------------------
W = sum_j T_j dv_j over the line window (the expected emission range, clipped to the grid;
flagged gaps of up to 8 channels filled by linear interpolation as the daemon's scan average
does), dv_j the part of channel j inside the window
(:func:`spinflip.daemon.products.line_integral.integrated_intensity_k_km_s`); its error
sigma_W = sqrt(sum_j (sigma_j dv_j)^2) counts the channel noise only (not the baseline's
uncertainty, nor the correlation of interpolated channels). N(HI) = 1.823e18 W cm^-2,
optically thin (Dickey & Lockman 1990): with self-absorption it is a lower limit.

References
----------
Dicke, R. H. 1946, Rev. Sci. Instrum. 17, 268 (the radiometer equation).
Dickey, J. M. & Lockman, F. J. 1990, ARA&A 28, 215 (N(HI) = 1.823e18 int T_B dv).
Greisen, E. W., Calabretta, M. R., Valdes, F. G. & Allen, S. L. 2006, A&A 446, 747.
Kutner, M. L. & Ulich, B. L. 1981, ApJ 250, 341 (temperature scales).
"""

from __future__ import annotations

import math
from collections.abc import Sequence
from dataclasses import dataclass

import numpy as np

from spinflip.daemon.dsp.robust import robust_sigma
from spinflip.daemon.products.baseline import fit_baseline
from spinflip.daemon.products.line_integral import column_density_cm2, integrated_intensity_k_km_s
from spinflip.daemon.products.scan_average import expected_emission, fill_short_gaps
from spinflip.daemon.sky.hi_line import C_M_S
from spinflip.daemon.sky.kinematics import expected_velocity_range_km_s
from spinflip.reduce.grouping import group_object
from spinflip.reduce.profile import Stack
from spinflip.reduce.scans import ScanRows, mean_position_deg

#: Line-free channels with data needed to fit a baseline (as the daemon's scan average).
MIN_BASELINE_CHANNELS = 16
#: Line-free channels needed to scale the noise to the measured rms.
MIN_LINE_FREE = 32


@dataclass(frozen=True, eq=False)
class StackDetails:
    """How a stack was made, beside the :class:`~spinflip.reduce.profile.Stack` itself.

    ``noise_source``: "measured" (sigma scaled by ``noise_scale`` = measured / predicted rms
    over ``n_line_free`` line-free channels), "differences" (no line-free stretch: scaled by the
    robust rms of channel-to-channel differences) or "radiometer" (``noise_scale`` 1).
    ``predicted_rms_k``/``measured_rms_k``: median predicted sigma and the measured rms over
    the line-free channels (NaN when not measured). ``line_free`` marks them on the grid;
    ``line_window`` the channels of the line window. ``baseline_rms_k``: rms of the residuals
    of the baseline fit (NaN without one). ``temperature_scale`` says how T_B was obtained per
    scan scale. ``rows_without_weight``: rows that gave nothing (no T_sys, all flagged).
    """

    noise_source: str
    noise_scale: float
    n_line_free: int
    predicted_rms_k: float
    measured_rms_k: float
    line_free: np.ndarray
    line_window: np.ndarray
    baseline_coef: np.ndarray | None
    baseline_rms_k: float
    temperature_scale: str
    rows_without_weight: int
    notes: tuple[str, ...] = ()


def _brightness_factor(scan: ScanRows) -> tuple[float, str]:
    """(s, text): T_B = s x DATA for this scan (module notes); ValueError on a bad header."""
    scale = str(scan.header.get("TEMPSCAL", "TA") or "TA").strip().upper()
    if scale == "TMB":
        return 1.0, "TMB (main-beam scale as saved)"
    if scale != "TA":
        raise ValueError(f"{scan.name}: TEMPSCAL {scale!r} is neither 'TA' nor 'TMB'")
    try:
        eta = float(scan.header.get("BEAMEFF", 1.0))
    except (TypeError, ValueError):
        raise ValueError(f"{scan.name}: BEAMEFF {scan.header.get('BEAMEFF')!r} is not a "
                         "number") from None
    if not (math.isfinite(eta) and 0.0 < eta <= 1.0):
        raise ValueError(f"{scan.name}: BEAMEFF {eta!r} is not in (0, 1]")
    return 1.0 / eta, f"TA / BEAMEFF {eta:g}"


def _grid(scans: Sequence[ScanRows], step_km_s: float | None,
          v_range_km_s: tuple[float, float] | None) -> np.ndarray:
    """The common grid, km/s ascending (module notes)."""
    first = scans[0]
    vfirst = first.velocity_m_s(0) / 1e3
    step = abs(float(first.vel_cdelt_m_s[0])) / 1e3 if step_km_s is None else float(step_km_s)
    if not (math.isfinite(step) and step > 0):
        raise ValueError(f"grid step {step!r} km/s: expected a number > 0")
    lo, hi = math.inf, -math.inf
    for s in scans:
        k_ends = np.array([0.0, s.nchan - 1.0])
        for r in range(s.n_rows):
            v = (s.vel_crval_m_s[r] + (k_ends + 1.0 - s.crpix[r]) * s.vel_cdelt_m_s[r]) / 1e3
            lo, hi = min(lo, float(v.min())), max(hi, float(v.max()))
    if v_range_km_s is not None:
        lo, hi = max(lo, float(v_range_km_s[0])), min(hi, float(v_range_km_s[1]))
        if not lo < hi:
            raise ValueError(f"v_range_km_s {tuple(v_range_km_s)!r} misses the rows' "
                             "velocities")
    ref = float(vfirst[0])
    j_lo = math.ceil((lo - ref) / step - 1e-9)
    j_hi = math.floor((hi - ref) / step + 1e-9)
    if j_hi - j_lo + 1 < 2:
        raise ValueError("the rows cover less than two grid channels")
    return ref + step * np.arange(j_lo, j_hi + 1, dtype=np.float64)


def _accumulate(scan: ScanRows, s_factor: float, grid: np.ndarray, num: np.ndarray,
                wsum: np.ndarray, q: np.ndarray) -> tuple[int, float, list[int]]:
    """Add the rows of one scan to the sums (module notes); (rows used, their exposure,
    indices of rows used)."""
    n, nchan = scan.data.shape
    data = scan.data.astype(np.float64) * s_factor
    t = (scan.chan_exposure_s if scan.chan_exposure_s is not None
         else np.repeat(scan.exposure_s[:, None], nchan, axis=1))
    tsys = scan.tsys_k[:, None] * s_factor
    with np.errstate(invalid="ignore", divide="ignore"):
        w = scan.channel_hz[:, None] * t / tsys ** 2            # B t / (s T_sys)^2
    ok = (~scan.flagged & np.isfinite(data) & np.isfinite(w) & (w > 0) & (t > 0))
    w = np.where(ok, w, 0.0)
    x = np.where(ok, data, 0.0)
    dv = scan.vel_cdelt_m_s / 1e3                                # (n,) km/s, either sign
    neg = dv < 0
    k_first = np.where(neg, nchan - 1.0, 0.0)
    v_first = (scan.vel_crval_m_s / 1e3 + (k_first + 1.0 - scan.crpix) * dv)   # lowest v
    p = (grid[None, :] - v_first[:, None]) / np.abs(dv)[:, None]   # ascending index
    eps = 1e-6                               # a millionth of a channel: on the channel
    p = np.where(np.abs(p - np.rint(p)) < eps, np.rint(p), p)
    covered = (p >= -eps) & (p <= nchan - 1 + eps)
    k0 = np.clip(np.floor(p), 0, nchan - 2).astype(np.int64)
    f = np.clip(p - k0, 0.0, 1.0)
    a0 = np.where(covered, 1.0 - f, 0.0)
    a1 = np.where(covered, f, 0.0)
    c0 = np.where(neg[:, None], nchan - 1 - k0, k0)             # channel index of k0
    c1 = np.where(neg[:, None], nchan - 2 - k0, k0 + 1)
    w0, w1 = np.take_along_axis(w, c0, 1), np.take_along_axis(w, c1, 1)
    x0, x1 = np.take_along_axis(x, c0, 1), np.take_along_axis(x, c1, 1)
    aw0, aw1 = a0 * w0, a1 * w1
    row_w = aw0 + aw1
    used = np.flatnonzero(row_w.sum(axis=1) > 0)
    num += (aw0 * x0 + aw1 * x1).sum(axis=0)
    wsum += row_w.sum(axis=0)
    q += (a0 * aw0 + a1 * aw1).sum(axis=0)
    return used.size, float(scan.exposure_s[used].sum()), used.tolist()


def _both_sides(grid: np.ndarray, free: np.ndarray, line: np.ndarray) -> bool:
    """Whether line-free channels lie below and above the line window."""
    if not line.any() or not free.any():
        return False
    lo, hi = grid[line].min(), grid[line].max()
    return bool(np.any(free & (grid < lo)) and np.any(free & (grid > hi)))


def _ghost_shifts_km_s(scans: Sequence[ScanRows]) -> list[float]:
    """Velocity shifts of the fold ghosts: c |SWOFFSET| / RESTFREQ of folded scans, km/s."""
    out: set[float] = set()
    for s in scans:
        if not s.folded.any():
            continue
        try:
            off = abs(float(s.header.get("SWOFFSET", 0.0)))
        except (TypeError, ValueError):
            off = 0.0
        if off > 0:
            out.add(round(C_M_S * off / float(s.restfreq_hz[0]) / 1e3, 3))
    return sorted(out)


def _overlap_widths(v: np.ndarray, lo: float, hi: float) -> np.ndarray:
    """Width of each channel (centres ``v``, ascending, uniform) inside [lo, hi], km/s."""
    half = 0.5 * (v[1] - v[0])
    return np.clip(np.minimum(v + half, hi) - np.maximum(v - half, lo), 0.0, None)


def stack_target_details(scans: Sequence[ScanRows], *, grid_step_km_s: float | None = None,
                         v_range_km_s: tuple[float, float] | None = None,
                         baseline_order: int = 1, min_line_free: int = MIN_LINE_FREE,
                         scale_noise: bool = True) -> tuple[Stack, StackDetails]:
    """:func:`stack_target` and how it was made (:class:`StackDetails`)."""
    scans = list(scans)
    if not scans:
        raise ValueError("no scans to stack")
    for s in scans:
        if s.unit != "K":
            raise ValueError(f"{s.name}: DATA is in {s.unit!r}, not K")
    factors = [_brightness_factor(s) for s in scans]
    grid = _grid(scans, grid_step_km_s, v_range_km_s)
    ng = grid.size
    num, wsum, q = np.zeros(ng), np.zeros(ng), np.zeros(ng)
    n_rows, exposure, lons, lats, names = 0, 0.0, [], [], []
    total_rows = 0
    for s, (fac, _text) in zip(scans, factors, strict=True):
        used_n, exp_s, used = _accumulate(s, fac, grid, num, wsum, q)
        total_rows += s.n_rows
        n_rows += used_n
        exposure += exp_s
        lons.extend(s.glon_deg[used].tolist())
        lats.extend(s.glat_deg[used].tolist())
        if used_n:
            names.append(s.name)
    if n_rows == 0:
        raise ValueError(f"no row of {len(scans)} scan(s) has a usable channel (T_sys, "
                         "exposure or every channel flagged)")
    good = wsum > 0
    with np.errstate(invalid="ignore", divide="ignore"):
        tb = np.where(good, num / wsum, np.nan)
        sigma = np.where(good, np.sqrt(q) / wsum, np.nan)
    glon, glat = mean_position_deg(lons, lats)
    notes: list[str] = []

    # line window and line-free channels
    shifts = _ghost_shifts_km_s(scans)
    line, ghosts = expected_emission(grid, np.array([glon]), np.array([glat]))
    for sh in shifts:
        ghosts |= expected_emission(grid, np.array([glon]), np.array([glat]), sh)[1]
    candidates = good & ~line & ~ghosts

    # baseline
    fit = None
    order = int(baseline_order)
    if order >= 1 and not _both_sides(grid, candidates, line):
        # a slope fitted on one side of the line would be extrapolated across it (a few
        # line-free channels at one band edge, as a folded spectrum leaves): an offset at most
        notes.append("line-free channels on one side of the line only: baseline order 0")
        order = 0
    if order >= 0 and candidates.sum() >= max(MIN_BASELINE_CHANNELS, 2 * (order + 1)):
        try:
            fit = fit_baseline(np.where(good, tb, 0.0), ~candidates, grid, order)
        except ValueError as exc:
            notes.append(f"no baseline: {exc}")
    elif order >= 0:
        notes.append(f"no baseline: {int(candidates.sum())} line-free channels with data, "
                     f"need {max(MIN_BASELINE_CHANNELS, 2 * (order + 1))}")
    if fit is not None:
        resid = np.where(good, tb - fit.model(grid), np.nan)
        line_free = fit.line_free & good
        n_par = order + 1
    else:
        resid = tb
        line_free = candidates
        n_par = 0
        order = -1

    # measured noise
    n_lf = int(line_free.sum())
    scale, source = 1.0, "radiometer"
    pred_rms = float(np.median(sigma[line_free])) if n_lf else math.nan
    meas_rms = math.nan
    if scale_noise and n_lf >= max(int(min_line_free), n_par + 2):
        z = resid[line_free] / sigma[line_free]
        ratio = robust_sigma(z) * math.sqrt(n_lf / (n_lf - n_par))
        if math.isfinite(ratio) and ratio > 0:
            scale, source = float(ratio), "measured"
            meas_rms = pred_rms * scale
    elif scale_noise:
        # no line-free stretch (a folded spectrum whose line and ghosts fill the band): the
        # noise from channel-to-channel differences, d_j = T_j+1 - T_j, var d = s_j^2 + s_j+1^2
        # for independent channels; an HI profile changes little over one channel, so the
        # differences are noise (common practice); robust against the line's steep edges
        ok = np.isfinite(tb) & np.isfinite(sigma) & (sigma > 0)
        both = ok[1:] & ok[:-1]
        if both.sum() >= max(int(min_line_free), 8):
            d = (tb[1:] - tb[:-1])[both] / np.hypot(sigma[1:], sigma[:-1])[both]
            ratio = robust_sigma(d)
            if math.isfinite(ratio) and ratio > 0:
                scale, source = float(ratio), "differences"
                pred_rms = float(np.median(sigma[ok]))
                meas_rms = pred_rms * scale
        if source == "radiometer":
            notes.append(f"noise from the radiometer equation: {n_lf} line-free channels, "
                         f"need {max(int(min_line_free), n_par + 2)} to measure it")
    sigma = sigma * scale

    # line integral over the expected emission range, clipped to the grid
    half = 0.5 * (grid[1] - grid[0])
    lo, hi = expected_velocity_range_km_s(glon, glat)
    lo, hi = max(lo, float(grid[0] - half)), min(hi, float(grid[-1] + half))
    if lo < hi:
        ov = _overlap_widths(grid, lo, hi)
        inside = ov > 0
        filled, _n = fill_short_gaps(resid, inside)      # gaps of <= 8 channels, as the daemon
        sig_f, _n = fill_short_gaps(sigma, inside)
        window = inside & np.isfinite(filled)
        line_window = (lo, hi)
    else:
        window = np.zeros(ng, dtype=bool)
        line_window = (math.nan, math.nan)
    if window.any():
        integral = integrated_intensity_k_km_s(np.where(window, filled, 0.0), grid,
                                               good=window, v_range_km_s=line_window)
        w_k_km_s = integral.integral_k_km_s
        w_err = float(np.sqrt(np.sum((np.where(window, sig_f, 0.0) * ov) ** 2)))
    else:
        w_k_km_s, w_err = math.nan, math.nan
        notes.append("no data in the line window: no W, no N(HI)")
    nhi = float(column_density_cm2(w_k_km_s))
    nhi_err = float(column_density_cm2(w_err))

    # the fold's ghosts outside the line window hold no sky signal of their own (negative
    # copies of the line): left out of the profile, as the channels no row covered
    ghost_only = ghosts & ~line
    resid = np.where(ghost_only, np.nan, resid)
    sigma = np.where(ghost_only, np.nan, sigma)
    wsum = np.where(ghost_only, 0.0, wsum)
    stack = Stack(
        object=group_object(scans), glon_deg=glon, glat_deg=glat, v_km_s=grid, tb_k=resid,
        sigma_k=sigma, weight=wsum, exposure_s=exposure, n_rows=n_rows, n_scans=len(names),
        w_k_km_s=float(w_k_km_s), w_err_k_km_s=w_err, nhi_cm2=nhi, nhi_err_cm2=nhi_err,
        line_window_km_s=line_window, baseline_order=order, scans=tuple(names))
    details = StackDetails(
        noise_source=source, noise_scale=scale, n_line_free=n_lf, predicted_rms_k=pred_rms,
        measured_rms_k=meas_rms, line_free=line_free, line_window=window,
        baseline_coef=None if fit is None else fit.coef,
        baseline_rms_k=math.nan if fit is None else fit.rms_k,
        temperature_scale="; ".join(sorted({t for _f, t in factors})),
        rows_without_weight=total_rows - n_rows, notes=tuple(notes))
    return stack, details


def stack_target(scans: Sequence[ScanRows], *, grid_step_km_s: float | None = None,
                 v_range_km_s: tuple[float, float] | None = None, baseline_order: int = 1,
                 min_line_free: int = MIN_LINE_FREE, scale_noise: bool = True) -> Stack:
    """Stack the rows of the scans of one target (module notes for every step).

    Parameters
    ----------
    scans : sequence of ScanRows
        The scans of one target (:func:`spinflip.reduce.grouping.group_by_target`), in K.
    grid_step_km_s : float or None
        Grid step, km/s; None: the first row's channel width.
    v_range_km_s : (lo, hi) or None
        Clip the grid to this LSRK velocity range, km/s; None: every row's coverage.
    baseline_order : int
        Polynomial order of the baseline (0 .. 8); -1: no baseline.
    min_line_free : int
        Line-free channels needed to scale sigma to the measured rms (else radiometer).
    scale_noise : bool
        False: sigma is the radiometer prediction whatever the line-free channels say.

    Returns
    -------
    Stack
        T_B (main-beam brightness, K, baseline subtracted), sigma (K), summed weights (K^-2),
        W (K km/s), N(HI) (cm^-2, optically thin) and the rest.

    Raises
    ------
    ValueError
        No scans, a scan not in K, a bad TEMPSCAL/BEAMEFF, no usable row, a grid step <= 0 or
        a velocity range that misses the rows (one line each).
    """
    return stack_target_details(scans, grid_step_km_s=grid_step_km_s,
                                v_range_km_s=v_range_km_s, baseline_order=baseline_order,
                                min_line_free=min_line_free, scale_noise=scale_noise)[0]
