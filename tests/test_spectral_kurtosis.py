"""Spectral kurtosis: estimator, moments and thresholds against Nita & Gary, exact arithmetic,
exact small-M distributions and Monte Carlo on exponential powers and channelized noise."""

import subprocess
import sys
from fractions import Fraction

import numpy as np
import pytest
import scipy.special

from spinflip.daemon.dsp.channelizer import make_channelizer, power_sums
from spinflip.daemon.rfi.spectral_kurtosis import (
    sk_estimator,
    sk_flags,
    sk_fourth_moment,
    sk_moments,
    sk_thresholds,
)

NCHAN = 256
#: Monte Carlo trials of SK per M (each trial: M exponential powers). 4 binomial sigma at
#: p = 0.0013 are 18 % (M = 64) and 25 % (M = 16, 256) of p; the approximations' own errors,
#: measured once with 2-4 million trials, are below 8 % (M = 16, upper) and 3.5 % elsewhere.
TRIALS = {16: 200_000, 64: 400_000, 256: 200_000}
_CACHE = {}


def _exp_sk(m, seed=20240611):
    """SK of ``TRIALS[m]`` independent trials of m exponential powers (the power of complex
    Gaussian noise: chi-square with 2 degrees of freedom), cached for the module."""
    if (m, seed) not in _CACHE:
        rng = np.random.default_rng(seed + m)
        n, out, step = TRIALS[m], [], 50_000
        for i in range(0, n, step):
            p = rng.standard_exponential((min(step, n - i), m))
            out.append(sk_estimator(p.sum(axis=1), (p * p).sum(axis=1), m))
        _CACHE[(m, seed)] = np.concatenate(out)
    return _CACHE[(m, seed)]


def _complex_noise(n, rng, sigma=1.0):
    """Circular complex Gaussian noise, E|x|^2 = 2 sigma^2."""
    return (sigma * (rng.standard_normal(n) + 1j * rng.standard_normal(n))).astype(np.complex64)


def _sk_blocks(power, m):
    """SK per channel of consecutive blocks of m spectra, with power_sums: shape (blocks, nchan)."""
    blocks = power.shape[0] // m
    rows = []
    for b in range(blocks):
        s1, s2, mm = power_sums(power[b * m:(b + 1) * m])
        rows.append(sk_estimator(s1, s2, mm))
    return np.array(rows)


# ------------------------------------------------------------------------- estimator
def test_estimator_formula_and_undefined_channels():
    # SK = (M N d + 1)/(M - 1) (M S2/S1^2 - 1) (Nita & Gary 2010, MNRAS 406, L60, from memory)
    s1 = np.array([10.0, 4.0, 0.0, 5.0])
    s2 = np.array([30.0, 4.0, 0.0, 9.0])
    m = np.array([5, 4, 5, 1])
    sk = sk_estimator(s1, s2, m)
    assert sk[0] == pytest.approx(6 / 4 * (5 * 30 / 100 - 1))
    assert sk[1] == pytest.approx(0.0)          # four equal powers: no variance at all
    assert np.isnan(sk[2]) and np.isnan(sk[3])  # S1 = 0, M = 1: undefined
    # N d enters only the prefactor (same source)
    assert sk_estimator(10.0, 30.0, 5, n=2)[()] == pytest.approx(11 / 4 * 0.5)
    assert sk_estimator(10.0, 30.0, 5, d=0.5)[()] == pytest.approx(3.5 / 4 * 0.5)


def test_sk_on_pfb_noise_has_mean_one_and_variance_of_nita_gary():
    # Nita & Gary 2010 (MNRAS 406, L60; PASP 122, 595, from memory): for Gaussian noise
    # E[SK] = 1 and Var[SK] = 4 M^2 / ((M - 1)(M + 2)(M + 3)) ~ 4/M. Through the real PFB
    # adjacent spectra are correlated by rho_1 = 0.012 (power: 1.5e-4), negligible here.
    m = 256
    rng = np.random.default_rng(1)
    ch = make_channelizer("pfb", NCHAN)
    sk = _sk_blocks(ch.power(_complex_noise(NCHAN * (m * 100 + 3), rng)), m).ravel()
    _, var, _ = sk_moments(m)
    n = sk.size
    # neighbouring channels share some noise (filter overlap): allow half the samples' weight
    assert abs(sk.mean() - 1.0) < 4 * np.sqrt(2 * var / n)
    beta2 = sk_fourth_moment(m) / var ** 2
    se_var = var * np.sqrt((beta2 - 1) * 2 / n)
    assert abs(sk.var() - var) < 4 * se_var
    assert sk.var() == pytest.approx(4 / m, rel=0.06)           # the 4/M of the papers


