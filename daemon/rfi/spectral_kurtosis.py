"""Spectral kurtosis (SK) of accumulated power spectra: estimator, moments, flagging thresholds.

Estimator
    Per channel the spectrometer keeps S1 = sum_i P_i and S2 = sum_i P_i^2 over M power
    spectra. Each P_i may itself be the sum of N raw powers (N = 1 here: one channelizer
    spectrum per accumulation), and d is the gamma shape of one raw power for Gaussian noise:
    d = 1 for the power |X|^2 of a complex channel output (exponential, chi-square with 2
    degrees of freedom). For Gaussian noise P_i then follows a gamma distribution of shape
    a = N d, and the generalised SK estimator (Nita & Gary 2010b) is::

        SK = (M a + 1) / (M - 1) * (M S2 / S1^2 - 1),        a = N d,

    with expectation exactly 1 for Gaussian noise at every M >= 2. A steady carrier makes the
    power less variable than noise (SK < 1, towards 0 for a strong one); intermittent
    interference makes it more variable (SK > 1). Its range is 0 <= SK <= M a + 1.

Moments (Gaussian noise)
    The ratio R = S2 / S1^2 does not depend on the power scale, so it is independent of S1
    (Basu's theorem: S1 is complete and sufficient for the gamma scale). Hence
    E[R^k] = E[S2^k] / E[S1^(2k)], with S1 ~ Gamma(M a) and E[S2^k] expanded over the raw
    moments E[P^j] = Gamma(a + j) / Gamma(a). For k = 1 .. 4 this gives mean 1 and::

        mu2 = 2 a (a + 1) M^2 Gamma(M a + 2) / ((M - 1) Gamma(M a + 4))         (~ 4 / M)

        mu3 = 8 a (a + 1) M^3 Gamma(M a + 2) ((a + 4) M a - 5 a - 2)
              / ((M - 1)^2 Gamma(M a + 6))                                     (~ 80 / M^2)

        mu4 = 12 a (a + 1) M^4 Gamma(M a + 2) Q(M, a) / ((M - 1)^3 Gamma(M a + 8)),
        Q = M^3 a^3 (a + 1) + M^2 a^2 (3 a^2 + 68 a + 125)
            - M a (93 a^2 + 245 a + 32) + 84 a^2 + 48 a + 24                 (~ 48 / M^2)

    (the approximations for a = 1 and large M). mu2 is the variance of Nita & Gary (2010b);
    mu3 was quoted from memory of the same paper and agrees exactly with the derivation above;
    mu4 is derived here the same way. The tests check all three against exact rational
    arithmetic and against Monte Carlo on exponential powers. Gamma-function ratios are exp of
    differences of ``scipy.special.gammaln``, so M of 10^6 and more stays finite.

Thresholds
    For a one-sided false-alarm probability p on each side, lower and upper thresholds with
    P(SK < lower) = P(SK > upper) = p for Gaussian noise. The SK distribution is strongly
    skewed at the M of one block (skewness g = mu3 / mu2^1.5 ~ 10 / sqrt(M): 1.1 at M = 64),
    so the symmetric 1 +- z sqrt(4 / M) gives about 7 times too many upper false alarms at
    M = 64. The default method (``"spa-pearson"``) takes each tail from the approximation
    that is accurate there; ``"pearson3"`` is the three-moment curve, kept for comparison.

    ``"pearson3"``: Pearson type III, a shifted gamma distribution with the estimator's mean,
    variance and third moment (Pearson curves for SK thresholds: Nita & Gary 2010a, b; Nita
    2016)::

        k = 4 / g^2,  theta = sqrt(mu2) g / 2,  loc = 1 - 2 sqrt(mu2) / g,
        lower = loc + theta P^-1(k, p),   upper = loc + theta Q^-1(k, p),

    with P^-1, Q^-1 the inverse regularised incomplete gamma functions. Its support starts at
    ``loc`` (0.57 at M = 64) while SK's starts at 0, and its upper tail is too light. Measured
    by Monte Carlo at p = 0.0013: lower-tail rate 0.014 at M = 64 and 0.0031 at M = 256,
    upper-tail rate 0.0019 and 0.0017. Hence the default below.

    ``"spa-pearson"``, upper tail: the Pearson-system curve with the estimator's first four
    moments (Pearson 1895; Nita & Gary 2010a). With x = SK - 1, beta1 = g^2,
    beta2 = mu4 / mu2^2, D = 10 beta2 - 12 beta1 - 18, the density solves::

        d ln f / dx = -(x + b1) / (b0 + b1 x + b2 x^2),
        b0 = mu2 (4 beta2 - 3 beta1) / D,  b1 = sqrt(mu2) g (beta2 + 3) / D,
        b2 = (2 beta2 - 3 beta1 - 6) / D.

    With real roots r1 < r2 of the denominator, f ~ |x - r1|^c1 |x - r2|^c2: a beta
    distribution (type I) when the roots enclose the mean, a beta-prime one (type VI) when
    both lie on one side, both with closed-form quantiles (``betaincinv``). Without real roots
    (type IV, SK for M >~ 20 at a = 1), x = lam + alpha tan(t) turns the density into
    cos(t)^(1/b2 - 2) exp(-nu t), integrated numerically on a grid around its mode. Measured
    upper-tail rates at p = 0.0013: 0.00140 (M = 16), 0.00133 (64), 0.00125 (256); at
    p = 0.01: 0.0103, 0.0099, 0.0097 (a few per cent, against 45 % for type III at M = 64).

    ``"spa-pearson"``, lower tail: a conditional (double) saddlepoint approximation
    (Skovgaard 1987; Butler 2007, ch. 4), which uses the structure above exactly. Because R
    does not depend on S1, P(SK <= sk0) = P(S2 <= y | S1 = M a) with y = a^2 M q,
    q = 1 + sk0 (M - 1) / (M a + 1). (S1, S2) is a sum of M independent (P, P^2), whose
    cumulant generating function K(s, t) = M ln E exp(s P + t P^2) exists for t < 0, the
    lower tail of S2. Tilted by (s, t), a gamma power has density ~ x^(a-1) exp(-b x - c x^2)
    (b = 1 - s, c = -t): a truncated normal times x^(a-1). Writing it as
    y^(a-1) exp(-beta y - y^2 / 2), x = lam y, its moments are
    mu_k = (a)_k D_{-(a+k)}(beta) / D_{-a}(beta) (D the parabolic cylinder function,
    ``scipy.special.pbdv``), and the saddlepoint that matches mean a and mean square a^2 q is::

        lam = a / mu_1,  s = 1 - beta mu_1 / a,  t = -mu_1^2 / (2 a^2),  q = mu_2 / mu_1^2,
        K / M = a ln(lam) + beta^2 / 4 + ln D_{-a}(beta),
        h = a s + a^2 q t - K / M = a - beta mu_1 - mu_2 / 2 - K / M,
        w = -sqrt(2 M h),   u = -(a / (2 mu_1)) sqrt(M det V / a),
        P(SK <= sk0) ~ Phi(w) + phi(w) (1 / w - 1 / u),

    with det V = (mu2 - mu1^2)(mu4 - mu2^2) - (mu3 - mu1 mu2)^2 (the tilted covariance of
    (y, y^2)) and the null saddlepoint at s = t = 0 (S1 at its mean), whose K_ss = M a. The
    lower threshold solves this for beta by bisection. Measured lower-tail rates at
    p = 0.0013: 0.00128 (M = 16), 0.00129 (64), 0.00127 (256), and the same quality for
    a = 2 and a = 0.5; at M = 3 (a = 1) the threshold is 6 % above the exact 3 sqrt(3) p / pi.
    Near the mean the Pearson curve is the better of the two (and 1/w - 1/u loses precision
    as w -> 0), so the lower threshold blends linearly from the saddlepoint one at |w| >= 1.5
    (p <~ 0.07) to the Pearson one at |w| <= 0.5 (p >~ 0.3). Where the bisection's bracket
    beta in [-30, 35] does not hold the answer (M of 2 or 3 at small p; M >~ 10^6 to 10^7) the
    Pearson curve is used alone: it is exact at M = 2 (a = 1, where SK / 3 ~ Beta(1/2, 1))
    and close to the normal limit at large M. A lower threshold below 0, the estimator's
    floor, is returned as 0 (no channel is then flagged as too steady); ``"pearson3"``
    returns it as computed.

``scipy.stats`` is deliberately not imported (it costs the daemon a lot of memory); only
``scipy.special``.

References
----------
.. [1] G. M. Nita and D. E. Gary, "The generalized spectral kurtosis estimator",
       MNRAS 406, L60-L64, 2010 (2010b: generalised estimator, variance, third moment; from
       memory).
.. [2] G. M. Nita and D. E. Gary, "Statistics of the spectral kurtosis estimator",
       PASP 122, 595-607, 2010 (2010a: SK of sines and pulsed noise, moments, Pearson-curve
       approximations of its distribution; from memory).
.. [3] G. M. Nita, "Spectral kurtosis statistics of transient signals", MNRAS 458,
       2530-2540, 2016 (Pearson curves for SK detection thresholds; from memory).
.. [4] K. Pearson, "Contributions to the mathematical theory of evolution. II. Skew variation
       in homogeneous material", Phil. Trans. R. Soc. A 186, 343-414, 1895.
.. [5] I. M. Skovgaard, "Saddlepoint expansions for conditional distributions", J. Appl.
       Probab. 24, 875-887, 1987 (double-saddlepoint conditional CDF; from memory).
.. [6] R. W. Butler, *Saddlepoint Approximations with Applications*, Cambridge University
       Press, 2007, ch. 4 (conditional densities and distribution functions; from memory).
"""

