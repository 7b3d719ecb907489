"""Polynomial baseline over line-free channels (spinflip.daemon.products.baseline).

Synthetic spectrum: a cubic baseline, a positive Gaussian emission line of 30 K and the two
negative half-height fold ghosts that frequency switching leaves at +- the switch offset
(calibrate.py's folding; Wilson, Rohlfs & Huttemeister, frequency switching), plus seeded
Gaussian noise of known sigma. References: least-squares statistics (the fitted model's
error has mean variance sigma^2 (p + 1) / N over the fitted channels: the trace of the hat
matrix is p + 1; common practice), numpy.polyfit as an independent least-squares reference.
"""

import numpy as np
import pytest
from numpy.polynomial import Polynomial

from spinflip.daemon.products.baseline import BaselineFit, fit_baseline

NCHAN = 1024
SIGMA_K = 0.2                    # injected noise, K
ORDER = 3
V_KM_S = np.linspace(-250.0, 250.0, NCHAN)
LINE_V_KM_S, LINE_SIGMA_KM_S, LINE_PEAK_K = 10.0, 8.0, 30.0
GHOST_OFFSET_KM_S = 100.0
# line-free windows chosen by hand: > 5 line sigmas from the line and from both ghosts
WINDOWS = [(-250.0, -135.0), (-50.0, -30.0), (50.0, 70.0), (150.0, 250.0)]


def _truth_baseline_k(v):
    # a cubic with all four terms of a size a real residual shape could have
    return Polynomial([1.5, 0.8, -1.2, 0.6], domain=(-250.0, 250.0), window=(-1.0, 1.0))(v)


def _gauss(v, v0, peak_k):
    return peak_k * np.exp(-0.5 * ((v - v0) / LINE_SIGMA_KM_S) ** 2)


def _lines_k(v=V_KM_S):
    return (_gauss(v, LINE_V_KM_S, LINE_PEAK_K)
             + _gauss(v, LINE_V_KM_S - GHOST_OFFSET_KM_S, -LINE_PEAK_K / 2)
             + _gauss(v, LINE_V_KM_S + GHOST_OFFSET_KM_S, -LINE_PEAK_K / 2))