def test_sk_on_exponential_powers_has_mean_one_and_variance_4_over_m():
    # Same sources; synthetic chi-square (2 dof) powers, M = 64: Var = 4 M^2/((M-1)(M+2)(M+3))
    sk = _exp_sk(64)
    _, var, _ = sk_moments(64)
    assert abs(sk.mean() - 1.0) < 4 * np.sqrt(var / sk.size)
    assert var == pytest.approx(4 * 64 ** 2 / (63 * 66 * 67), rel=1e-12)
    assert sk.var() == pytest.approx(var, rel=0.015)
    # exact variance -> 4/M for large M (Nita & Gary 2010)
    assert sk_moments(10_000)[1] * 10_000 / 4 == pytest.approx(1.0, abs=1e-3)


# --------------------------------------------------------------------------- moments
def _exact_central_moments(m, a):
    """Central moments 2..4 of SK in exact rational arithmetic (integer a).

    R = S2/S1^2 is independent of S1 (Basu's theorem: S1 complete sufficient for the gamma
    scale; a standard result), so E[R^k] = E[S2^k] / E[S1^(2k)], E[S1^j] = (M a)_j, and
    E[S2^k] expands over set partitions into raw moments E[P^j] = (a)_j.
    """
    def rf(x, n):                                   # rising factorial (x)_n
        out = Fraction(1)
        for i in range(n):
            out *= x + i
        return out

    mx = lambda j: rf(a, j)                         # noqa: E731  E[P^j]
    es2 = [Fraction(1), m * mx(2),
           m * mx(4) + m * (m - 1) * mx(2) ** 2,
           m * mx(6) + 3 * m * (m - 1) * mx(4) * mx(2) + m * (m - 1) * (m - 2) * mx(2) ** 3,
           m * mx(8) + 4 * m * (m - 1) * mx(6) * mx(2) + 3 * m * (m - 1) * mx(4) ** 2
           + 6 * m * (m - 1) * (m - 2) * mx(4) * mx(2) ** 2
           + m * (m - 1) * (m - 2) * (m - 3) * mx(2) ** 4]
    er = [es2[k] / rf(m * a, 2 * k) for k in range(5)]
    c = Fraction(m * a + 1, m - 1) * m              # SK = c R - (M a + 1)/(M - 1)
    e = er[1]
    assert c * e - Fraction(m * a + 1, m - 1) == 1  # mean exactly 1
    mu2 = er[2] - e * e
    mu3 = er[3] - 3 * er[2] * e + 2 * e ** 3
    mu4 = er[4] - 4 * er[3] * e + 6 * er[2] * e * e - 3 * e ** 4
    return float(c ** 2 * mu2), float(c ** 3 * mu3), float(c ** 4 * mu4)


@pytest.mark.parametrize("m, a", [(2, 1), (3, 1), (16, 1), (64, 1), (1000, 1), (16, 2), (64, 3)])
def test_moment_formulas_equal_exact_rational_moments(m, a):
    # mu2 (Nita & Gary 2010, MNRAS 406, L60), mu3 (same paper, from memory) and mu4 (derived in
    # the module) against the exact moments of the ratio statistic computed independently.
    mu2, mu3, mu4 = _exact_central_moments(m, a)
    mean, var, m3 = sk_moments(m, n=a)
    assert mean == 1.0
    assert var == pytest.approx(mu2, rel=1e-10)
    assert m3 == pytest.approx(mu3, rel=1e-10)
    assert sk_fourth_moment(m, n=a) == pytest.approx(mu4, rel=1e-10)


