"""Hot/cold-load (Y-factor) formulas: receiver and system temperature, gain, noise source.

Two loads of known brightness temperature fill the beam of the feed in turn: a hot load (an
absorber at ambient temperature covering the feed, or the ground) and a cold load (the cold
sky near the zenith, a few K). A linear receiver of power gain G (counts per K) and noise
temperature Trx then delivers the band-averaged powers

    P_hot  = G (T_hot  + Trx)
    P_cold = G (T_cold + Trx)

and, with the Y factor Y = P_hot / P_cold,

    Trx    = (T_hot - Y T_cold) / (Y - 1)
    G      = (P_hot - P_cold) / (T_hot - T_cold)          counts per K
    Tsys   = Trx + T_cold                                 on the cold sky

A noise source switched on while the feed sees the cold load adds its excess temperature T_cal:
P_cold+cal = G (T_cold + Trx + T_cal), so T_cal = (P_cold+cal - P_cold) / G, which later scans
use to calibrate without the loads.

Physical limits: 1 < Y < T_hot / T_cold. Y <= 1 means the hot load did not raise the power;
Y >= T_hot / T_cold would make Trx <= 0 K (the cold load saw more than T_cold, or the load
temperatures are wrong). The method assumes the receiver is linear from P_cold to P_hot: an
8-bit dongle that clips under the hot load under-reports P_hot, which lowers Y and raises Trx.

Noise figure (IEEE standard definition, reference temperature T0 = 290 K):
F = 1 + T / T0, NF = 10 log10(F) dB.

Units: powers in counts (band-averaged power in the caller's scale, the same for every load),
temperatures in K, frequencies in Hz, times in s, times of day in UTC.

References
----------
Friis, H. T. 1944, Proc. IRE 32, 419 (noise figure of a receiver; from memory).
IRE Standards on Methods of Measuring Noise in Linear Twoports, 1959, Proc. IRE 48, 60 (1960):
noise temperature and noise figure, reference temperature T0 = 290 K (from memory).
Agilent Technologies, Application Note 57-1, Fundamentals of RF and Microwave Noise Figure
Measurements (the Y-factor hot/cold method; from memory).
Wilson, T. L., Rohlfs, K. & Huttemeister, S., Tools of Radio Astronomy (receiver temperature
from hot and cold loads).
"""

from __future__ import annotations

import math
import numbers


class LoadsError(ValueError):
    """A hot/cold-load measurement, record or setting that cannot be used (one-line message)."""


#: Reference temperature of the noise figure, K (IEEE / IRE standard definition).
T0_K = 290.0
#: Highest hot-load temperature accepted, K (an absorber at ambient temperature, or the ground).
MAX_HOT_LOAD_K = 400.0


def _finite(value: object, what: str) -> float:
    if isinstance(value, bool) or not isinstance(value, numbers.Real):
        raise LoadsError(f"{what} = {value!r}: expected a number")
    v = float(value)
    if not math.isfinite(v):
        raise LoadsError(f"{what} = {v!r}: expected a finite number")
    return v


def _power(value: object, what: str) -> float:
    v = _finite(value, what)
    if v <= 0.0:
        raise LoadsError(f"{what} = {v:g} counts: expected above 0")
    return v


