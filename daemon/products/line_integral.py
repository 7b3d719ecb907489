"""Line integrals of a calibrated HI spectrum and the numbers that go with them.

* :func:`integrated_intensity_k_km_s`: W = integral T_B dv over a velocity range, K km/s.
* :func:`column_density_cm2`: N(HI) = 1.823e18 W cm^-2 (optically thin).
* :func:`brightness_from_antenna_k`: main-beam brightness T_mb = T_A / eta_mb.
* :func:`radiometer_noise_k`: Delta T = K T_sys / sqrt(B t).

References
----------
Dickey, J. M. & Lockman, F. J. 1990, ARA&A 28, 215 (N_HI = 1.823e18 int T_B dv, optically thin).
Kutner, M. L. & Ulich, B. L. 1981, ApJ 250, 341 (temperature scales of single-dish antennas).
Wilson, T. L., Rohlfs, K. & Huttemeister, S., *Tools of Radio Astronomy* (radiometer equation;
main-beam brightness temperature).
"""

from __future__ import annotations

import math
from collections.abc import Sequence
from typing import NamedTuple

import numpy as np
import numpy.typing as npt

from spinflip.daemon.sky.hi_line import HI_COLUMN_PER_K_KM_S_CM2
from spinflip.daemon.sky.spectral_axis import monotonic_axis

#: Radiometer-equation factor K for a total-power measurement (Wilson, Rohlfs & Huttemeister).
K_TOTAL_POWER = 1.0

#: Radiometer-equation factor K for a switched difference, t the time in each phase (same source).
K_SWITCHED = math.sqrt(2.0)


class LineIntegral(NamedTuple):
    """Result of :func:`integrated_intensity_k_km_s`.

    Attributes
    ----------
    integral_k_km_s : float
        sum_i T_i w_i over the good channels, K km/s (NaN when no good channel is in range).
    covered_km_s : float
        sum_i w_i over the good channels: the velocity width the integral actually covers, km/s.
    span_km_s : float
        The same sum over all channels, good or not: the part of the requested range that the
        axis covers, km/s. ``covered_km_s < span_km_s`` means excluded channels in the range.
    """

    integral_k_km_s: float
    covered_km_s: float
    span_km_s: float


def integrated_intensity_k_km_s(tb_k: npt.ArrayLike, v_km_s: npt.ArrayLike,
                                good: npt.ArrayLike | None = None,
                                v_range_km_s: Sequence[float] | None = None) -> LineIntegral:
    """Integrated intensity W = integral T_B dv of a channelised spectrum, K km/s.

    Parameters
    ----------
    tb_k : array_like, float[nchan]
        Brightness temperature per channel, K (a baseline-subtracted spectrum).
    v_km_s : array_like, float[nchan]
        Channel-centre velocities, km/s, strictly monotonic in either direction.
    good : array_like, bool[nchan], optional
        Channels to use (e.g. ``~flagged``); default all. Non-finite T_B counts as not good.
    v_range_km_s : (float, float), optional
        Integrate over lo <= v <= hi only; lo < hi, and the range must overlap the axis.
        Default: the whole axis.

    Returns
    -------
    LineIntegral
        ``(integral_k_km_s, covered_km_s, span_km_s)``; unpacks as a tuple.

    Raises
    ------
    ValueError
        Mismatched shapes, fewer than 2 channels, a non-monotonic axis, lo >= hi, or a range
        that misses the axis.

    Notes
    -----
    A spectrometer channel holds the mean of T_B over its width, not a sample at its centre,
    so the integral is the channel sum (no trapezoid rule)::

        W = sum_i T_i w_i,     w_i = |[e_i, e_{i+1}] intersected with [lo, hi]|

    with channel edges e half-way between neighbouring centres (the outer edges half a spacing
    beyond the end centres). Without a range, w_i = |dv_i|, the channel width. With a range,
    a channel on its border counts with the fraction of its width inside it, so W does not
    jump as the range moves across a channel.

    Excluded channels (not good) are left out, not interpolated: W is then the integral over
    the covered width only and underestimates a line that runs through the gap. Compare
    ``covered_km_s`` with ``span_km_s``; where the gap lies in line-free baseline it costs
    nothing, and a caller that accepts a mean fill can scale W by span / covered.
    """
    t = np.asarray(tb_k, dtype=np.float64)
    ok = np.ones(t.shape, dtype=bool) if good is None else np.asarray(good, dtype=bool)
    if t.ndim != 1 or ok.shape != t.shape:
        raise ValueError(f"tb_k and good must be 1-D of one length; got shapes "
                         f"{t.shape}, {ok.shape}")
    v = monotonic_axis(v_km_s, "v_km_s", t.size)

    # channel edges in increasing velocity: midpoints, outer edges half a spacing out
    order = np.argsort(v)
    vs = v[order]
    mid = 0.5 * (vs[1:] + vs[:-1])
    edges = np.concatenate(([vs[0] - (mid[0] - vs[0])], mid, [vs[-1] + (vs[-1] - mid[-1])]))
    lo_e, hi_e = edges[:-1], edges[1:]

    if v_range_km_s is None:
        lo, hi = edges[0], edges[-1]
    else:
        try:
            lo, hi = (float(b) for b in v_range_km_s)
        except (TypeError, ValueError):
            raise ValueError(f"v_range_km_s must be a (lo, hi) pair in km/s; "
                             f"got {v_range_km_s!r}") from None
        if not lo < hi:
            raise ValueError(f"v_range_km_s ({lo:g}, {hi:g}) must have lo < hi")
        if hi <= edges[0] or lo >= edges[-1]:
            raise ValueError(f"v_range_km_s ({lo:g}, {hi:g}) km/s misses the axis "
                             f"[{edges[0]:g}, {edges[-1]:g}] km/s")
    # w_i = overlap of channel i with [lo, hi], km/s
    w = np.clip(np.minimum(hi_e, hi) - np.maximum(lo_e, lo), 0.0, None)
    t_s = t[order]
    use = ok[order] & np.isfinite(t_s) & (w > 0)
    span_km_s = float(w.sum())
    covered_km_s = float(w[use].sum())
    if not use.any():
        return LineIntegral(math.nan, 0.0, span_km_s)
    integral = float(np.sum(t_s[use] * w[use]))              # W = sum_i T_i w_i
    return LineIntegral(integral, covered_km_s, span_km_s)


