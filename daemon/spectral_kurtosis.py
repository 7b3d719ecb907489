"""Spectral kurtosis (SK) of accumulated power spectra: estimator, moments, flagging thresholds.

Estimator
    Per channel the spectrometer keeps S1 = sum_i P_i and S2 = sum_i P_i^2 over M power
    spectra. Each P_i may itself be the sum of N raw powers (N = 1 here: one channelizer
    spectrum per accumulation), and d is the shape parameter of one raw power: d = 1 for the
    power |X|^2 of a complex Gaussian channel output (exponential, chi-square with 2 degrees of
    freedom). For Gaussian noise P_i then follows a gamma distribution of shape a = N d. The
    generalised SK estimator (Nita & Gary 2010b, eq. 8) is::

        SK = (M a + 1) / (M - 1) * (M S2 / S1^2 - 1),        a = N d,

    whose expectation is exactly 1 for Gaussian noise, at every M >= 2. A steady carrier makes
    the power less variable than noise (SK < 1, towards 0 for a strong one); intermittent
    interference makes it more variable (SK > 1).

Moments (Gaussian noise)
    The ratio R = S2 / S1^2 does not depend on the power scale, so it is independent of S1
    (Basu's theorem: S1 is complete and sufficient for the gamma scale), and
    E[R^k] = E[S2^k] / E[S1^(2k)] with S1 ~ Gamma(M a) and E[S2^k] from the raw moments
    E[P^j] = Gamma(a + j) / Gamma(a) of the powers. Worked through for k = 1, 2, 3 this gives
    the mean 1 and the central moments::

        mu2 = 2 a (a + 1) M^2 Gamma(M a + 2) / ((M - 1) Gamma(M a + 4))
            = 2 a (a + 1) M^2 / ((M - 1) (M a + 2) (M a + 3))                   (~ 4 / M, a = 1)

        mu3 = 8 a (a + 1) M^3 Gamma(M a + 2) ((a + 4) M a - 5 a - 2)
              / ((M - 1)^2 Gamma(M a + 6))                                       (~ 80 / M^2, a = 1)

    mu2 is Nita & Gary (2010b, eq. 9); mu3 was quoted from memory of the same paper and
    agrees exactly with the derivation above (a symbolic check, and Monte Carlo on exponential
    powers in the tests). The gamma-function ratios are evaluated as exp of differences of
    ``scipy.special.gammaln``, so M up to 10^6 and beyond stays finite.

Thresholds: Pearson type III
    The SK distribution is skewed (skewness g = mu3 / mu2^(3/2) ~ 10 / sqrt(M) for a = 1:
    1.25 at M = 64), so symmetric thresholds 1 +- z sqrt(4 / M) give far too many false alarms
    on the upper side and too few on the lower side at the M of a few-millisecond block.
    Following Nita & Gary (2010a, 2010b) and Nita (2016), who use Pearson curves matched to the
    estimator's moments, the distribution is approximated by a Pearson type III curve: a
    shifted gamma distribution with the same mean, variance and third central moment::

        k = 4 / g^2,   theta = sqrt(mu2) g / 2,   loc = 1 - 2 sqrt(mu2) / g,
        SK ~ loc + theta X,   X ~ Gamma(k, 1),

    (mean loc + k theta = 1, variance k theta^2 = mu2, skewness 2 / sqrt(k) = g). For a
    one-sided false-alarm probability p on each side::

        lower = loc + theta P^-1(k, p),     upper = loc + theta Q^-1(k, p),

    with P^-1, Q^-1 the inverse regularised incomplete gamma functions
    (``scipy.special.gammaincinv`` / ``gammainccinv``). The Pearson IV curve the references
    prefer where it applies needs the fourth moment as well; type III needs three moments only,
    is close to the exact tail at the M used here (checked by Monte Carlo in the tests), and
    has a closed-form quantile. Where g <= 0 (only a = N d < 1 at M of 2 or 3) the curve is
    mirrored, and for |g| < 1e-6 the normal quantile with its first Cornish-Fisher skewness
    term is used instead.

    For small M the lower threshold can fall below 0, the estimator's floor: no channel is
    then flagged as too steady, which is the right answer for so few spectra.

``scipy.stats`` is deliberately not imported (it costs the daemon a lot of memory); only
``scipy.special``.

References
----------
.. [1] G. M. Nita and D. E. Gary, "The generalized spectral kurtosis estimator",
       MNRAS 406, L60-L64, 2010 (2010b: generalised estimator, its variance and third moment;
       equation numbers from memory).
.. [2] G. M. Nita and D. E. Gary, "Statistics of the spectral kurtosis estimator",
       PASP 122, 595-607, 2010 (2010a: SK of sines and pulsed noise; Pearson approximations of
       its distribution; from memory).
.. [3] G. M. Nita, "Spectral kurtosis statistics of transient signals", MNRAS 458,
       2530-2540, 2016 (Pearson curves for SK detection thresholds; from memory).
.. [4] K. Pearson, "Contributions to the mathematical theory of evolution. II. Skew variation
       in homogeneous material", Phil. Trans. R. Soc. A 186, 343-414, 1895 (type III curve).
"""