from __future__ import annotations

from functools import lru_cache

import numpy as np
import numpy.typing as npt
import scipy.special as sc

__all__ = ["sk_estimator", "sk_moments", "sk_fourth_moment", "sk_thresholds", "sk_flags",
           "METHODS"]

#: Threshold methods: ``"spa-pearson"`` (default: saddlepoint lower tail, four-moment Pearson
#: upper tail) and ``"pearson3"`` (three-moment Pearson type III on both sides).
METHODS = ("spa-pearson", "pearson3")

#: Bisection bracket of the saddlepoint tilt beta; ``pbdv`` is accurate to ~1e-10 here
#: (checked against mpmath quadrature while writing this module).
_BETA_RANGE = (-30.0, 35.0)
_BISECT_STEPS = 60
#: Near the mean the Pearson curve is the better of the two lower-tail approximations (and
#: 1/w - 1/u loses precision as w -> 0): the lower threshold is the saddlepoint one for
#: |w| >= 1.5 (p <~ 0.07), the Pearson one for |w| <= 0.5 (p >~ 0.3), linearly blended between.
_BLEND_W = (0.5, 1.5)
#: Below this |skewness| Pearson III is replaced by its normal limit (Cornish-Fisher term).
_MIN_SKEW = 1e-6
#: Points of the numerical grid of the Pearson type IV density, and its half-width in
#: standard deviations of the density in t.
_IV_POINTS = 6001
_IV_HALF_WIDTH = 40.0


