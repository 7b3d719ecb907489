"""Tests of the model Milky Way (spinflip.daemon.sources.galaxy).

Sources of the checks are named beside each test:
- the IAU 1985 Galactic constants: MNRAS 221, 1023, 1986;
- Binney & Merrifield 1998 (*Galactic Astronomy*, ch. 9: kinematics of the gas disk, terminal
  velocity);
- Dickey & Lockman 1990 (ARA&A 28, 215: N_HI = 1.823e18 int T_B dv);
- astropy as reference for angular separations;
- common practice (observed HI line brightness) where no single source applies.
"""

import math

import numpy as np
import pytest
from astropy import units as u
from astropy.coordinates import SkyCoord

from spinflip.daemon.sources.galaxy import (
    NHI_PER_K_KMS,
    T_CMB_K,
    ModelGalaxy,
    beam_directions,
    rotation_speed_kms,
)

V = np.linspace(-400.0, 400.0, 1601)        # 0.5 km/s channels, wide enough for all the gas


@pytest.fixture(scope="module")
def galaxy():
    return ModelGalaxy()


def integral(tb, v=V):
    return float(np.trapezoid(tb, v))


# -- constants and rotation curve -------------------------------------------------------------
def test_defaults_are_iau_1985_constants(galaxy):
    # IAU 1985: R0 = 8.5 kpc, Theta0 = 220 km/s (MNRAS 221, 1023, 1986)
    assert galaxy.r0_kpc == 8.5
    assert galaxy.theta0_kms == 220.0


def test_rotation_curve_rises_then_stays_flat(galaxy):
    # A flat rotation curve beyond the inner few kpc (Binney & Merrifield 1998, sect. 9.1)
    r = np.linspace(0.0, 25.0, 251)
    theta = galaxy.rotation_speed_kms(r)
    assert theta[0] == 0.0
    assert np.all(np.diff(theta) >= 0.0)
    assert galaxy.rotation_speed_kms(galaxy.r0_kpc) == pytest.approx(220.0, rel=1e-12)
    flat = theta[r >= 5.0]
    assert np.all(np.abs(flat / 220.0 - 1.0) < 0.01)
    assert theta[r == 1.0][0] < 0.7 * 220.0        # still rising at 1 kpc
    # the module-level function and the method agree, also for other constants
    assert rotation_speed_kms(8.15, theta0_kms=236.0, r0_kpc=8.15) == pytest.approx(236.0)


def test_gas_at_solar_circle_has_zero_velocity(galaxy):
    # v_LSR = (Theta R0/R - Theta0) sin l cos b vanishes at R = R0 (Binney & Merrifield 9.1)
    s = galaxy.sightline(30.0, 0.0)
    i = np.argmin(np.abs(s.radius_kpc - galaxy.r0_kpc) + (s.distance_kpc < 5.0) * 1e9)
    assert abs(s.velocity_kms[i]) < 1.0


# -- line profiles -----------------------------------------------------------------------------
def test_first_quadrant_emission_reaches_terminal_velocity(galaxy):
    # In the first quadrant gas inside the solar circle has 0 < v <= v_t with
    # v_t = Theta(R0 sin l) - Theta0 sin l (tangent-point method, Binney & Merrifield 9.1).
    glon = 30.0
    sin_l = math.sin(math.radians(glon))
    v_t = float(galaxy.rotation_speed_kms(galaxy.r0_kpc * sin_l)) - galaxy.theta0_kms * sin_l
    assert 100.0 < v_t < 115.0
    tb = galaxy.brightness_temperature(glon, 0.0, V)
    bright = V[tb > 1.0]
    # the emission edge sits past v_t by a few dispersions, no more
    assert v_t < bright.max() < v_t + 4.0 * galaxy.sigma_v_kms
    assert np.interp(v_t - 10.0, V, tb) > 20.0
    assert np.all(tb[V > 140.0] < 0.5)
    # most emission lies between 0 and +120 km/s
    assert tb[(V >= 0.0) & (V <= 120.0)].sum() > 0.75 * tb.sum()


def test_first_quadrant_negative_velocities_only_beyond_solar_circle(galaxy):
    # At l = 30 deg, v < 0 needs R > R0, i.e. the far side beyond d = 2 R0 cos l
    # (Binney & Merrifield 9.1). The model disk extends past R0, so such gas exists, but it is
    # a minor part of the line.
    s = galaxy.sightline(30.0, 0.0)
    neg = s.velocity_kms < -0.5
    assert np.all(s.radius_kpc[neg] > galaxy.r0_kpc)
    assert np.all(s.distance_kpc[neg] > 2 * galaxy.r0_kpc * math.cos(math.radians(30.0)) - 0.1)
    tb = galaxy.brightness_temperature(30.0, 0.0, V)
    assert tb[V < -20.0].sum() < 0.15 * tb.sum()