@pytest.mark.parametrize("m", [16, 64, 256])
def test_mu2_mu3_mu4_agree_with_monte_carlo(m):
    # Monte Carlo on exponential (chi-square 2 dof) powers, seeded; standard errors from the
    # samples themselves. Tolerance 4 standard errors, which are <= 3 % (mu2), 5 % (mu3).
    sk = _exp_sk(m)
    n = sk.size
    _, var, mu3 = sk_moments(m)
    mu4 = sk_fourth_moment(m)
    dev = sk - 1.0                          # the mean is known exactly
    for k, ref, rel_se_max in ((2, var, 0.01), (3, mu3, 0.05), (4, mu4, 0.05)):
        terms = dev ** k
        est, se = terms.mean(), terms.std() / np.sqrt(n)
        assert se / ref < rel_se_max        # the check means something
        assert abs(est - ref) < 4 * se, (k, est, ref, se)


def test_moments_stay_finite_for_a_million_spectra():
    # gammaln differences: no overflow; large-M limits 4/M, 80/M^2, 48/M^2 (a = 1, from the
    # closed forms in the module docstring) and the normal limit of the thresholds.
    m = 1_000_000
    _, var, mu3 = sk_moments(m)
    assert var * m / 4 == pytest.approx(1, rel=1e-5)
    assert mu3 * m ** 2 / 80 == pytest.approx(1, rel=1e-4)
    assert sk_fourth_moment(m) * m ** 2 / 48 == pytest.approx(1, rel=1e-3)
    lo, hi = sk_thresholds(m, 0.0013)
    z = scipy.special.ndtri(1 - 0.0013)             # normal quantile (scipy as reference)
    assert (1 - lo) / (z * np.sqrt(4 / m)) == pytest.approx(1, abs=0.02)
    assert (hi - 1) / (z * np.sqrt(4 / m)) == pytest.approx(1, abs=0.02)