# ---------------------------------------------------------------------------- checks
def _is_scalar(x: object) -> bool:
    """:func:`numpy.isscalar` as a plain bool (its TypeGuard would narrow a float to str etc.)."""
    return bool(np.isscalar(x))


def _check_shape(n: float, d: float) -> float:
    """a = N d after checking N (integer >= 1) and d (> 0)."""
    if not (_is_scalar(n) and np.isfinite(n) and float(n) == int(n) and n >= 1):
        raise ValueError(f"n (powers summed per accumulation) must be an integer >= 1, got {n}")
    if not (_is_scalar(d) and np.isfinite(d) and d > 0):
        raise ValueError(f"d (gamma shape of one power, 1 for complex channels) must be > 0, "
                         f"got {d}")
    return float(n) * float(d)


def _check_pfa(pfa: float) -> float:
    if not (_is_scalar(pfa) and 0.0 < float(pfa) < 0.5):
        raise ValueError(f"false-alarm probability pfa must lie in (0, 0.5), got {pfa}")
    return float(pfa)


def _check_m(m: npt.ArrayLike) -> np.ndarray:
    m = np.asarray(m, dtype=np.float64)
    if m.size and not np.all((m >= 2) & np.isfinite(m)):
        bad = float(m[~((m >= 2) & np.isfinite(m))].flat[0])
        raise ValueError(f"number of accumulated spectra m must be finite and >= 2, got {bad:g}")
    return m