def check_load_temperatures(t_hot_k: float, t_cold_k: float) -> tuple[float, float]:
    """Check the two load temperatures; return them as floats.

    Parameters
    ----------
    t_hot_k : float
        Hot-load brightness temperature, K: above 0 and at most :data:`MAX_HOT_LOAD_K`.
    t_cold_k : float
        Cold-load brightness temperature, K: above 0 and below ``t_hot_k``.

    Returns
    -------
    (float, float)
        ``t_hot_k``, ``t_cold_k``.

    Raises
    ------
    LoadsError
        One line naming the temperature, its value and what is allowed.
    """
    th = _finite(t_hot_k, "hot load temperature t_hot_k")
    tc = _finite(t_cold_k, "cold load temperature t_cold_k")
    if th <= 0.0:
        raise LoadsError(f"hot load temperature t_hot_k = {th:g} K: expected above 0 K")
    if th > MAX_HOT_LOAD_K:
        raise LoadsError(f"hot load temperature t_hot_k = {th:g} K: expected at most "
                         f"{MAX_HOT_LOAD_K:g} K (an absorber at ambient temperature)")
    if tc <= 0.0:
        raise LoadsError(f"cold load temperature t_cold_k = {tc:g} K: expected above 0 K")
    if tc >= th:
        raise LoadsError(f"cold load temperature t_cold_k = {tc:g} K is not below the hot load "
                         f"t_hot_k = {th:g} K: expected t_cold_k < t_hot_k")
    return th, tc


def y_factor(p_hot: float, p_cold: float) -> float:
    """Y factor, the ratio of the band-averaged powers on the hot and the cold load.

    Parameters
    ----------
    p_hot, p_cold : float
        Band-averaged power with the hot and with the cold load on the feed, counts (> 0).

    Returns
    -------
    float
        Y = P_hot / P_cold (dimensionless).

    Notes
    -----
    With a linear receiver P = G (T_load + Trx), so Y = (T_hot + Trx) / (T_cold + Trx).

    References
    ----------
    Agilent Application Note 57-1 (Y-factor method; from memory).
    """
    return _power(p_hot, "hot-load power p_hot") / _power(p_cold, "cold-load power p_cold")


def receiver_temperature_k(y: float, t_hot_k: float, t_cold_k: float) -> float:
    """Receiver noise temperature from the Y factor of two loads.

    Parameters
    ----------
    y : float
        Y = P_hot / P_cold; must satisfy 1 < Y < t_hot_k / t_cold_k.
    t_hot_k, t_cold_k : float
        Load temperatures, K (see :func:`check_load_temperatures`).

    Returns
    -------
    float
        Trx = (T_hot - Y T_cold) / (Y - 1), K (> 0).

    Raises
    ------
    LoadsError
        Y <= 1 (the hot load did not raise the power), Y >= T_hot / T_cold (Trx would not be
        positive), or bad load temperatures.

    Notes
    -----
    Solve Y (T_cold + Trx) = T_hot + Trx for Trx.

    References
    ----------
    Agilent Application Note 57-1 (from memory); Wilson, Rohlfs & Huttemeister, Tools of Radio
    Astronomy.
    """
    th, tc = check_load_temperatures(t_hot_k, t_cold_k)
    yv = _finite(y, "Y factor")
    if yv <= 1.0:
        raise LoadsError(f"Y = {yv:.4g} is not above 1: the hot load did not raise the power; "
                         "check that the absorber covers the feed and that the gain is not "
                         "clipping")
    if yv >= th / tc:
        raise LoadsError(f"Y = {yv:.4g} is not below T_hot/T_cold = {th / tc:.4g}: that would "
                         "make Trx <= 0 K; check the load temperatures and that the cold load "
                         "saw only the cold sky")
    return (th - yv * tc) / (yv - 1.0)


def system_temperature_k(trx_k: float, t_load_k: float) -> float:
    """System temperature with a load on the feed: Tsys = Trx + T_load, K.

    Parameters
    ----------
    trx_k : float
        Receiver noise temperature, K.
    t_load_k : float
        Brightness temperature the feed sees, K (the cold sky for the cold load).

    Returns
    -------
    float
        Tsys, K.

    References
    ----------
    Wilson, Rohlfs & Huttemeister, Tools of Radio Astronomy (system temperature).
    """
    return _finite(trx_k, "receiver temperature trx_k") + _finite(t_load_k, "load temperature")