def test_second_quadrant_emission_is_mostly_negative(galaxy):
    # Outer Galaxy, l = 150 deg: every R > R0, so v < 0 (Binney & Merrifield 9.1)
    s = galaxy.sightline(150.0, 0.0)
    assert np.all(s.velocity_kms <= 1e-9)
    tb = galaxy.brightness_temperature(150.0, 0.0, V)
    assert tb[V < 0.0].sum() > 0.8 * tb.sum()
    assert V[np.argmax(tb)] < 0.0


def test_fourth_quadrant_mirrors_first(galaxy):
    # Symmetric model: l -> 360 - l flips the velocity sign of the inner Galaxy
    # (Binney & Merrifield 9.1); the arms break exact symmetry, so compare the line edges.
    tb1 = galaxy.brightness_temperature(30.0, 0.0, V)
    tb4 = galaxy.brightness_temperature(330.0, 0.0, V)
    assert V[tb4 > 1.0].min() == pytest.approx(-V[tb1 > 1.0].max(), abs=5.0)


@pytest.mark.parametrize("glon", [10.0, 30.0, 60.0, 90.0, 150.0, 180.0, 240.0, 300.0])
def test_peak_brightness_in_plane_is_typical(galaxy, glon):
    # Observed HI peaks in the plane are ~50-130 K (common practice); never above T_s.
    tb = galaxy.brightness_temperature(glon, 0.0, V)
    assert 40.0 < tb.max() < 150.0
    assert tb.max() <= galaxy.spin_temperature_k + 1e-9
    assert tb.min() >= 0.0


def test_poles_much_fainter_than_plane(galaxy):
    # The thin HI layer: N_HI at the poles ~1e20 cm^-2, ~1e22 in the plane (Dickey & Lockman
    # 1990, from memory)
    w_plane = integral(galaxy.brightness_temperature(30.0, 0.0, V))
    for glat in (90.0, -90.0):
        w_pole = integral(galaxy.brightness_temperature(0.0, glat, V))
        assert w_pole < 0.05 * w_plane
        n_pole = galaxy.column_density_cm2(0.0, glat)
        assert 5e19 < n_pole < 5e20
    # plane-parallel layer: N(b) ~ N(90) / sin|b| at intermediate latitude
    ratio = galaxy.column_density_cm2(0.0, 30.0) / galaxy.column_density_cm2(0.0, 90.0)
    assert ratio == pytest.approx(2.0, rel=0.15)


# -- radiative transfer ------------------------------------------------------------------------
def test_optically_thin_limit_recovers_column_density():
    # N_HI = 1.823e18 int T_B dv when tau << 1 (Dickey & Lockman 1990)
    hot = ModelGalaxy(spin_temperature_k=1e7)
    for glon, glat in [(30.0, 0.0), (150.0, 0.0), (0.0, 90.0), (120.0, 20.0)]:
        n_true = hot.column_density_cm2(glon, glat)
        n_line = NHI_PER_K_KMS * integral(hot.brightness_temperature(glon, glat, V))
        assert n_line == pytest.approx(n_true, rel=0.02)


def test_optically_thick_line_underestimates_column(galaxy):
    # With T_s ~ 120 K the inner-plane line is saturated: the thin-limit formula gives a lower
    # bound (Dickey & Lockman 1990)
    n_line = NHI_PER_K_KMS * integral(galaxy.brightness_temperature(30.0, 0.0, V))
    assert n_line < 0.8 * galaxy.column_density_cm2(30.0, 0.0)
    assert galaxy.optical_depth(30.0, 0.0, V).max() > 1.0


def test_uniform_spin_temperature_transfer_telescopes(galaxy):
    # sum_i T_s (1 - e^-dtau_i) e^-tau_<i = T_s (1 - e^-tau) for constant T_s
    # (formal solution of radiative transfer, no background; Wilson, Rohlfs & Huttemeister,
    # Tools of Radio Astronomy, ch. 1, from memory)
    for glon in (30.0, 150.0):
        tb = galaxy.brightness_temperature(glon, 0.0, V)
        tau = galaxy.optical_depth(glon, 0.0, V)
        expected = galaxy.spin_temperature_k * -np.expm1(-tau)
        np.testing.assert_allclose(tb, expected, rtol=1e-9, atol=1e-6)