def _check_method(method: str) -> str:
    if method not in METHODS:
        raise ValueError(f"unknown SK threshold method {method!r}: expected one of "
                         f"{', '.join(METHODS)}")
    return method


# ------------------------------------------------------------------------- estimator
def sk_estimator(s1: npt.ArrayLike, s2: npt.ArrayLike, m: npt.ArrayLike, n: int = 1,
                 d: float = 1.0) -> np.ndarray:
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
        Gamma shape of one raw power for Gaussian noise (default 1: exponential, |X|^2 of a
        complex channel).

    Returns
    -------
    ndarray of float64
        SK = (M N d + 1) / (M - 1) (M S2 / S1^2 - 1); NaN where M < 2 or S1 <= 0.

    Notes
    -----
    Expectation 1 for Gaussian noise (Nita & Gary 2010b); see the module docstring.
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


# --------------------------------------------------------------------------- moments
def _central_moments(m: np.ndarray, a: float) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """(mu2, mu3, mu4) of SK for Gaussian noise; m checked (>= 2), float64 arrays."""
    ma = m * a
    g2 = sc.gammaln(ma + 2.0)
    # mu2 = 2 a (a + 1) M^2 Gamma(Ma + 2) / ((M - 1) Gamma(Ma + 4))
    mu2 = 2.0 * a * (a + 1.0) * m * m * np.exp(g2 - sc.gammaln(ma + 4.0)) / (m - 1.0)
    # mu3 = 8 a (a + 1) M^3 Gamma(Ma + 2) ((a + 4) M a - 5 a - 2) / ((M - 1)^2 Gamma(Ma + 6))
    mu3 = (8.0 * a * (a + 1.0) * m ** 3 * np.exp(g2 - sc.gammaln(ma + 6.0))
           * ((a + 4.0) * ma - 5.0 * a - 2.0) / (m - 1.0) ** 2)
    # mu4 = 12 a (a + 1) M^4 Gamma(Ma + 2) Q / ((M - 1)^3 Gamma(Ma + 8))
    q = (ma ** 3 * (a + 1.0) + ma * ma * (3.0 * a * a + 68.0 * a + 125.0)
         - ma * (93.0 * a * a + 245.0 * a + 32.0) + 84.0 * a * a + 48.0 * a + 24.0)
    mu4 = (12.0 * a * (a + 1.0) * m ** 4 * np.exp(g2 - sc.gammaln(ma + 8.0)) * q
           / (m - 1.0) ** 3)
    return mu2, mu3, mu4