from __future__ import annotations

from functools import lru_cache

import numpy as np
import scipy.special as sc

__all__ = ["sk_estimator", "sk_moments", "sk_thresholds", "sk_flags"]

#: Below this |skewness| the Pearson III shape k = 4 / g^2 exceeds 4e12 and its quantile loses
#: precision to cancellation; the normal quantile with the Cornish-Fisher skew term is used.
_MIN_SKEW = 1e-6


def _check_shape(n, d) -> float:
    """a = N d after checking N (integer >= 1) and d (> 0)."""
    if int(n) != n or n < 1:
        raise ValueError(f"n (powers summed per accumulation) must be an integer >= 1, got {n!r}")
    if not (np.isfinite(d) and d > 0):
        raise ValueError(f"d (shape of one power, 1 for complex channels) must be > 0, got {d!r}")
    return float(n) * float(d)


def _check_pfa(pfa) -> float:
    pfa = float(pfa)
    if not 0.0 < pfa < 0.5:
        raise ValueError(f"false-alarm probability pfa must lie in (0, 0.5), got {pfa!r}")
    return pfa


def _check_m(m) -> np.ndarray:
    m = np.asarray(m, dtype=np.float64)
    if m.size and not np.all(m >= 2):          # also catches NaN
        bad = m[~(m >= 2)].flat[0]
        raise ValueError(f"number of accumulated spectra m must be >= 2, got {bad!r}")
    return m


def sk_estimator(s1, s2, m, n: int = 1, d: float = 1.0) -> np.ndarray:
    """Generalised spectral-kurtosis estimator per channel.

    Parameters
    ----------
    s1, s2 : array_like
        S1 = sum_i P_i and S2 = sum_i P_i^2 over the accumulated spectra, per channel.
    m : int or array_like
        Number M of accumulated spectra (scalar, or per channel, broadcast against ``s1``).
    n : int, optional
        Number N of raw powers summed into each P_i (default 1).
    d : float, optional
        Shape of one raw power for Gaussian noise (default 1: exponential, |X|^2 of a complex
        channel).

    Returns
    -------
    ndarray of float64
        SK = (M N d + 1) / (M - 1) (M S2 / S1^2 - 1); NaN where M < 2 or S1 <= 0.

    Notes
    -----
    Expectation 1 for Gaussian noise (Nita & Gary 2010b, eq. 8); see the module docstring.
    """
    a = _check_shape(n, d)
    s1, s2, m = np.broadcast_arrays(np.asarray(s1, dtype=np.float64),
                                    np.asarray(s2, dtype=np.float64),
                                    np.asarray(m, dtype=np.float64))
    ok = (m >= 2) & (s1 > 0)
    out = np.full(s1.shape, np.nan)
    mm, p1, p2 = m[ok], s1[ok], s2[ok]
    out[ok] = (mm * a + 1.0) / (mm - 1.0) * (mm * p2 / (p1 * p1) - 1.0)
    return out


def _moments(m: np.ndarray, a: float):
    """(mean, mu2, mu3) of SK for Gaussian noise; m already checked (>= 2), float64."""
    ma = m * a
    # Gamma(Ma + 2) / Gamma(Ma + 4) and Gamma(Ma + 2) / Gamma(Ma + 6) via gammaln differences
    g24 = np.exp(sc.gammaln(ma + 2.0) - sc.gammaln(ma + 4.0))
    g26 = np.exp(sc.gammaln(ma + 2.0) - sc.gammaln(ma + 6.0))
    # mu2 = 2 a (a + 1) M^2 Gamma(Ma + 2) / ((M - 1) Gamma(Ma + 4))
    mu2 = 2.0 * a * (a + 1.0) * m * m * g24 / (m - 1.0)
    # mu3 = 8 a (a + 1) M^3 Gamma(Ma + 2) ((a + 4) M a - 5 a - 2) / ((M - 1)^2 Gamma(Ma + 6))
    mu3 = (8.0 * a * (a + 1.0) * m ** 3 * g26 * ((a + 4.0) * ma - 5.0 * a - 2.0)
           / (m - 1.0) ** 2)
    return np.ones_like(m), mu2, mu3


def sk_moments(m, n: int = 1, d: float = 1.0):
    """Mean, variance and third central moment of SK for Gaussian noise.

    Parameters
    ----------
    m : int or array_like
        Number M of accumulated spectra, >= 2.
    n, d : optional
        As in :func:`sk_estimator`.

    Returns
    -------
    mean, var, mu3 : float or ndarray of float64
        1; 2 a (a + 1) M^2 Gamma(Ma + 2) / ((M - 1) Gamma(Ma + 4));
        8 a (a + 1) M^3 Gamma(Ma + 2) ((a + 4) M a - 5 a - 2) / ((M - 1)^2 Gamma(Ma + 6)),
        with a = N d (Nita & Gary 2010b; derivation in the module docstring). Scalars for a
        scalar ``m``.

    Raises
    ------
    ValueError
        If any M < 2, or N or d is out of range.
    """
    a = _check_shape(n, d)
    m = _check_m(m)
    out = _moments(m, a)
    if m.ndim == 0:
        return tuple(float(v) for v in out)
    return out