def gain_counts_per_k(p_hot: float, p_cold: float, t_hot_k: float, t_cold_k: float) -> float:
    """Receiver power gain from two loads, counts per K.

    Parameters
    ----------
    p_hot, p_cold : float
        Band-averaged powers on the hot and the cold load, counts (> 0).
    t_hot_k, t_cold_k : float
        Load temperatures, K.

    Returns
    -------
    float
        G = (P_hot - P_cold) / (T_hot - T_cold), counts per K (> 0).

    Raises
    ------
    LoadsError
        P_hot <= P_cold, non-positive powers or bad load temperatures.

    Notes
    -----
    Difference of P = G (T_load + Trx) for the two loads; Trx cancels.
    """
    th, tc = check_load_temperatures(t_hot_k, t_cold_k)
    ph = _power(p_hot, "hot-load power p_hot")
    pc = _power(p_cold, "cold-load power p_cold")
    if ph <= pc:
        raise LoadsError(f"hot-load power {ph:g} counts is not above the cold-load power "
                         f"{pc:g} counts: check that the absorber covers the feed")
    return (ph - pc) / (th - tc)


def noise_source_k_from_loads(p_cold_cal: float, p_cold: float, gain_counts_per_k: float) -> float:
    """Excess temperature of a noise source measured on the cold load, K.

    Parameters
    ----------
    p_cold_cal : float
        Band-averaged power on the cold load with the noise source on, counts.
    p_cold : float
        The same with the noise source off, counts.
    gain_counts_per_k : float
        Receiver gain G from :func:`gain_counts_per_k`, counts per K.

    Returns
    -------
    float
        T_cal = (P_cold+cal - P_cold) / G, K (> 0).

    Raises
    ------
    LoadsError
        The noise source did not raise the power, or a non-positive input.

    Notes
    -----
    P_cold+cal = G (T_cold + Trx + T_cal) minus P_cold = G (T_cold + Trx).
    """
    pcc = _power(p_cold_cal, "cold-load + noise source power p_cold_cal")
    pc = _power(p_cold, "cold-load power p_cold")
    g = _finite(gain_counts_per_k, "gain_counts_per_k")
    if g <= 0.0:
        raise LoadsError(f"gain_counts_per_k = {g:g}: expected above 0 counts per K")
    if pcc <= pc:
        raise LoadsError(f"power with the noise source on ({pcc:g} counts) is not above the power "
                         f"with it off ({pc:g} counts): check that the noise source is connected "
                         "and switches")
    return (pcc - pc) / g


def noise_temperature_k(noise_figure_db: float) -> float:
    """Noise temperature of a noise figure: T = T0 (F - 1), F = 10^(NF/10), T0 = 290 K.

    Parameters
    ----------
    noise_figure_db : float
        Noise figure NF, dB (>= 0).

    Returns
    -------
    float
        Noise temperature, K.

    References
    ----------
    IRE Standards on Methods of Measuring Noise in Linear Twoports, Proc. IRE 48, 60 (1960);
    Friis 1944 (both from memory).
    """
    nf = _finite(noise_figure_db, "noise figure")
    if nf < 0.0:
        raise LoadsError(f"noise figure = {nf:g} dB: expected at least 0 dB (F >= 1)")
    return T0_K * (10.0 ** (nf / 10.0) - 1.0)


def noise_figure_db(t_k: float) -> float:
    """Noise figure of a noise temperature: NF = 10 log10(1 + T / T0) dB, T0 = 290 K.

    Parameters
    ----------
    t_k : float
        Noise temperature, K (>= 0).

    Returns
    -------
    float
        Noise figure, dB; the inverse of :func:`noise_temperature_k`.

    References
    ----------
    IRE Standards on Methods of Measuring Noise in Linear Twoports, Proc. IRE 48, 60 (1960)
    (from memory).
    """
    t = _finite(t_k, "noise temperature")
    if t < 0.0:
        raise LoadsError(f"noise temperature = {t:g} K: expected at least 0 K")
    return 10.0 * math.log10(1.0 + t / T0_K)