def sk_moments(m: npt.ArrayLike, n: int = 1, d: float = 1.0
               ) -> tuple[float, float, float] | tuple[np.ndarray, np.ndarray, np.ndarray]:
    """Mean, variance and third central moment of SK for Gaussian noise.

    Parameters
    ----------
    m : int or array_like
        Number M of accumulated spectra, >= 2.
    n, d : optional
        As in :func:`sk_estimator`; a = N d.

    Returns
    -------
    mean, var, mu3 : float or ndarray of float64
        1; 2 a (a + 1) M^2 Gamma(Ma + 2) / ((M - 1) Gamma(Ma + 4));
        8 a (a + 1) M^3 Gamma(Ma + 2) ((a + 4) M a - 5 a - 2) / ((M - 1)^2 Gamma(Ma + 6))
        (Nita & Gary 2010b; derivation in the module docstring). Scalars for a scalar ``m``.

    Raises
    ------
    ValueError
        If any M < 2, or N or d is out of range.
    """
    a = _check_shape(n, d)
    m = _check_m(m)
    mu2, mu3, _ = _central_moments(m, a)
    if m.ndim == 0:
        return 1.0, float(mu2), float(mu3)
    return np.ones_like(m), mu2, mu3


def sk_fourth_moment(m: npt.ArrayLike, n: int = 1, d: float = 1.0) -> float | np.ndarray:
    """Fourth central moment of SK for Gaussian noise (derived here; module docstring).

    mu4 = 12 a (a + 1) M^4 Gamma(Ma + 2) Q(M, a) / ((M - 1)^3 Gamma(Ma + 8)), a = N d.

    Parameters and errors as :func:`sk_moments`; returns a float for a scalar ``m``.
    """
    a = _check_shape(n, d)
    m = _check_m(m)
    mu4 = _central_moments(m, a)[2]
    return float(mu4) if m.ndim == 0 else mu4


# ------------------------------------------------------------------ Pearson type III
def _pearson3(mu2: np.ndarray | np.float64, mu3: np.ndarray | np.float64,
              pfa: float) -> tuple[np.ndarray, np.ndarray]:
    """Lower and upper quantiles of the Pearson III curve with mean 1, variance mu2, mu3."""
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


# ------------------------------------------------------- Pearson system, four moments
def _pearson4_one(mu2: float, mu3: float, mu4: float, pfa: float) -> tuple[float, float]:
    """Lower and upper pfa-quantiles of SK = 1 + x from the Pearson curve of 4 moments."""
    sd = np.sqrt(mu2)
    g = mu3 / (mu2 * sd)
    if g < 0:                                # mirror x -> -x, so the skewness is >= 0
        lo, hi = _pearson4_one(mu2, -mu3, mu4, pfa)
        return 2.0 - hi, 2.0 - lo
    b1, b2 = g * g, mu4 / (mu2 * mu2)
    den = 10.0 * b2 - 12.0 * b1 - 18.0
    c0 = mu2 * (4.0 * b2 - 3.0 * b1) / den
    c1 = sd * g * (b2 + 3.0) / den
    c2 = (2.0 * b2 - 3.0 * b1 - 6.0) / den
    if abs(c2) < 1e-9 * max(1.0, abs(c1) / sd):         # type III boundary: gamma curve
        lo3, hi3 = _pearson3(np.float64(mu2), np.float64(mu3), pfa)
        return float(lo3), float(hi3)
    disc = c1 * c1 - 4.0 * c0 * c2
    if disc <= 0.0:
        return _pearson_type4(c0, c1, c2, pfa)
    # real roots r1 < r2 of c0 + c1 x + c2 x^2; f ~ |x - r1|^e1 |x - r2|^e2
    sq = np.sqrt(disc)
    r1, r2 = sorted(((-c1 - sq) / (2.0 * c2), (-c1 + sq) / (2.0 * c2)))
    e1 = -(r1 + c1) / (c2 * (r1 - r2))
    e2 = -(r2 + c1) / (c2 * (r2 - r1))
    span = r2 - r1
    if r1 < 0.0 < r2:
        # type I: y = (x - r1) / (r2 - r1) ~ Beta(e1 + 1, e2 + 1) on (r1, r2)
        p, q = e1 + 1.0, e2 + 1.0
        lo = r1 + span * sc.betaincinv(p, q, pfa)
        hi = r2 - span * sc.betaincinv(q, p, pfa)      # 1 - y ~ Beta(q, p)
    elif r2 < 0.0:
        # type VI, support x > r2: y = (x - r2) / (r2 - r1) ~ beta prime(e2 + 1, -e1 - e2 - 1),
        # v = y / (1 + y) ~ Beta(e2 + 1, -e1 - e2 - 1)
        p, q = e2 + 1.0, -e1 - e2 - 1.0
        v_lo = sc.betaincinv(p, q, pfa)
        one_minus_v_hi = sc.betaincinv(q, p, pfa)
        lo = r2 + span * v_lo / (1.0 - v_lo)
        hi = r2 + span * (1.0 - one_minus_v_hi) / one_minus_v_hi
    else:
        # type VI, support x < r1 (not met by SK with g >= 0; kept for completeness)
        p, q = e1 + 1.0, -e1 - e2 - 1.0
        v_hi = sc.betaincinv(p, q, pfa)
        one_minus_v_lo = sc.betaincinv(q, p, pfa)
        hi = r1 - span * v_hi / (1.0 - v_hi)
        lo = r1 - span * (1.0 - one_minus_v_lo) / one_minus_v_lo
    return 1.0 + float(lo), 1.0 + float(hi)