def _thresholds(m: np.ndarray, pfa: float, a: float):
    """Pearson III thresholds for checked arrays m (>= 2), pfa in (0, 0.5)."""
    _, mu2, mu3 = _moments(m, a)
    sd = np.sqrt(mu2)
    g = mu3 / (mu2 * sd)                                    # skewness
    big = np.abs(g) >= _MIN_SKEW
    gs = np.where(big, g, 1.0)                              # placeholder where unused
    k = 4.0 / (gs * gs)                                     # shape
    theta = sd * gs / 2.0                                   # scale (< 0: mirrored curve)
    loc = 1.0 - 2.0 * sd / gs                               # location
    x_lo = sc.gammaincinv(k, pfa)                           # P(k, x) = pfa
    x_hi = sc.gammainccinv(k, pfa)                          # Q(k, x) = pfa
    pos = gs > 0
    lower = loc + theta * np.where(pos, x_lo, x_hi)
    upper = loc + theta * np.where(pos, x_hi, x_lo)
    if not np.all(big):
        # normal quantile with the Cornish-Fisher skewness term: q = z + g (z^2 - 1) / 6
        z = -sc.ndtri(pfa)
        cf = g * (z * z - 1.0) / 6.0
        lower = np.where(big, lower, 1.0 + sd * (-z + cf))
        upper = np.where(big, upper, 1.0 + sd * (z + cf))
    return lower, upper


@lru_cache(maxsize=64)
def _thresholds_scalar(m: float, pfa: float, a: float):
    lo, hi = _thresholds(np.float64(m), pfa, a)
    return float(lo), float(hi)


def sk_thresholds(m, pfa: float, n: int = 1, d: float = 1.0):
    """Lower and upper SK thresholds for a one-sided false-alarm probability on each side.

    Parameters
    ----------
    m : int or array_like
        Number M of accumulated spectra, >= 2 (scalar, or per channel).
    pfa : float
        False-alarm probability on each side, in (0, 0.5): e.g. 0.0013 (the one-sided tail of
        3 sigma for a normal distribution), so pure noise is flagged with probability 2 pfa.
    n, d : optional
        As in :func:`sk_estimator`.

    Returns
    -------
    lower, upper : float or ndarray of float64
        P(SK < lower) = P(SK > upper) = pfa for Gaussian noise under the Pearson type III
        approximation (module docstring). Scalars for a scalar ``m``.

    Raises
    ------
    ValueError
        If pfa is not in (0, 0.5), any M < 2, or N or d is out of range.

    Notes
    -----
    Scalar M are cached (a block's M repeats); arrays are evaluated once per distinct M.
    """
    pfa = _check_pfa(pfa)
    a = _check_shape(n, d)
    m = _check_m(m)
    if m.ndim == 0:
        return _thresholds_scalar(float(m), pfa, a)
    uniq, inverse = np.unique(m, return_inverse=True)
    lo, hi = _thresholds(uniq, pfa, a)
    return lo[inverse].reshape(m.shape), hi[inverse].reshape(m.shape)


def sk_flags(s1, s2, m, pfa: float, n: int = 1, d: float = 1.0) -> np.ndarray:
    """Channels whose SK lies outside the thresholds for false-alarm probability ``pfa``.

    Parameters
    ----------
    s1, s2, m : array_like
        As in :func:`sk_estimator` (``m`` scalar or per channel).
    pfa : float
        False-alarm probability on each side, in (0, 0.5).
    n, d : optional
        As in :func:`sk_estimator`.

    Returns
    -------
    ndarray of bool
        True where SK < lower or SK > upper (:func:`sk_thresholds`). Channels where SK is
        undefined (M < 2 or S1 <= 0) are not flagged: there is nothing to judge them by.

    Raises
    ------
    ValueError
        If pfa is not in (0, 0.5), or N or d is out of range.
    """
    pfa = _check_pfa(pfa)
    sk = sk_estimator(s1, s2, m, n, d)
    m = np.broadcast_to(np.asarray(m, dtype=np.float64), sk.shape)
    ok = ~np.isnan(sk)
    flags = np.zeros(sk.shape, dtype=bool)
    if ok.any():
        mo = m[ok]
        if np.all(mo == mo.flat[0]):
            lo, hi = sk_thresholds(float(mo.flat[0]), pfa, n, d)
        else:
            lo, hi = sk_thresholds(mo, pfa, n, d)
        flags[ok] = (sk[ok] < lo) | (sk[ok] > hi)
    return flags
