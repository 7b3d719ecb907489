"""The scan product: LSRK average, baseline over line-free channels, line integral, N(HI)."""

import numpy as np
import pytest

from spinflip.daemon.products.scan_average import scan_products
from spinflip.daemon.sky.hi_line import C_M_S, HI_REST_FREQ_HZ
from spinflip.daemon.sky.kinematics import circular_velocity_lsr_km_s, expected_velocity_range_km_s

NCHAN = 1024
CDELT = 2.4e6 / NCHAN


def _rows(line_k, baseline_k, l=120.0, b=20.0, n=4, sigma=0.05, seed=0):
    rng = np.random.default_rng(seed)
    rows = []
    for _ in range(n):
        rows.append({"DATA": (line_k + baseline_k + sigma * rng.standard_normal(NCHAN)).astype(np.float32),
                     "FLAGGED": np.zeros(NCHAN, bool), "CRVAL1": HI_REST_FREQ_HZ, "CDELT1": CDELT,
                     "CRPIX1": NCHAN // 2 + 1.0, "RESTFREQ": HI_REST_FREQ_HZ, "VFRAME": 0.0,
                     "GLON": l, "GLAT": b, "FOLDED": 0})
    return rows


def _v_km_s():
    f = HI_REST_FREQ_HZ + (np.arange(NCHAN) + 1 - (NCHAN // 2 + 1)) * CDELT
    return C_M_S * (HI_REST_FREQ_HZ - f) / HI_REST_FREQ_HZ / 1e3


CFG = {"mode": "auto", "order": 2, "windows_km_s": []}


def test_auto_baseline_removes_a_slope_and_the_integral_is_the_lines():
    v = _v_km_s()
    line = 10.0 * np.exp(-0.5 * (v / 8.0) ** 2)            # integral 10 * 8 * sqrt(2 pi)
    base = 1.5 + 0.004 * v + 1e-5 * v ** 2
    (hdu,) = scan_products({"BUNIT": "K"}, NCHAN, _rows(line, base), CFG)
    h, d = hdu.header, hdu.data
    assert h["BLMODE"] == "auto" and h["BLORDER"] == 2 and h["BLRMS"] < 0.05
    # analytic Gaussian integral T0 sigma sqrt(2 pi)
    assert h["LINEINT"] == pytest.approx(10 * 8 * np.sqrt(2 * np.pi), rel=0.01)
    # N(HI) = 1.823e18 W (Dickey & Lockman 1990)
    assert h["NHI"] == pytest.approx(1.823e18 * h["LINEINT"], rel=1e-12)
    lo, hi = expected_velocity_range_km_s(120.0, 20.0)
    assert h["LINEVLO"] >= lo - 1 and h["LINEVHI"] <= hi + 1
    assert not d["LINEFREE"][np.abs(d["VRAD"] / 1e3) < 30].any()
    # the baseline on the line-free channels is the injected one (v falls with channel number)
    expected = np.interp(d["VRAD"] / 1e3, v[::-1], base[::-1])
    np.testing.assert_allclose(d["BASELINE"][d["LINEFREE"]], expected[d["LINEFREE"]], atol=0.02)


def test_windows_mode_and_counts_and_off():
    v = _v_km_s()
    line = 10.0 * np.exp(-0.5 * (v / 8.0) ** 2)
    cfg = {"mode": "windows", "order": 1, "windows_km_s": [[-200.0, -80.0], [80.0, 200.0]]}
    (hdu,) = scan_products({"BUNIT": "K"}, NCHAN, _rows(line, 2.0 + 0.01 * v), cfg)
    vk = hdu.data["VRAD"] / 1e3
    assert np.all((np.abs(vk[hdu.data["LINEFREE"]]) >= 80) & (np.abs(vk[hdu.data["LINEFREE"]]) <= 200))
    assert hdu.header["LINEINT"] == pytest.approx(10 * 8 * np.sqrt(2 * np.pi), rel=0.01)
    assert scan_products({"BUNIT": "count"}, NCHAN, _rows(line, 0), CFG) == []
    assert scan_products({"BUNIT": "K"}, NCHAN, _rows(line, 0), {**CFG, "mode": "off"}) == []


def test_rotation_curve_velocity_matches_the_textbook_formula():
    # v = (Theta0 R0 / R - Theta0) sin l cos b (Binney & Merrifield 1998, 9.1): at the tangent
    # point of l = 30 deg (d = R0 cos l, R = R0 sin l) a flat curve gives Theta0 (1 - sin l)
    r0, th0 = 8.5, 220.0
    v = circular_velocity_lsr_km_s(30.0, 0.0, r0 * np.cos(np.radians(30.0)))
    assert v == pytest.approx(th0 * (1 - np.sin(np.radians(30.0))), rel=1e-9)
    lo, hi = expected_velocity_range_km_s(30.0, 0.0)
    assert hi == pytest.approx(110.0 + 40.0, abs=0.5) and lo < -40