def _pearson_type4(c0: float, c1: float, c2: float, pfa: float) -> tuple[float, float]:
    """Quantiles of the type IV curve d ln f/dx = -(x + c1) / (c0 + c1 x + c2 x^2), c2 > 0.

    c0 + c1 x + c2 x^2 = c2 ((x - lam)^2 + alpha^2); with x = lam + alpha tan(t) the density
    in t is cos(t)^(1/c2 - 2) exp(-nu t), nu = (lam + c1) / (alpha c2), on (-pi/2, pi/2).
    """
    lam = -c1 / (2.0 * c2)
    alpha = np.sqrt(max(c0 / c2 - lam * lam, 1e-300))
    nu = (lam + c1) / (alpha * c2)
    p = 1.0 / c2 - 2.0                                  # power of cos(t)
    t0 = np.arctan(-nu / p)                             # mode in t
    sig = np.cos(t0) / np.sqrt(p)                       # width: (d^2/dt^2 ln)^(-1/2)
    half = np.pi / 2.0
    t = np.linspace(max(-half, t0 - _IV_HALF_WIDTH * sig), min(half, t0 + _IV_HALF_WIDTH * sig),
                    _IV_POINTS)[1:-1]
    logf = p * np.log(np.cos(t)) - nu * t
    f = np.exp(logf - logf.max())
    seg = 0.5 * (f[1:] + f[:-1]) * np.diff(t)           # trapezoid pieces
    below = np.concatenate(([0.0], np.cumsum(seg)))     # mass below t (up to the grid start)
    above = np.concatenate((np.cumsum(seg[::-1])[::-1], [0.0]))
    total = below[-1]
    # interpolate the quantile in log(tail mass) (nearly linear in the tails)
    with np.errstate(divide="ignore"):
        t_lo = np.interp(np.log(pfa * total), np.log(below[1:]), t[1:])
        t_hi = np.interp(-np.log(pfa * total), -np.log(above[:-1]), t[:-1])
    return 1.0 + lam + alpha * np.tan(t_lo), 1.0 + lam + alpha * np.tan(t_hi)


def _pearson4(mu2: np.ndarray, mu3: np.ndarray, mu4: np.ndarray,
              pfa: float) -> tuple[np.ndarray, np.ndarray]:
    """Vectorised :func:`_pearson4_one` over arrays of moments."""
    # the three moments are elementwise functions of the same m: equal sizes
    out = [_pearson4_one(float(x), float(y), float(z), pfa)
           for x, y, z in zip(np.ravel(mu2), np.ravel(mu3), np.ravel(mu4), strict=True)]
    lo = np.array([o[0] for o in out]).reshape(np.shape(mu2))
    hi = np.array([o[1] for o in out]).reshape(np.shape(mu2))
    return lo, hi


