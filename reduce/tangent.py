"""Terminal velocities and the rotation curve by the tangent-point method.

In the inner Galaxy (first quadrant 0 < l < 90 deg, fourth quadrant 270 < l < 360 deg) a line of
sight at latitude b ~ 0 passes closest to the Galactic centre at the tangent point, at
Galactocentric radius ``R = R0 |sin l|``. For gas in circular rotation the line-of-sight velocity
there is the most extreme one the sightline can show (Binney & Merrifield 1998, sect. 9.1)::

    v_t = (Theta(R) - Theta0 |sin l|) cos b      first quadrant  (v_t > 0)
    v_t = -(Theta(R) - Theta0 |sin l|) cos b     fourth quadrant (v_t < 0)

so ``Theta(R) = s v_t / cos b + Theta0 |sin l|`` with s = +1 in the first quadrant and -1 in the
fourth; for the expected sign of v_t that is ``|v_t| / cos b + Theta0 |sin l|``. (The signed form
is kept so that a terminal velocity of the unexpected sign, possible near l = 90 deg where v_t
is about 0, gives a Theta below Theta0 |sin l| instead of a mirrored one.) ``cos b`` is the
projection of the in-plane rotation onto a sightline at latitude b; R is the in-plane radius of
the tangent point, ``R0 |sin l|`` for any b.

Edge criterion (first quadrant; the fourth is its mirror image, v -> -v)
------------------------------------------------------------------------
1. The profile is smoothed with a Gaussian of ``smooth_km_s`` FWHM (3 km/s by default; no
   smoothing when the channels are wider) and its noise ``sigma_s`` taken as the larger of the
   stack's per-channel noise carried through the smoothing and the robust rms of the smoothed
   profile outside the stack's line window.
2. The level is ``max(level_sigma * sigma_s, floor_k)`` (3 sigma and 2 K by default). The edge
   ``v_edge`` is the highest velocity at which the smoothed profile falls through the level at
   the high end of a contiguous run of channels at or above it at least ``min_run_km_s`` long
   (5 km/s), linearly interpolated between the two channels that bracket the crossing.
3. The gas at the tangent point has a velocity dispersion sigma_v (``DISPERSION_KM_S``), so its
   emission reaches beyond v_t: a Gaussian of peak T_p falls to the level at
   ``v_t + sigma_v sqrt(2 ln(T_p / level))``. T_p is the peak of the smoothed profile within
   ``peak_window_km_s`` (2.5 sigma_v by default) inside the edge, and
   ``v_t = v_edge - sigma_v sqrt(2 ln(T_p / level))``.

Uncertainty, in quadrature: (a) from the noise, half the spread of v_t found with the level moved
by +-sigma_s (at least half a channel); (b) from the criterion, the dispersion correction times
the relative uncertainty of sigma_v (20 %: the 7-10 km/s range), and (c) how far v_t moves when
the level is doubled (zero if the edge were exactly the Gaussian of step 3: a measured misfit of
the model; half the correction when the doubled level finds no edge).
``theta_err = v_t_err / cos b`` (R0 and Theta0 taken as exact: their own uncertainty is a
systematic common to every point).

Longitudes nearer than ``lon_margin_deg`` to 0 or 90 (270, 360) deg give no point: near l = 0 the
tangent point falls into the bar, where the motions are not circular; near l = 90 (270) deg
v_t -> 0 and the edge is that of the local gas. Targets with |b| > ``max_glat_deg`` give none
either (the sightline leaves the gas layer before the tangent point).

References
----------
Binney, J. & Merrifield, M. 1998, *Galactic Astronomy* (Princeton), sect. 9.1 (tangent-point
method, terminal velocity).
Velocity dispersion of the HI gas, about 7-10 km/s (common practice; value from memory).
"""

from __future__ import annotations

import math
from collections.abc import Callable, Iterable
from dataclasses import dataclass

import numpy as np

from spinflip.reduce.constants import GalacticConstants
from spinflip.reduce.profile import Stack

#: One-dimensional velocity dispersion of the HI gas, km/s. Values of about 7-10 km/s are common
#: practice for the (warm plus cold) HI of the disk (from memory); 8 km/s is used here.
DISPERSION_KM_S = 8.0

_FWHM_PER_SIGMA = 2.0 * math.sqrt(2.0 * math.log(2.0))
_MAD_TO_SIGMA = 1.4826          # rms of a Gaussian per median absolute deviation


@dataclass(frozen=True)
class TerminalPoint:
    """One longitude's terminal velocity and the rotation-curve point it gives.

    Velocities in km/s (LSRK), radii in kpc, angles in degrees, ``level_k`` in kelvin:
    ``edge_km_s`` is the edge where the smoothed profile falls through ``level_k``, before the
    dispersion correction; ``quadrant`` is 1 or 4.
    """

    object: str
    glon_deg: float
    glat_deg: float
    quadrant: int
    v_terminal_km_s: float
    v_terminal_err_km_s: float
    r_kpc: float
    theta_km_s: float
    theta_err_km_s: float
    edge_km_s: float
    level_k: float


