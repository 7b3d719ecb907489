"""The robust sigma 1.4826 MAD, computed everywhere by spinflip.daemon.dsp.robust.

Reference: Rousseeuw, P. J. & Croux, C. 1993, JASA 88, 1273: sigma = 1.4826 med|x - med x|
for Gaussian data, 1.4826 = 1 / Phi^-1(3/4) (the factor from memory; Phi^-1 from scipy).
scipy.stats.median_abs_deviation(scale="normal") is the reference implementation; the daemon
does not import scipy.stats (about 45 MB on a small board), which the last test checks.
"""

from __future__ import annotations

import numpy as np
from scipy.stats import median_abs_deviation, norm

from spinflip.daemon.dsp.robust import MAD_TO_SIGMA, robust_sigma
from spinflip.daemon.rfi.carriers import carrier_ratio


def _formula(x: np.ndarray) -> float:
    return 1.4826 * float(np.median(np.abs(x - np.median(x))))


def test_scipy_normal_scale_is_the_1_4826_factor():
    assert 1.0 / norm.ppf(0.75) == median_abs_deviation([-1.0, 0.0, 1.0], scale="normal")
    assert abs(1.0 / norm.ppf(0.75) - 1.4826) < 1e-5


def test_scipy_mad_equals_the_formula_on_gaussian_and_skewed_data():
    rng = np.random.default_rng(7)
    for x in (rng.normal(3.0, 2.0, 1001), rng.exponential(1.0, 400), np.arange(10.0) ** 2):
        assert abs(median_abs_deviation(x, scale="normal") - _formula(x)) <= 2e-6 * _formula(x)


def test_carrier_ratio_sigma_is_the_mad_formula():
    rng = np.random.default_rng(3)
    p = 100.0 * (1.0 + 0.01 * rng.normal(size=512))
    usable = np.ones(512, bool)
    r, sigma = carrier_ratio(p, usable)
    # r is the excess minus its median, so the formula applies to r itself
    assert abs(sigma - _formula(r[usable])) <= 2e-6 * sigma
    assert 0.005 < sigma < 0.02          # about the 1 % scatter put in


def test_our_robust_sigma_equals_scipy_reference():
    assert abs(MAD_TO_SIGMA - 1.0 / norm.ppf(0.75)) < 1e-12
    rng = np.random.default_rng(11)
    for x in (rng.normal(3.0, 2.0, 1001), rng.exponential(1.0, 400), np.arange(10.0) ** 2,
              np.array([1.0, 1.0, 1.0, 50.0])):
        ref = median_abs_deviation(x, scale="normal")
        assert abs(robust_sigma(x) - ref) <= 1e-12 * max(ref, 1.0)


def test_the_daemon_does_not_import_scipy_stats():
    import subprocess
    import sys
    code = ("import sys; import spinflip.daemon.run.observation, spinflip.cli; "
            "print('scipy.stats' in sys.modules)")
    out = subprocess.run([sys.executable, "-c", code], capture_output=True, text=True, timeout=60)
    assert out.returncode == 0, out.stderr
    assert out.stdout.strip() == "False"