# ------------------------------------------------------ conditional saddlepoint (lower)
def _tilted(beta: np.ndarray, a: float) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """Per-sample saddlepoint quantities along the tilt beta (see the module docstring).

    Returns q (mean square of the powers over their squared mean), h (the per-spectrum
    exponent, w = -sqrt(2 M h)) and c_u (u = -c_u sqrt(M)).
    """
    dk = [sc.pbdv(-(a + k), beta)[0] for k in range(5)]      # D_{-(a+k)}(beta)
    mu = [sc.poch(a, k) * dk[k] / dk[0] for k in range(5)]  # E y^k of y^(a-1) e^(-beta y - y^2/2)
    q = mu[2] / (mu[1] * mu[1])
    kappa = a * np.log(a / mu[1]) + beta * beta / 4.0 + np.log(dk[0])   # K / M
    h = a - beta * mu[1] - mu[2] / 2.0 - kappa
    det = ((mu[2] - mu[1] ** 2) * (mu[4] - mu[2] ** 2) - (mu[3] - mu[1] * mu[2]) ** 2)
    c_u = a / (2.0 * mu[1]) * np.sqrt(np.maximum(det, 0.0) / a)
    return q, np.maximum(h, 0.0), c_u


def _spa_cdf(beta: np.ndarray, m: np.ndarray,
             a: float) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """Saddlepoint P(SK <= s(beta)) for M = m, with w; Skovgaard's formula."""
    q, h, c_u = _tilted(beta, a)
    w = -np.sqrt(2.0 * m * h)
    u = -c_u * np.sqrt(m)
    with np.errstate(divide="ignore", invalid="ignore"):
        cdf = sc.ndtr(w) + np.exp(-0.5 * w * w) / np.sqrt(2.0 * np.pi) * (1.0 / w - 1.0 / u)
    return cdf, q, w


def _spa_lower(m: np.ndarray, pfa: float, a: float) -> tuple[np.ndarray, np.ndarray]:
    """Lower thresholds by bisection on beta, and the saddlepoint's w there.

    NaN (both) where the bracket beta in [-30, 35] does not hold the answer.
    """
    lo = np.full(m.shape, _BETA_RANGE[0])
    hi = np.full(m.shape, _BETA_RANGE[1])
    ok = (_spa_cdf(lo, m, a)[0] < pfa) & (_spa_cdf(hi, m, a)[0] > pfa)
    for _ in range(_BISECT_STEPS):
        mid = 0.5 * (lo + hi)
        below = _spa_cdf(mid, m, a)[0] < pfa
        lo = np.where(below, mid, lo)
        hi = np.where(below, hi, mid)
    _, q, w = _spa_cdf(0.5 * (lo + hi), m, a)
    # SK = (M a + 1) / (M - 1) (M R - 1), M R = q
    return (np.where(ok, (m * a + 1.0) / (m - 1.0) * (q - 1.0), np.nan),
            np.where(ok, w, np.nan))


# ----------------------------------------------------------------------- thresholds
def _thresholds(m: np.ndarray, pfa: float, a: float,
                method: str) -> tuple[np.ndarray, np.ndarray]:
    """Thresholds for checked float64 arrays m (>= 2)."""
    mu2, mu3, mu4 = _central_moments(m, a)
    if method == "pearson3":
        return _pearson3(mu2, mu3, pfa)
    lower_p, upper = _pearson4(mu2, mu3, mu4, pfa)
    lower_s, w = _spa_lower(m, pfa, a)
    wt = np.clip((np.abs(w) - _BLEND_W[0]) / (_BLEND_W[1] - _BLEND_W[0]), 0.0, 1.0)
    lower = np.where(np.isnan(lower_s), lower_p, wt * lower_s + (1.0 - wt) * lower_p)
    return np.maximum(lower, 0.0), upper              # SK >= 0: a threshold below says the same


