"""Line integral, column density, main-beam scale and radiometer noise
(spinflip.daemon.products.line_integral).

Sources: the Gaussian integral T0 sigma sqrt(2 pi) (analytic); Dickey & Lockman 1990, ARA&A 28,
215 (N_HI = 1.823e18 int T_B dv, optically thin, and tau = N phi / (1.823e18 T_s)); radiative
transfer of a uniform slab T_B = T_s (1 - exp(-tau)) (common practice; Wilson, Rohlfs &
Huttemeister, *Tools of Radio Astronomy*); the radiometer equation (same book); scipy.special.erf
as reference for exact channel means.
"""

import math

import numpy as np
import pytest
from scipy.special import erf

from spinflip.daemon.products.line_integral import (
    HI_COLUMN_PER_K_KM_S_CM2,
    K_SWITCHED,
    K_TOTAL_POWER,
    brightness_from_antenna_k,
    column_density_cm2,
    integrated_intensity_k_km_s,
    radiometer_noise_k,
)

V_KM_S = np.arange(-100.0, 100.0 + 0.5, 1.0)          # 1 km/s channels
T0_K, V0_KM_S, SIGMA_KM_S = 5.0, 3.3, 6.0


def _gauss_k(v):
    return T0_K * np.exp(-0.5 * ((v - V0_KM_S) / SIGMA_KM_S) ** 2)


def test_gaussian_integral_matches_analytic():
    # analytic: integral of T0 exp(-(v-v0)^2 / 2 sigma^2) dv = T0 sigma sqrt(2 pi); to 0.1 %
    res = integrated_intensity_k_km_s(_gauss_k(V_KM_S), V_KM_S)
    exact = T0_K * SIGMA_KM_S * math.sqrt(2 * math.pi)
    assert res.integral_k_km_s == pytest.approx(exact, rel=1e-3)
    assert res.covered_km_s == pytest.approx(201.0) and res.span_km_s == pytest.approx(201.0)


def test_channel_means_sum_to_the_exact_integral():
    # a channel holds the mean over its width: with exact channel means (reference:
    # scipy.special.erf) the channel sum is the integral over the band, to rounding
    e = np.concatenate((V_KM_S - 0.5, [V_KM_S[-1] + 0.5]))
    cdf = 0.5 * (1 + erf((e - V0_KM_S) / (SIGMA_KM_S * math.sqrt(2))))
    area = T0_K * SIGMA_KM_S * math.sqrt(2 * math.pi)
    means_k = area * np.diff(cdf) / 1.0                      # 1 km/s wide channels
    res = integrated_intensity_k_km_s(means_k, V_KM_S)
    assert res.integral_k_km_s == pytest.approx(area * (cdf[-1] - cdf[0]), rel=1e-12)


def test_excluded_channels_are_left_out_and_reported():
    tb = _gauss_k(V_KM_S)
    full = integrated_intensity_k_km_s(tb, V_KM_S).integral_k_km_s
    good = np.ones(V_KM_S.size, dtype=bool)
    good[:10] = False                                        # line-free channels: no loss
    centre = int(np.argmin(np.abs(V_KM_S - V0_KM_S)))
    good[centre] = False                                     # the line peak: its area is lost
    tb_bad = tb.copy()
    tb_bad[centre] = np.nan                                  # excluded, so never read
    res = integrated_intensity_k_km_s(tb_bad, V_KM_S, good=good)
    assert res.integral_k_km_s == pytest.approx(full - tb[centre] * 1.0 - tb[:10].sum(), rel=1e-12)
    assert res.covered_km_s == pytest.approx(201.0 - 11.0)
    assert res.span_km_s == pytest.approx(201.0)
    # a non-finite value in a channel marked good counts as excluded too
    res_nan = integrated_intensity_k_km_s(tb_bad, V_KM_S)
    assert res_nan.covered_km_s == pytest.approx(200.0)
    # nothing good in range: no number, zero coverage
    none = integrated_intensity_k_km_s(tb, V_KM_S, good=np.zeros(V_KM_S.size, dtype=bool))
    assert math.isnan(none.integral_k_km_s) and none.covered_km_s == 0.0


def test_velocity_range_weights_border_channels_by_overlap():
    # a constant 2 K over [lo, hi] integrates to 2 (hi - lo) even when the borders cut
    # through channels (arithmetic)
    tb = np.full(V_KM_S.size, 2.0)
    res = integrated_intensity_k_km_s(tb, V_KM_S, v_range_km_s=(-10.25, 17.6))
    assert res.integral_k_km_s == pytest.approx(2.0 * 27.85, rel=1e-12)
    assert res.covered_km_s == pytest.approx(27.85, rel=1e-12)
    # a range sticking out of the band covers only the band's part of it
    res = integrated_intensity_k_km_s(tb, V_KM_S, v_range_km_s=(90.0, 500.0))
    assert res.span_km_s == pytest.approx(100.5 - 90.0)
    # the Gaussian within +-3 sigma holds erf(3 / sqrt 2) of its area (analytic), to 0.1 %
    lo, hi = V0_KM_S - 3 * SIGMA_KM_S, V0_KM_S + 3 * SIGMA_KM_S
    res = integrated_intensity_k_km_s(_gauss_k(V_KM_S), V_KM_S, v_range_km_s=(lo, hi))
    exact = T0_K * SIGMA_KM_S * math.sqrt(2 * math.pi) * math.erf(3 / math.sqrt(2))
    assert res.integral_k_km_s == pytest.approx(exact, rel=1e-3)