def _smooth(tb: np.ndarray, dv: float, fwhm_km_s: float) -> tuple[np.ndarray, float]:
    """Gaussian smoothing that skips NaN channels; returns (smoothed, noise factor).

    The noise factor is ``sqrt(sum k^2) / sum k`` for the kernel k: the rms of smoothed white
    noise per unit rms of the input.
    """
    sig_ch = fwhm_km_s / _FWHM_PER_SIGMA / dv
    if sig_ch < 0.5:
        return tb.copy(), 1.0
    half = int(math.ceil(3 * sig_ch))
    k = np.exp(-0.5 * (np.arange(-half, half + 1) / sig_ch) ** 2)
    good = np.isfinite(tb)
    num = np.convolve(np.where(good, tb, 0.0), k, mode="same")
    den = np.convolve(good.astype(float), k, mode="same")
    with np.errstate(invalid="ignore", divide="ignore"):
        out = np.where(den > 0.5 * k.sum(), num / den, np.nan)
    return out, float(np.sqrt(np.sum(k ** 2)) / k.sum())


def _edge(u: np.ndarray, t: np.ndarray, level: float, min_run: float) -> float | None:
    """Highest u where t (ascending u) falls through ``level`` after a run >= min_run above it.

    None when no run is long enough, or the highest such run reaches the end of the grid (the
    crossing is not bracketed).
    """
    above = np.isfinite(t) & (t >= level)
    if not above.any():
        return None
    d = np.diff(np.concatenate(([0], above.astype(np.int8), [0])))
    starts, ends = np.flatnonzero(d == 1), np.flatnonzero(d == -1) - 1     # inclusive ends
    du = u[1] - u[0]
    for s, e in zip(starts[::-1], ends[::-1], strict=True):
        if (e - s + 1) * du < min_run:
            continue
        if e + 1 >= len(u) or not np.isfinite(t[e + 1]):
            return None
        frac = (t[e] - level) / (t[e] - t[e + 1])
        return float(u[e] + frac * du)
    return None


def _terminal(u: np.ndarray, t: np.ndarray, level: float, min_run: float, sigma_v: float,
              peak_window: float) -> tuple[float, float, float] | None:
    """(v_t, edge, correction) in the ascending-u frame, or None."""
    edge = _edge(u, t, level, min_run)
    if edge is None:
        return None
    inside = (u >= edge - peak_window) & (u <= edge) & np.isfinite(t)
    t_p = float(np.max(t[inside])) if inside.any() else level
    corr = sigma_v * math.sqrt(2.0 * math.log(t_p / level)) if t_p > level else 0.0
    return edge - corr, edge, corr