def _spectrum(seed=7):
    rng = np.random.default_rng(seed)
    data = _truth_baseline_k(V_KM_S) + _lines_k() + rng.normal(0.0, SIGMA_K, NCHAN)
    flagged = np.zeros(NCHAN, dtype=bool)
    flagged[NCHAN // 2] = True                 # a DC channel, as calibrate() flags it
    data[NCHAN // 2] = 500.0                   # whatever sits there must not be used
    return data, flagged


def _assert_recovers_truth(fit: BaselineFit):
    n_free = int(fit.line_free.sum())
    err_k = fit.model(V_KM_S) - _truth_baseline_k(V_KM_S)
    # common practice (least squares): rms model error ~ sigma sqrt((p+1)/N); allow 3x
    assert np.sqrt(np.mean(err_k ** 2)) < 3.0 * SIGMA_K * np.sqrt((ORDER + 1) / n_free)
    # at the axis ends the error std of a degree-p fit is ~ (p+1) sigma / sqrt(N) (Legendre
    # sum of (2k+1)); allow 2.5x of that anywhere
    assert np.max(np.abs(err_k)) < 2.5 * (ORDER + 1) * SIGMA_K / np.sqrt(n_free)


def test_automatic_mode_recovers_cubic_and_excludes_lines():
    data, flagged = _spectrum()
    fit = fit_baseline(data, flagged, V_KM_S, ORDER)
    assert fit.converged
    assert fit.order == ORDER and fit.coef.shape == (ORDER + 1,) and fit.coef.dtype == np.float64
    assert fit.domain == (-250.0, 250.0)
    _assert_recovers_truth(fit)
    # every channel where the line or a ghost stands above the clip level (3 noise sigma,
    # either sign) is left out, and the dilation takes a few more channels beyond; so is the
    # flagged channel
    above = np.abs(_lines_k()) > 3.0 * SIGMA_K
    assert not fit.line_free[above].any()
    assert not fit.line_free[np.convolve(above, np.ones(5), mode="same") > 0].any()
    assert not fit.line_free[NCHAN // 2]
    # far from the lines most channels are kept: clipping pure noise at 3 sigma takes 0.27 %
    # of them (normal distribution), the dilation by 3 channels each side 7 times that
    far = (np.abs(_lines_k()) < 1e-3 * SIGMA_K) & ~flagged
    assert fit.line_free[far].mean() > 0.95
    # rms of the residuals estimates the injected noise to 10 %
    assert abs(fit.rms_k - SIGMA_K) < 0.1 * SIGMA_K


def test_windows_mode_agrees_with_automatic_within_noise():
    data, flagged = _spectrum()
    auto = fit_baseline(data, flagged, V_KM_S, ORDER)
    win = fit_baseline(data, flagged, V_KM_S, ORDER, windows=WINDOWS)
    assert win.converged and win.iterations == 1
    _assert_recovers_truth(win)
    in_windows = np.zeros(NCHAN, dtype=bool)
    for lo, hi in WINDOWS:
        in_windows |= (V_KM_S >= lo) & (V_KM_S <= hi)
    np.testing.assert_array_equal(win.line_free, in_windows & ~flagged)
    # the two fits share most channels: they differ by less than one fit's own error
    # (common practice, least squares)
    diff_k = auto.model(V_KM_S) - win.model(V_KM_S)
    n_win = int(win.line_free.sum())
    assert np.sqrt(np.mean(diff_k ** 2)) < 3.0 * SIGMA_K * np.sqrt((ORDER + 1) / n_win)
    assert abs(win.rms_k - SIGMA_K) < 0.1 * SIGMA_K


def test_matches_numpy_polyfit_on_the_same_channels():
    # independent reference: numpy.polyfit (plain power basis in x) on the same channels
    data, flagged = _spectrum(seed=11)
    for fit in (fit_baseline(data, flagged, V_KM_S, ORDER),
                fit_baseline(data, flagged, V_KM_S, ORDER, windows=WINDOWS),
                fit_baseline(data, flagged, V_KM_S, 5)):
        lf = fit.line_free
        ref = np.polyval(np.polyfit(V_KM_S[lf], data[lf], fit.order), V_KM_S)
        np.testing.assert_allclose(fit.model(V_KM_S), ref, rtol=0, atol=1e-6)
        # rms_k is the rms of the residuals over exactly those channels
        assert fit.rms_k == pytest.approx(np.sqrt(np.mean((data[lf] - ref[lf]) ** 2)), rel=1e-9)


def test_input_is_never_modified_and_subtract_returns_a_new_array():
    data, flagged = _spectrum()
    data_before, flagged_before, v_before = data.copy(), flagged.copy(), V_KM_S.copy()
    fit = fit_baseline(data, flagged, V_KM_S, ORDER)
    out = fit.subtract(data)
    np.testing.assert_array_equal(data, data_before)
    np.testing.assert_array_equal(flagged, flagged_before)
    np.testing.assert_array_equal(V_KM_S, v_before)
    assert out is not data and not np.shares_memory(out, data)
    np.testing.assert_allclose(out, data - fit.model(V_KM_S), rtol=0, atol=1e-12)
    # after subtraction the line-free channels average to zero (least squares with a constant
    # term: residuals sum to zero; common practice)
    assert abs(out[fit.line_free].mean()) < 1e-10
    with pytest.raises(ValueError, match="shape"):
        fit.subtract(data[:-1])


def test_descending_axis_gives_the_same_baseline():
    # the axis may run either way (velocity falls as sky frequency rises; FITS WCS paper III)
    data, flagged = _spectrum()
    up = fit_baseline(data, flagged, V_KM_S, ORDER)
    down = fit_baseline(data[::-1], flagged[::-1], V_KM_S[::-1], ORDER)
    np.testing.assert_array_equal(down.line_free[::-1], up.line_free)
    np.testing.assert_allclose(down.model(V_KM_S), up.model(V_KM_S), rtol=0, atol=1e-9)


def test_noiseless_spectrum_is_fitted_exactly():
    # no noise: the clipping must stop (MAD at rounding level) and the baseline is exact
    data = _truth_baseline_k(V_KM_S) + _gauss(V_KM_S, LINE_V_KM_S, LINE_PEAK_K)
    fit = fit_baseline(data, np.zeros(NCHAN, dtype=bool), V_KM_S, ORDER)
    np.testing.assert_allclose(fit.model(V_KM_S), _truth_baseline_k(V_KM_S), rtol=0, atol=1e-6)
    assert not fit.line_free[np.abs(V_KM_S - LINE_V_KM_S) < 3.0 * LINE_SIGMA_KM_S].any()


# -- errors a user can make: ValueError, one line naming the value ---------------------------
def _one_line_error(match, *args, **kwargs):
    with pytest.raises(ValueError, match=match) as err:
        fit_baseline(*args, **kwargs)
    assert "\n" not in str(err.value)


@pytest.mark.parametrize("order", [-1, 9, 2.5, True, "3"])
def test_order_out_of_range(order):
    data, flagged = _spectrum()
    _one_line_error(r"order must be an integer 0\.\.8; got", data, flagged, V_KM_S, order)


def test_too_few_line_free_channels():
    data, flagged = _spectrum()
    flagged = np.ones(NCHAN, dtype=bool)
    flagged[:7] = False                        # 7 < 2 (3 + 1) = 8
    _one_line_error(r"too few line-free channels for order 3: 7 .* need at least 8",
                    data, flagged, V_KM_S, 3)
    flagged[7] = False                         # 8 is enough
    fit_baseline(data, flagged, V_KM_S, 3, windows=None, max_iter=1)
    # a narrow window holds too few channels for the order
    _one_line_error(r"too few line-free channels for order 8: \d+ inside the windows",
                    data, np.zeros(NCHAN, dtype=bool), V_KM_S, 8, windows=[(-200.0, -195.0)])


@pytest.mark.parametrize("window, match", [
    ((-100.0, -100.0), r"window \(-100, -100\) must have lo < hi"),
    ((-90.0, -120.0), r"window \(-90, -120\) must have lo < hi"),
    ((-300.0, -200.0), r"window \(-300, -200\) reaches outside the axis \[-250, 250\]"),
    ((200.0, 260.0), r"window \(200, 260\) reaches outside the axis \[-250, 250\]"),
])
def test_bad_window(window, match):
    data, flagged = _spectrum()
    _one_line_error(match, data, flagged, V_KM_S, ORDER, windows=[(-250.0, -150.0), window])