def test_descending_axis_gives_the_same_integral():
    # the axis may run either way (velocity falls as sky frequency rises; FITS WCS paper III)
    tb = _gauss_k(V_KM_S)
    good = V_KM_S < 50.0
    up = integrated_intensity_k_km_s(tb, V_KM_S, good=good, v_range_km_s=(-20.3, 30.0))
    down = integrated_intensity_k_km_s(tb[::-1], V_KM_S[::-1], good=good[::-1],
                                       v_range_km_s=(-20.3, 30.0))
    assert down == pytest.approx(up, rel=1e-12)


def test_column_density_of_one_k_km_s():
    # Dickey & Lockman 1990: N_HI = 1.823e18 cm^-2 per K km/s
    assert column_density_cm2(1.0) == 1.823e18
    assert HI_COLUMN_PER_K_KM_S_CM2 == 1.823e18
    np.testing.assert_allclose(column_density_cm2([0.0, 2.0]), [0.0, 3.646e18], rtol=1e-15)


def test_optically_thin_slab_returns_its_column():
    # Dickey & Lockman 1990: tau(v) = N phi(v) / (1.823e18 T_s) for a uniform slab of spin
    # temperature T_s; T_B = T_s (1 - exp(-tau)) (common practice, radiative transfer), which
    # is T_s tau for tau << 1, so integral T_B dv = N / 1.823e18
    t_s_k, n_cm2 = 120.0, 2.0e18
    phi_per_km_s = np.exp(-0.5 * ((V_KM_S - V0_KM_S) / SIGMA_KM_S) ** 2) / (
        SIGMA_KM_S * math.sqrt(2 * math.pi))
    tau = n_cm2 * phi_per_km_s / (1.823e18 * t_s_k)
    assert tau.max() < 1e-3                                  # optically thin indeed
    tb_k = t_s_k * -np.expm1(-tau)
    np.testing.assert_allclose(tb_k, t_s_k * tau, rtol=tau.max())   # T_B = T_s tau, to O(tau)
    w = integrated_intensity_k_km_s(tb_k, V_KM_S).integral_k_km_s
    assert w == pytest.approx(n_cm2 / 1.823e18, rel=1e-3)
    assert column_density_cm2(w) == pytest.approx(n_cm2, rel=1e-3)


def test_main_beam_brightness():
    # T_mb = T_A / eta_mb (Kutner & Ulich 1981 temperature scales; common practice)
    assert brightness_from_antenna_k(10.0, 0.5) == pytest.approx(20.0)
    assert brightness_from_antenna_k(10.0, 1.0) == 10.0
    np.testing.assert_allclose(brightness_from_antenna_k(np.array([1.0, 3.0]), 0.75), [4 / 3, 4.0])
    for eta in (0.0, -0.2, 1.01, float("nan")):
        with pytest.raises(ValueError, match=r"main_beam_efficiency must be in \(0, 1\]; got") as e:
            brightness_from_antenna_k(1.0, eta)
        assert "\n" not in str(e.value)


def test_radiometer_equation_numbers():
    # Wilson, Rohlfs & Huttemeister: Delta T = K Tsys / sqrt(B t); 100 K / sqrt(1e6 Hz * 1 s)
    # = 0.1 K (arithmetic); K = sqrt 2 for the switched difference
    assert radiometer_noise_k(100.0, 1e6, 1.0) == pytest.approx(0.1, rel=1e-15)
    assert radiometer_noise_k(100.0, 1e6, 1.0, K_TOTAL_POWER) == pytest.approx(0.1, rel=1e-15)
    assert radiometer_noise_k(100.0, 1e6, 1.0, K_SWITCHED) == pytest.approx(0.1 * math.sqrt(2))
    # four times the time halves the noise (same formula)
    assert radiometer_noise_k(100.0, 1e6, 4.0) == pytest.approx(0.05, rel=1e-15)
    for kwargs in ({"tsys_k": 0.0}, {"bandwidth_hz": -1.0}, {"time_s": float("inf")},
                   {"k_factor": 0.0}):
        args = {"tsys_k": 100.0, "bandwidth_hz": 1e6, "time_s": 1.0} | kwargs
        name = next(iter(kwargs))
        with pytest.raises(ValueError, match=rf"{name} must be a finite number > 0; got"):
            radiometer_noise_k(**args)


def test_integral_input_errors():
    tb = _gauss_k(V_KM_S)
    cases = [
        ({"v_range_km_s": (5.0, 5.0)}, r"v_range_km_s \(5, 5\) must have lo < hi"),
        ({"v_range_km_s": (200.0, 300.0)}, r"v_range_km_s \(200, 300\) km/s misses the axis"),
        ({"good": np.ones(3, dtype=bool)}, r"must be 1-D of one length"),
    ]
    for kwargs, match in cases:
        with pytest.raises(ValueError, match=match) as e:
            integrated_intensity_k_km_s(tb, V_KM_S, **kwargs)
        assert "\n" not in str(e.value)
    v_bad = V_KM_S.copy()
    v_bad[5] = v_bad[4]
    with pytest.raises(ValueError, match="strictly monotonic"):
        integrated_intensity_k_km_s(tb, v_bad)