def test_output_shape_follows_velocity_array(galaxy):
    v = np.linspace(-100.0, 100.0, 24).reshape(4, 6)
    tb = galaxy.brightness_temperature(60.0, 1.0, v)
    assert tb.shape == (4, 6)
    np.testing.assert_allclose(tb.ravel(), galaxy.brightness_temperature(60.0, 1.0, v.ravel()))
    assert galaxy.brightness_temperature(60.0, 1.0, 1000.0).shape == ()
    assert float(galaxy.brightness_temperature(60.0, 1.0, 1000.0)) == 0.0


def test_model_is_deterministic():
    a = ModelGalaxy().brightness_temperature(45.0, 2.0, V, beam_fwhm_deg=3.0)
    b = ModelGalaxy().brightness_temperature(45.0, 2.0, V, beam_fwhm_deg=3.0)
    np.testing.assert_array_equal(a, b)


def test_spiral_arms_modulate_density_around_mean(galaxy):
    # The arm term has azimuthal mean 1, so the surface density stays exponential on average
    phi = np.linspace(-np.pi, np.pi, 4096, endpoint=False)
    for r in (5.0, 8.5, 12.0):
        n = galaxy.density_cm3(r, phi, 0.0)
        smooth = ModelGalaxy(arm_amplitude=0.0).density_cm3(r, 0.0, 0.0)
        assert n.mean() == pytest.approx(float(smooth), rel=1e-6)
        assert n.max() / n.min() > 2.0
    # exponential scale length between the solar circle and 12 kpc, arms removed
    flat = ModelGalaxy(arm_amplitude=0.0, flare_length_kpc=1e9)
    ratio = flat.density_cm3(12.0, 0.0, 0.0) / flat.density_cm3(8.5, 0.0, 0.0)
    assert float(ratio) == pytest.approx(math.exp(-3.5 / 3.5), rel=1e-6)


# -- beam --------------------------------------------------------------------------------------
def test_beam_directions_lie_at_half_fwhm():
    # angular separations checked with astropy.coordinates as reference
    for glon, glat in [(30.0, 0.0), (200.0, 60.0), (10.0, 89.9)]:
        dirs = beam_directions(glon, glat, 4.0)
        assert len(dirs) == 7
        centre = SkyCoord(glon * u.deg, glat * u.deg, frame="galactic")
        others = SkyCoord([d[0] for d in dirs[1:]] * u.deg, [d[1] for d in dirs[1:]] * u.deg,
                          frame="galactic")
        np.testing.assert_allclose(centre.separation(others).deg, 2.0, atol=1e-9)
        # Gaussian beam weight at r = FWHM/2: exp(-4 ln 2 / 4) = 0.5
        assert dirs[0][2] == 1.0
        assert all(d[2] == pytest.approx(0.5) for d in dirs[1:])


def test_beam_smoothing_conserves_integral_for_uniform_sky(galaxy):
    # Near a pole the layer looks nearly uniform, so the beam-averaged line keeps its integral
    w0 = integral(galaxy.brightness_temperature(0.0, 90.0, V))
    w_beam = integral(galaxy.brightness_temperature(0.0, 90.0, V, beam_fwhm_deg=5.0))
    assert w_beam == pytest.approx(w0, rel=0.02)


def test_beam_smoothing_blurs_the_plane(galaxy):
    # a wide beam at b = 0 also sees gas off the plane: lower peak, line still there
    tb0 = galaxy.brightness_temperature(90.0, 0.0, V)
    tb_beam = galaxy.brightness_temperature(90.0, 0.0, V, beam_fwhm_deg=6.0)
    assert tb_beam.max() < tb0.max()
    assert tb_beam.max() > 0.3 * tb0.max()


# -- continuum ---------------------------------------------------------------------------------
def test_continuum_rough_levels(galaxy):
    # 1420 MHz sky: CMB 2.725 K (Fixsen 2009, from memory) plus ~0.5-1 K at the poles and a few
    # K along the plane, brightest toward the centre (common practice)
    pole = galaxy.continuum_temperature(0.0, 90.0)
    assert 0.4 < pole - T_CMB_K < 1.2
    assert galaxy.continuum_temperature(123.0, -90.0) == pytest.approx(pole)
    centre = galaxy.continuum_temperature(0.0, 0.0)
    plane = galaxy.continuum_temperature(30.0, 0.0)
    anti = galaxy.continuum_temperature(180.0, 0.0)
    assert centre > plane > anti > pole
    assert 2.0 < plane - T_CMB_K < 10.0
    # symmetric about l = 0 and b = 0, and continuous across l = 0/360
    assert galaxy.continuum_temperature(330.0, 5.0) == pytest.approx(
        galaxy.continuum_temperature(30.0, -5.0))
    assert galaxy.continuum_temperature(359.999, 0.0) == pytest.approx(centre, rel=1e-6)