def column_density_cm2(integral_k_km_s: npt.ArrayLike) -> float | np.ndarray:
    """HI column density from the line integral, optically thin, cm^-2.

    Parameters
    ----------
    integral_k_km_s : float or array_like
        W = integral T_B dv, K km/s.

    Returns
    -------
    float or ndarray
        N(HI) = 1.823e18 W, cm^-2 (float for a scalar input).

    Notes
    -----
    Valid where tau << 1 everywhere in the line; with self-absorption it is a lower limit.

    References
    ----------
    Dickey, J. M. & Lockman, F. J. 1990, ARA&A 28, 215.
    """
    n_cm2 = HI_COLUMN_PER_K_KM_S_CM2 * np.asarray(integral_k_km_s, dtype=np.float64)
    return float(n_cm2) if n_cm2.ndim == 0 else n_cm2


def brightness_from_antenna_k(ta_k: npt.ArrayLike,
                              main_beam_efficiency: float) -> float | np.ndarray:
    """Main-beam brightness temperature T_mb = T_A / eta_mb, K.

    Parameters
    ----------
    ta_k : float or array_like
        Antenna temperature T_A (corrected for atmosphere and losses as the calibration did), K.
    main_beam_efficiency : float
        eta_mb, in (0, 1].

    Returns
    -------
    float or ndarray
        T_mb, K (float for a scalar input).

    Notes
    -----
    T_mb equals the source brightness temperature for a source that fills the main beam and
    no more; for HI, extended over the whole sky, it is the common choice. Kutner & Ulich
    (1981) define the temperature scales; dividing by eta_mb is common practice.

    References
    ----------
    Kutner, M. L. & Ulich, B. L. 1981, ApJ 250, 341.
    """
    eta = float(main_beam_efficiency)
    if not 0.0 < eta <= 1.0:
        raise ValueError(f"main_beam_efficiency must be in (0, 1]; got {main_beam_efficiency!r}")
    t_mb_k = np.asarray(ta_k, dtype=np.float64) / eta       # T_mb = T_A / eta_mb
    return float(t_mb_k) if t_mb_k.ndim == 0 else t_mb_k


def radiometer_noise_k(tsys_k: float, bandwidth_hz: float, time_s: float,
                       k_factor: float = K_TOTAL_POWER) -> float:
    """Expected rms noise of a spectrum channel, Delta T = K T_sys / sqrt(B t), K.

    Parameters
    ----------
    tsys_k : float
        System temperature, K, > 0.
    bandwidth_hz : float
        Noise bandwidth B of the channel, Hz, > 0.
    time_s : float
        Integration time t, s, > 0. For a switched difference: the time in each phase.
    k_factor : float
        K: :data:`K_TOTAL_POWER` (1) for total power, :data:`K_SWITCHED` (sqrt 2) for the
        switched difference; > 0.

    Returns
    -------
    float
        Delta T, K.

    References
    ----------
    Wilson, T. L., Rohlfs, K. & Huttemeister, S., *Tools of Radio Astronomy* (radiometer
    equation).
    """
    for name, value in (("tsys_k", tsys_k), ("bandwidth_hz", bandwidth_hz), ("time_s", time_s),
                        ("k_factor", k_factor)):
        if not (math.isfinite(float(value)) and float(value) > 0):
            raise ValueError(f"{name} must be a finite number > 0; got {value!r}")
    return float(k_factor) * float(tsys_k) / math.sqrt(float(bandwidth_hz) * float(time_s))