def terminal_velocity(stack: Stack, consts: GalacticConstants, *, level_sigma: float = 3.0,
                      dispersion_km_s: float = DISPERSION_KM_S, floor_k: float = 2.0,
                      smooth_km_s: float = 3.0, min_run_km_s: float = 5.0,
                      peak_window_km_s: float | None = None, lon_margin_deg: float = 5.0,
                      max_glat_deg: float = 5.0,
                      dispersion_rel_err: float = 0.2) -> TerminalPoint | None:
    """Terminal velocity of one stack by the edge criterion of the module docstring.

    Parameters
    ----------
    stack : Stack
        The target's stacked profile (T_B and its noise on an ascending uniform LSRK grid).
    consts : GalacticConstants
        R0 and Theta0.
    level_sigma : float
        The edge level in units of the smoothed profile's noise.
    dispersion_km_s : float
        Velocity dispersion sigma_v of the gas at the tangent point, km/s.
    floor_k : float
        The level is never below this, K (guards against baseline ripple on very deep stacks,
        and keeps the edge off the far wings a wide beam adds from neighbouring longitudes).
        On five simulated plane surveys (l = 10..80 step 5, 10 s per target) the largest
        Theta error for 3 < R < 8 kpc was 2.9-3.5 km/s with 2 K and 3.7-3.8 km/s with 6 K.
    smooth_km_s : float
        FWHM of the Gaussian smoothing, km/s.
    min_run_km_s : float
        Shortest run of channels above the level that counts as emission, km/s.
    peak_window_km_s : float or None
        How far inside the edge T_p is looked for, km/s; None: 2.5 sigma_v.
    lon_margin_deg : float
        Longitudes within this of 0, 90, 270 or 360 deg give no point.
    max_glat_deg : float
        Largest |b| that gives a point, deg.
    dispersion_rel_err : float
        Relative uncertainty of sigma_v (0.2: the 7-10 km/s range about 8 km/s).

    Returns
    -------
    TerminalPoint or None
        None when l is not in the inner Galaxy (with the margins), |b| is too large, the stack
        has no noise estimate, or no edge is found.
    """
    lon = float(stack.glon_deg) % 360.0
    if lon_margin_deg <= lon <= 90.0 - lon_margin_deg:
        quadrant = 1
    elif 270.0 + lon_margin_deg <= lon <= 360.0 - lon_margin_deg:
        quadrant = 4
    else:
        return None
    if abs(stack.glat_deg) > max_glat_deg:
        return None
    v = np.asarray(stack.v_km_s, dtype=float)
    tb = np.asarray(stack.tb_k, dtype=float)
    if v.size < 3:
        return None
    dv = float(v[1] - v[0])
    smoothed, factor = _smooth(tb, dv, smooth_km_s)
    sig = np.asarray(stack.sigma_k, dtype=float)
    sig = sig[np.isfinite(sig) & (sig > 0)]
    noise = float(np.median(sig)) * factor if sig.size else 0.0
    lo, hi = stack.line_window_km_s
    free = np.isfinite(smoothed) & ((v < lo) | (v > hi))
    if free.sum() >= 10:
        med = np.median(smoothed[free])
        noise = max(noise, _MAD_TO_SIGMA * float(np.median(np.abs(smoothed[free] - med))))
    if not noise > 0:
        return None
    level = max(level_sigma * noise, floor_k)
    # the first quadrant's frame; the fourth is mirrored (u = -v, ascending)
    if quadrant == 1:
        u, t = v, smoothed
    else:
        u, t = -v[::-1], smoothed[::-1]
    window = 2.5 * dispersion_km_s if peak_window_km_s is None else peak_window_km_s
    run = max(min_run_km_s, dv)
    found = _terminal(u, t, level, run, dispersion_km_s, window)
    if found is None:
        return None
    ut, edge, corr = found
    spread = []
    for lev in (level + noise, level - noise):
        other = _terminal(u, t, lev, run, dispersion_km_s, window)
        if other is not None:
            spread.append(other[0])
    err_noise = (max(spread) - min(spread)) / 2.0 if len(spread) == 2 else corr
    err_noise = max(err_noise, abs(dv) / 2.0)
    doubled = _terminal(u, t, 2.0 * level, run, dispersion_km_s, window)
    misfit = abs(doubled[0] - ut) if doubled is not None else corr / 2.0
    err = math.hypot(err_noise, dispersion_rel_err * corr, misfit)
    sign = 1.0 if quadrant == 1 else -1.0
    v_t = sign * ut
    sin_l = abs(math.sin(math.radians(lon)))
    cos_b = math.cos(math.radians(stack.glat_deg))
    return TerminalPoint(
        object=stack.object, glon_deg=float(stack.glon_deg), glat_deg=float(stack.glat_deg),
        quadrant=quadrant, v_terminal_km_s=v_t, v_terminal_err_km_s=err,
        r_kpc=consts.r0_kpc * sin_l,
        theta_km_s=sign * v_t / cos_b + consts.theta0_km_s * sin_l,
        theta_err_km_s=err / cos_b, edge_km_s=sign * edge, level_k=level)


def rotation_curve(points: Iterable[TerminalPoint | None]) -> list[TerminalPoint]:
    """The points sorted by radius (then longitude); None entries are dropped."""
    return sorted((p for p in points if p is not None), key=lambda p: (p.r_kpc, p.glon_deg))


def keplerian_km_s(r_kpc: np.ndarray, r_in_kpc: float, theta_in_km_s: float) -> np.ndarray:
    """Circular speed if all mass were inside the innermost point: ``theta_in sqrt(r_in / R)``.

    A point mass M gives ``Theta = sqrt(G M / R)`` (Kepler); scaled so that Theta(r_in) =
    theta_in, which fixes G M = r_in theta_in^2.
    """
    r = np.asarray(r_kpc, dtype=float)
    return theta_in_km_s * np.sqrt(r_in_kpc / r)


def interpolated_curve(points: Iterable[TerminalPoint],
                       consts: GalacticConstants) -> Callable[[np.ndarray], np.ndarray]:
    """A callable Theta(R) (km/s, R in kpc, vectorised) from measured points.

    Linear interpolation between the points (sorted by R; several at one R averaged); inside the
    innermost point a solid-body rise ``Theta_in R / R_in``; from the outermost point linearly to
    Theta0 at R0, and flat at Theta0 beyond. With no points, flat at Theta0.
    """
    pts = rotation_curve(points)
    r0, t0 = consts.r0_kpc, consts.theta0_km_s
    rr = np.array([p.r_kpc for p in pts if p.r_kpc < r0], dtype=float)
    tt = np.array([p.theta_km_s for p in pts if p.r_kpc < r0], dtype=float)
    if rr.size:
        ur, inv = np.unique(rr, return_inverse=True)
        ut = np.bincount(inv, weights=tt) / np.bincount(inv)
        rr, tt = ur, ut

    def curve(r_kpc: np.ndarray) -> np.ndarray:
        r = np.asarray(r_kpc, dtype=float)
        if rr.size == 0:
            return np.full_like(r, t0)
        xs = np.concatenate((rr, [r0]))
        ys = np.concatenate((tt, [t0]))
        out = np.interp(r, xs, ys)
        return np.where(r < rr[0], tt[0] * r / rr[0], out)

    return curve