# ------------------------------------------------------------------ interference
def test_steady_sine_through_pfb_drives_sk_to_zero_and_is_flagged():
    # A constant-amplitude carrier makes the power of its channel nearly constant: SK -> 0
    # (Nita & Gary 2010, PASP 122, 595, from memory). Tone at the centre of channel 100.
    m, k0 = 256, 100
    rng = np.random.default_rng(2)
    n = NCHAN * (m * 4 + 3)
    t = np.arange(n)
    tone = np.exp(2j * np.pi * (k0 - NCHAN // 2) / NCHAN * t).astype(np.complex64)
    x = _complex_noise(n, rng, sigma=0.05) + tone
    power = make_channelizer("pfb", NCHAN).power(x)
    sk = _sk_blocks(power, m)
    assert np.all(sk[:, k0] < 0.01)
    flags = np.array([sk_flags(*power_sums(power[b * m:(b + 1) * m]), 0.0013)
                      for b in range(sk.shape[0])])
    assert flags[:, k0].all()
    far = np.r_[0:k0 - 8, k0 + 9:NCHAN]              # away from the tone's filter skirts
    assert flags[:, far].mean() < 0.02
    # rho from the measured powers: SK = 1 - rho^2/(1 + rho)^2 (derivation below)
    pn = power[:, far].mean()
    rho = power[:, k0].mean() / pn - 1
    assert sk[:, k0].mean() == pytest.approx(1 - rho ** 2 / (1 + rho) ** 2, abs=2e-4)


@pytest.mark.parametrize("rho", [0.25, 1.0, 4.0])
def test_sine_plus_noise_matches_analytic_sk(rho):
    # Analytic SK of a sine of power A^2 = rho Pn in complex Gaussian noise of power Pn
    # (Nita & Gary 2010, PASP 122, 595, from memory; derived here). With P = |A e^(i phi) + n|^2
    # and n circular, E|n|^2 = Pn, E|n|^4 = 2 Pn^2, E[n] = E[n^2] = 0:
    #   E[P]   = A^2 + Pn,
    #   E[P^2] = A^4 + 4 A^2 E[(Re n')^2] + 2 A^2 E|n|^2 + E|n|^4 = A^4 + 4 Pn A^2 + 2 Pn^2,
    # and for large M, SK -> E[P^2]/E[P]^2 - 1 = (2 rho + 1)/(1 + rho)^2 = 1 - rho^2/(1 + rho)^2.
    m, trials = 8192, 64
    rng = np.random.default_rng(int(rho * 100))
    phase = 2 * np.pi * 0.137 * np.arange(m)        # a carrier off the channel centre
    amp = np.sqrt(rho) * np.exp(1j * phase)
    sk = np.empty(trials)
    for i in range(trials):
        noise = (rng.standard_normal(m) + 1j * rng.standard_normal(m)) / np.sqrt(2)  # Pn = 1
        p = np.abs(amp + noise) ** 2
        sk[i] = sk_estimator(p.sum(), (p * p).sum(), m)
    expected = 1 - rho ** 2 / (1 + rho) ** 2
    se = sk.std(ddof=1) / np.sqrt(trials)
    assert abs(sk.mean() - expected) < 4 * se + 2 / m    # + the O(1/M) bias of a ratio
    assert abs(sk.mean() - 1) > 10 * se                  # and far from noise


def test_pulsed_noise_through_pfb_drives_sk_above_one_and_is_flagged():
    # Noise whose power is switched on for 10 % of the time gives SK > 1 (Nita & Gary 2010,
    # PASP 122, 595, from memory). Extra power 10x in runs of 10 of every 100 frames.
    m = 200
    rng = np.random.default_rng(3)
    frames = m * 4 + 3
    on = (np.arange(frames) % 100) < 10
    env = np.where(np.repeat(on, NCHAN), np.sqrt(11.0), 1.0).astype(np.float32)
    x = _complex_noise(NCHAN * frames, rng) * env
    power = make_channelizer("pfb", NCHAN).power(x)
    sk = _sk_blocks(power, m)
    _, hi = sk_thresholds(m, 0.0013)
    assert np.all(sk > hi)
    assert sk.mean() > 3.0


def test_pulsed_exponential_powers_match_analytic_sk():
    # Derived here: a fraction delta of the M powers has mean 1 + rho, the rest mean 1
    # (exponential each). E[P] = 1 + delta rho, E[P^2] = 2 (1 + 2 delta rho + delta rho^2), so
    #   SK -> E[P^2]/E[P]^2 - 1 = 1 + 2 delta (1 - delta) rho^2 / (1 + delta rho)^2  (> 1).
    m, trials, delta, rho = 4000, 64, 0.1, 3.0
    rng = np.random.default_rng(4)
    scale = np.where(np.arange(m) < delta * m, 1 + rho, 1.0)
    p = rng.standard_exponential((trials, m)) * scale
    sk = sk_estimator(p.sum(axis=1), (p * p).sum(axis=1), m)
    expected = 1 + 2 * delta * (1 - delta) * rho ** 2 / (1 + delta * rho) ** 2
    se = sk.std(ddof=1) / np.sqrt(trials)
    assert abs(sk.mean() - expected) < 4 * se + 2 / m
    assert expected > 1 + 20 * se


# ------------------------------------------------------------------------ thresholds
def _binomial_ok(count, n, p, nsigma=4.0):
    return abs(count - n * p) < nsigma * np.sqrt(n * p * (1 - p))


@pytest.mark.parametrize("m", [16, 64, 256])
@pytest.mark.parametrize("pfa", [0.0013, 0.01])
def test_false_alarm_rate_on_noise_matches_pfa_each_side(m, pfa):
    # Monte Carlo (seeded) against the configured probability, each side separately, within
    # 4 binomial standard deviations.
    sk = _exp_sk(m)
    lo, hi = sk_thresholds(m, pfa)
    assert lo < 1 < hi
    assert _binomial_ok(np.sum(sk < lo), sk.size, pfa), (np.mean(sk < lo), pfa)
    assert _binomial_ok(np.sum(sk > hi), sk.size, pfa), (np.mean(sk > hi), pfa)


@pytest.mark.parametrize("n, d", [(2, 1.0), (1, 0.5)])
def test_false_alarm_rate_for_other_shapes(n, d):
    # Generalised estimator (Nita & Gary 2010, MNRAS 406, L60): powers gamma(N d); N = 2
    # (two spectra summed before squaring) and d = 0.5 (power of a real Gaussian). Monte Carlo.
    m, pfa, trials = 64, 0.01, 100_000
    rng = np.random.default_rng(5)
    p = rng.standard_gamma(n * d, (trials, m))
    sk = sk_estimator(p.sum(axis=1), (p * p).sum(axis=1), m, n=n, d=d)
    lo, hi = sk_thresholds(m, pfa, n=n, d=d)
    assert _binomial_ok(np.sum(sk < lo), trials, pfa)
    assert _binomial_ok(np.sum(sk > hi), trials, pfa)


def test_pearson3_beats_gaussian_upper_tail_but_not_good_enough_at_m64():
    # Monte Carlo, M = 64, p = 0.0013 on each side (4 sigma of the binomial error is 18 %).
    # Plain Gaussian thresholds 1 +- z sqrt(4/M) (the normal limit of Nita & Gary's variance):
    # the upper tail is heavy, so about 7x the configured rate.
    m, pfa = 64, 0.0013
    sk = _exp_sk(m)
    n = sk.size
    z = scipy.special.ndtri(1 - pfa)                # normal quantile (scipy as reference)
    gauss_hi = np.mean(sk > 1 + z * np.sqrt(4 / m))
    assert gauss_hi / pfa > 4
    # Pearson type III with three moments (Nita & Gary 2010; Nita 2016, from memory):
    lo3, hi3 = sk_thresholds(m, pfa, method="pearson3")
    p3_hi = np.mean(sk > hi3)
    assert abs(p3_hi - pfa) < abs(gauss_hi - pfa) / 5    # far better than the Gaussian ...
    assert not _binomial_ok(p3_hi * n, n, pfa)           # ... but measurably too light (~+45 %)
    # and its lower tail, which starts at loc = 1 - 2 sqrt(mu2)/g = 0.57 > 0, is far off:
    assert np.mean(sk < lo3) / pfa > 5
    # the default (four-moment Pearson upper, saddlepoint lower) passes (previous test)
    lo, hi = sk_thresholds(m, pfa)
    assert _binomial_ok(np.sum(sk > hi), n, pfa) and _binomial_ok(np.sum(sk < lo), n, pfa)


def test_thresholds_against_exact_small_m_distributions():
    # Exact for a = 1 (derived here): normalised exponentials are uniform on the simplex
    # (Dirichlet(1, ..., 1), a standard result).
    # M = 2: u ~ U(0, 1), M R - 1 = (2u - 1)^2, SK = 3 (2u - 1)^2, P(SK <= s) = sqrt(s / 3):
    #   lower = 3 p^2, upper = 3 (1 - p)^2. The four-moment Pearson curve (type I) is exact.
    for p in (0.0013, 0.01, 0.1):
        assert sk_thresholds(2, p)[1] == pytest.approx(3 * (1 - p) ** 2, rel=1e-9)
    for p in (0.0013, 0.01):
        assert sk_thresholds(2, p)[0] == pytest.approx(3 * p ** 2, rel=1e-6)
    # M = 3: M R - 1 = 3 |u - centre|^2; while the disc lies inside the triangle (SK <= 1) its
    # area over the triangle's gives P(SK <= s) = pi s / (3 sqrt 3): lower = 3 sqrt(3) p / pi.
    # The saddlepoint approximation is within 10 % even at this M.
    for p in (0.0013, 0.01, 0.1):
        assert sk_thresholds(3, p)[0] == pytest.approx(3 * np.sqrt(3) * p / np.pi, rel=0.10)


def test_thresholds_monotone_in_pfa_and_narrowing_with_m():
    # Properties of any quantile function and of a distribution narrowing as Var ~ 4/M
    # (Nita & Gary 2010).
    pfas = np.array([1e-6, 1e-4, 0.0013, 0.01, 0.05, 0.2])
    for m in (16, 64, 256, 10_000):
        lo, hi = np.array([sk_thresholds(m, p) for p in pfas]).T
        assert np.all(np.diff(lo) > 0) and np.all(np.diff(hi) < 0)
        assert np.all(lo < 1) and np.all(hi > 1)
    ms = np.array([16, 24, 32, 48, 64, 128, 256, 1024, 4096, 65536, 1_000_000])
    for p in (0.0013, 0.01):
        lo, hi = sk_thresholds(ms, p)
        assert np.all(np.diff(lo) > 0) and np.all(np.diff(hi) < 0)
        assert lo[-1] > 0.99 and hi[-1] < 1.01


def test_thresholds_vectorised_over_per_channel_counts():
    m = np.array([[64, 256, 64], [1000, 16, 64]])
    lo, hi = sk_thresholds(m, 0.01)
    assert lo.shape == hi.shape == m.shape
    for i, j in np.ndindex(m.shape):
        one = sk_thresholds(int(m[i, j]), 0.01)
        assert (lo[i, j], hi[i, j]) == pytest.approx(one, rel=1e-12)
    lo3, hi3 = sk_thresholds(m, 0.01, method="pearson3")
    assert hi3[0, 0] == pytest.approx(sk_thresholds(64, 0.01, method="pearson3")[1])


def test_flags_with_per_channel_counts():
    lo, hi = sk_thresholds(64, 0.0013)
    lo2, hi2 = sk_thresholds(16, 0.0013)
    # build S1, S2 with chosen SK: M S2 / S1^2 = 1 + SK (M - 1)/(M + 1), S1 = M
    def sums(sk, m):
        return float(m), (1 + sk * (m - 1) / (m + 1)) * m

    cases = [(64, 1.0, False), (64, hi * 1.01, True), (64, lo * 0.99, True),
             (16, hi * 1.01, False), (16, hi2 * 1.01, True), (16, lo2 * 1.01, False)]
    s1 = np.array([sums(sk, m)[0] for m, sk, _ in cases])
    s2 = np.array([sums(sk, m)[1] for m, sk, _ in cases])
    m = np.array([c[0] for c in cases])
    want = np.array([c[2] for c in cases])
    np.testing.assert_array_equal(sk_flags(s1, s2, m, 0.0013), want)
    # undefined channels are not flagged
    assert not sk_flags(np.array([0.0, 5.0]), np.array([0.0, 9.0]), np.array([64, 1]),
                        0.0013).any()


def test_flags_on_pfb_noise_at_the_configured_rate():
    # Integration through channelizer + power_sums + sk_flags: pure noise is flagged at 2 pfa
    # (one pfa per side), within 4 binomial sigma.
    m, pfa, blocks = 64, 0.01, 60
    rng = np.random.default_rng(6)
    power = make_channelizer("pfb", NCHAN).power(_complex_noise(NCHAN * (m * blocks + 3), rng))
    flags = np.array([sk_flags(*power_sums(power[b * m:(b + 1) * m]), pfa)
                      for b in range(blocks)])
    assert _binomial_ok(flags.sum(), flags.size, 2 * pfa)


# ------------------------------------------------------------------------------ errors
@pytest.mark.parametrize("call, words", [
    (lambda: sk_thresholds(64, 0.0), "pfa"),
    (lambda: sk_thresholds(64, 0.5), "pfa"),
    (lambda: sk_thresholds(64, float("nan")), "pfa"),
    (lambda: sk_thresholds(1, 0.01), "m must"),
    (lambda: sk_thresholds(np.array([64, 1]), 0.01), "m must"),
    (lambda: sk_thresholds(64, 0.01, method="gauss"), "method"),
    (lambda: sk_flags(1.0, 1.0, 64, 0.7), "pfa"),
    (lambda: sk_moments(1), "m must"),
    (lambda: sk_moments(64, n=0), "n (powers"),
    (lambda: sk_estimator(1.0, 1.0, 64, d=-1.0), "d (gamma"),
    (lambda: sk_estimator(1.0, 1.0, 64, n=float("inf")), "n (powers"),
])
def test_user_errors_raise_one_line_value_errors(call, words):
    with pytest.raises(ValueError) as info:
        call()
    msg = str(info.value)
    assert words in msg and "\n" not in msg


def test_module_does_not_import_scipy_stats():
    # scipy.stats costs the daemon a lot of memory (project rule); scipy.special only.
    code = ("import sys, spinflip.daemon.rfi.spectral_kurtosis as s; s.sk_thresholds(64, 0.01); "
            "print('scipy.stats' in sys.modules)")
    out = subprocess.run([sys.executable, "-c", code], capture_output=True, text=True, check=True)
    assert out.stdout.strip() == "False"