@lru_cache(maxsize=256)
def _thresholds_scalar(m: float, pfa: float, a: float, method: str) -> tuple[float, float]:
    lo, hi = _thresholds(np.array([m]), pfa, a, method)
    return float(lo[0]), float(hi[0])


def sk_thresholds(m: npt.ArrayLike, pfa: float, n: int = 1, d: float = 1.0,
                  method: str = "spa-pearson"
                  ) -> tuple[float, float] | tuple[np.ndarray, np.ndarray]:
    """Lower and upper SK thresholds for a one-sided false-alarm probability on each side.

    Parameters
    ----------
    m : int or array_like
        Number M of accumulated spectra, >= 2 (scalar, or per channel).
    pfa : float
        False-alarm probability on each side, in (0, 0.5): e.g. 0.0013 (the one-sided tail
        of 3 sigma of a normal distribution), so pure noise is flagged with probability 2 pfa.
    n, d : optional
        As in :func:`sk_estimator`.
    method : {"spa-pearson", "pearson3"}, optional
        ``"spa-pearson"`` (default): lower threshold from the conditional saddlepoint
        approximation, upper from the Pearson curve matched to four moments. ``"pearson3"``:
        both from the Pearson type III curve of three moments (too many lower false alarms
        at M <~ 500: see the module docstring).

    Returns
    -------
    lower, upper : float or ndarray of float64
        P(SK < lower) = P(SK > upper) = pfa for Gaussian noise, within the approximation.
        Scalars for a scalar ``m``.

    Raises
    ------
    ValueError
        If pfa is not in (0, 0.5), any M < 2, N or d is out of range, or the method unknown.

    Notes
    -----
    Scalar M are cached (a block's M repeats); arrays are evaluated once per distinct M.
    """
    pfa = _check_pfa(pfa)
    a = _check_shape(n, d)
    method = _check_method(method)
    m = _check_m(m)
    if m.ndim == 0:
        return _thresholds_scalar(float(m), pfa, a, method)
    uniq, inverse = np.unique(m, return_inverse=True)
    lo, hi = _thresholds(uniq, pfa, a, method)
    return lo[inverse].reshape(m.shape), hi[inverse].reshape(m.shape)


def sk_flags(s1: npt.ArrayLike, s2: npt.ArrayLike, m: npt.ArrayLike, pfa: float, n: int = 1, d: float = 1.0,
             method: str = "spa-pearson") -> np.ndarray:
    """Channels whose SK lies outside the thresholds for false-alarm probability ``pfa``.

    Parameters
    ----------
    s1, s2, m : array_like
        As in :func:`sk_estimator` (``m`` scalar or per channel).
    pfa : float
        False-alarm probability on each side, in (0, 0.5).
    n, d, method : optional
        As in :func:`sk_thresholds`.

    Returns
    -------
    ndarray of bool
        True where SK < lower or SK > upper (:func:`sk_thresholds`). Channels where SK is
        undefined (M < 2 or S1 <= 0) are not flagged: there is nothing to judge them by.

    Raises
    ------
    ValueError
        If pfa is not in (0, 0.5), N or d is out of range, or the method unknown.
    """
    pfa = _check_pfa(pfa)
    method = _check_method(method)
    sk = sk_estimator(s1, s2, m, n, d)
    m = np.broadcast_to(np.asarray(m, dtype=np.float64), sk.shape)
    ok = ~np.isnan(sk)
    flags = np.zeros(sk.shape, dtype=bool)
    if ok.any():
        mo = m[ok]
        if np.all(mo == mo.flat[0]):
            lo, hi = sk_thresholds(float(mo.flat[0]), pfa, n, d, method)
        else:
            lo, hi = sk_thresholds(mo, pfa, n, d, method)
        flags[ok] = (sk[ok] < lo) | (sk[ok] > hi)
    return flags
