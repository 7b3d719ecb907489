"""Kinematics of the reduction: terminal velocities (spinflip.reduce.tangent), kinematic
distances (spinflip.reduce.distances) and the face-on map (spinflip.reduce.faceon).

Sources named beside each check: astropy's Galactocentric frame (astropy.coordinates) for the
kinematic distances; galpy's MWPotential2014 (Bovy 2015, ApJS 216, 29) for a published
circular-speed curve; the tangent-point relation and the kinematic distance equations of
Binney & Merrifield 1998, Galactic Astronomy, sect. 9.1; N_HI = 1.823e18 int T_B dv (Dickey &
Lockman 1990, ARA&A 28, 215); Kepler's Theta = sqrt(GM/R); astropy.constants for the unit of
the surface density.
"""

import math

import astropy.units as u
import numpy as np
import pytest
from astropy.constants import M_sun, m_e, m_p, pc
from astropy.coordinates import (
    CartesianDifferential,
    CartesianRepresentation,
    Galactic,
    Galactocentric,
)
from galpy import potential as galpy_pot

from spinflip.reduce.constants import CONSTANTS
from spinflip.reduce.distances import heliocentric_kpc, radius_kpc, terminal_velocity_km_s
from spinflip.reduce.faceon import ATOMS_CM2_PER_MSUN_PC2, CM_PER_KPC, face_on_map
from spinflip.reduce.profile import Stack
from spinflip.reduce.tangent import keplerian_km_s, rotation_curve, terminal_velocity

C = CONSTANTS["iau1985"]                 # R0 = 8.5 kpc, Theta0 = 220 km/s (MNRAS 221, 1023, 1986)
R0, T0 = C.r0_kpc, C.theta0_km_s


def _stack(glon, v, tb, sigma=0.1, glat=0.0, window=(-150.0, 240.0)):
    n = v.size
    return Stack(object=f"l{glon:g}", glon_deg=glon, glat_deg=glat, v_km_s=v, tb_k=tb,
                 sigma_k=np.full(n, sigma), weight=np.ones(n), exposure_s=60.0, n_rows=1,
                 n_scans=1, w_k_km_s=0.0, w_err_k_km_s=0.0, nhi_cm2=0.0, nhi_err_cm2=0.0,
                 line_window_km_s=window, baseline_order=1)


# -- kinematic distances vs astropy's Galactocentric frame ----------------------------------------

def test_distances_match_astropy_galactocentric():
    # astropy Galactocentric: GC at the origin, the Sun at x = -R0, y toward l = 90 deg. Sun in
    # the plane (z_sun = 0, roll = 0) moving with the LSR exactly: galcen_v_sun = (0, Theta0, 0),
    # so the Galactic-frame radial velocity of a cloud is its v_LSR. Clouds in flat circular
    # rotation (Theta0), sense of the Sun's motion: v = Theta0 (y, -x) / R.
    frame = Galactocentric(galcen_distance=R0 * u.kpc, z_sun=0 * u.pc, roll=0 * u.deg,
                           galcen_v_sun=CartesianDifferential([0.0, T0, 0.0] * u.km / u.s))
    # our frame: x toward l = 90 deg, y from the centre to the Sun -> astropy (-y, x)
    ours = np.array([(1.0, 4.0), (3.0, 3.0), (-2.0, 5.5), (2.5, -3.0), (-3.5, -4.0),
                     (4.0, 9.0), (-6.0, 10.0), (9.0, 2.0), (1.5, 6.5), (-1.2, 3.0)])
    x_a, y_a = -ours[:, 1], ours[:, 0]
    r_true = np.hypot(x_a, y_a)
    vel = CartesianDifferential(T0 * y_a / r_true, -T0 * x_a / r_true, np.zeros_like(x_a),
                                unit=u.km / u.s)
    pos = CartesianRepresentation(x_a, y_a, np.zeros_like(x_a), unit=u.kpc)
    gal = frame.realize_frame(pos.with_differentials(vel)).transform_to(Galactic())
    lon, lat = gal.l.deg, gal.b.deg
    v_lsr, d_true = gal.radial_velocity.to_value(u.km / u.s), gal.distance.to_value(u.kpc)
    # astropy puts the centre at Sgr A*'s ICRS position, a few hundredths of a degree from
    # l = b = 0 (its frame is tilted by that much): b is tiny, not exactly 0
    assert np.all(np.abs(lat) < 0.1)
    r = radius_kpc(lon, lat, v_lsr, C)
    np.testing.assert_allclose(r, r_true, rtol=0.01)
    near, far = heliocentric_kpc(lon, lat, r, C)
    inner = r_true < R0
    tangent_d = R0 * np.cos(np.radians(lon))         # near < tangent distance < far
    is_near = d_true < tangent_d
    got = np.where(inner & ~is_near, far, near)
    np.testing.assert_allclose(got, d_true, rtol=0.01)
    assert np.all(np.isnan(far[~inner])) and np.all(np.isfinite(far[inner]))
    assert inner.sum() >= 5 and (inner & ~is_near).sum() >= 2 and (~inner).sum() >= 2
    # the same with the curve given as a callable (bisection) instead of the closed form
    np.testing.assert_allclose(radius_kpc(lon, lat, v_lsr, C, lambda x: np.full_like(x, T0)),
                               r_true, rtol=0.01)


def test_distances_with_galpy_curve_round_trip():
    # (1) of Binney & Merrifield 9.1 with galpy's MWPotential2014 curve (Bovy 2015), solved back
    def curve(rk):
        return galpy_pot.vcirc(galpy_pot.MWPotential2014, np.asarray(rk) / R0, ro=R0, vo=T0)

    lon = np.array([20.0, 35.0, 50.0, 120.0, 200.0, 320.0])
    r_true = np.array([5.0, 6.0, 7.5, 12.0, 10.0, 6.5])
    v = (curve(r_true) * R0 / r_true - T0) * np.sin(np.radians(lon))
    np.testing.assert_allclose(radius_kpc(lon, 0.0, v, C, curve), r_true, rtol=1e-6)
    # far beyond the terminal velocity: an R exists, but no distance (R < R0 sin l)
    r_fast = radius_kpc(30.0, 0.0, 400.0, C, curve)
    assert r_fast < R0 * 0.5 and np.all(np.isnan(heliocentric_kpc(30.0, 0.0, r_fast, C)))
    assert np.isnan(radius_kpc(0.0, 0.0, 10.0, C, curve))         # sin l = 0: no solution


# -- tangent points vs galpy's MWPotential2014 ----------------------------------------------------

def _galpy_profile(lon, rng, curve, v, sigma_v=8.0, noise=0.1):
    """Gas along the sightline, 50 pc elements out to 20 kpc, each a Gaussian of dispersion
    sigma_v at its circular-rotation velocity (1) of Binney & Merrifield 9.1 (galpy curve);
    exponential disk with a central hole, about 40-60 K at the tangent point; optically thin."""
    lr = math.radians(lon)
    d = np.arange(0.025, 20.0, 0.05)
    x, y = d * math.sin(lr), R0 - d * math.cos(lr)
    rr = np.hypot(x, y)
    vd = (curve(rr) * R0 / rr - T0) * math.sin(lr)
    n = 0.075 * np.exp(-(rr - R0) / 3.5) * -np.expm1(-((rr / 2.5) ** 4))       # cm^-3
    col = n * 0.05 * CM_PER_KPC / 1.823e18                                       # K km/s
    prof = np.exp(-0.5 * ((v[None, :] - vd[:, None]) / sigma_v) ** 2) / (sigma_v * 2.5066283)
    return (col[:, None] * prof).sum(axis=0) + rng.normal(0.0, noise, v.size)


def test_terminal_velocity_recovers_galpy_curve():
    # v_t = Theta(R0 sin l) - Theta0 sin l at R = R0 sin l (tangent-point relation, Binney &
    # Merrifield 9.1) with Theta from galpy's MWPotential2014 (Bovy 2015, ApJS 216, 29):
    # recovered within 5 km/s (v_t and Theta) for 3 < R < 8 kpc.
    def curve(rk):
        return galpy_pot.vcirc(galpy_pot.MWPotential2014, np.asarray(rk) / R0, ro=R0, vo=T0)

    rng = np.random.default_rng(15)
    v = np.arange(-150.0, 250.0 + 0.5, 1.0)
    lons = np.arange(21.0, 70.0, 4.0)
    assert R0 * math.sin(math.radians(lons[0])) > 3.0
    assert R0 * math.sin(math.radians(lons[-1])) < 8.0
    points = []
    for lon in lons:
        p = terminal_velocity(_stack(lon, v, _galpy_profile(lon, rng, curve, v)), C)
        assert p is not None and p.quadrant == 1
        r_t = R0 * math.sin(math.radians(lon))
        vt_true = float(curve(r_t)) - T0 * math.sin(math.radians(lon))
        assert p.r_kpc == pytest.approx(r_t)
        assert abs(p.v_terminal_km_s - vt_true) < 5.0, (lon, p.v_terminal_km_s, vt_true)
        assert abs(p.theta_km_s - float(curve(r_t))) < 5.0
        assert 0.5 <= p.v_terminal_err_km_s < 10.0 and p.theta_err_km_s == p.v_terminal_err_km_s
        assert p.edge_km_s > p.v_terminal_km_s      # the dispersion correction moves inward
        points.append(p)
    curve_pts = rotation_curve(reversed(points + [None]))
    assert [p.r_kpc for p in curve_pts] == sorted(p.r_kpc for p in points)


def test_fourth_quadrant_mirrors_first():
    # Fourth quadrant: v_t < 0 and Theta = -v_t + Theta0 |sin l| (Binney & Merrifield 9.1); a
    # profile at l mirrored in velocity at 360 - l gives the same Theta and R, v_t negated.
    rng = np.random.default_rng(4)
    v = np.arange(-250.0, 250.0 + 0.5, 1.0)
    flat = lambda rk: np.full_like(np.asarray(rk, dtype=float), T0)  # noqa: E731
    tb = _galpy_profile(40.0, rng, flat, v)
    p1 = terminal_velocity(_stack(40.0, v, tb), C)
    p4 = terminal_velocity(_stack(320.0, v, tb[::-1].copy()), C)
    assert p1 is not None and p4 is not None and (p1.quadrant, p4.quadrant) == (1, 4)
    assert p4.v_terminal_km_s == pytest.approx(-p1.v_terminal_km_s, abs=1e-9)
    assert p4.theta_km_s == pytest.approx(p1.theta_km_s, abs=1e-9)
    assert p4.r_kpc == pytest.approx(p1.r_kpc)
    # flat curve: Theta = Theta0, v_t = Theta0 (1 - sin l)
    assert abs(p1.theta_km_s - T0) < 5.0
    assert terminal_velocity_km_s(320.0, 0.0, C) == pytest.approx(-T0 * (1 - math.sin(
        math.radians(40.0))))
    # outside the inner Galaxy, off the plane, or no emission: no point
    assert terminal_velocity(_stack(120.0, v, tb), C) is None
    assert terminal_velocity(_stack(40.0, v, tb, glat=20.0), C) is None
    assert terminal_velocity(_stack(40.0, v, rng.normal(0, 0.1, v.size)), C) is None


def test_keplerian_curve():
    # Kepler: Theta = sqrt(G M / R) with G M = r_in theta_in^2 (all mass inside r_in)
    r = np.array([2.0, 4.0, 8.0, 18.0])
    kep = keplerian_km_s(r, 2.0, 200.0)
    np.testing.assert_allclose(kep, np.sqrt(2.0 * 200.0 ** 2 / r))
    assert kep[0] == 200.0 and kep[2] == pytest.approx(100.0)


# -- the face-on map --------------------------------------------------------------------------

def test_surface_density_unit_matches_astropy():
    # one Msun of hydrogen atoms per pc^2 in atoms per cm^2, astropy.constants (m_H = m_p + m_e
    # to 1e-8 of the binding energy)
    ref = (M_sun / ((m_p + m_e) * pc ** 2)).to_value(u.cm ** -2)
    assert ATOMS_CM2_PER_MSUN_PC2 == pytest.approx(ref, rel=1e-4)
    assert CM_PER_KPC == pytest.approx((1 * u.kpc).to_value(u.cm), rel=1e-12)


def _ring_stack(lon, r_ring=6.0, t_k=10.0, sig=1.5):
    v = np.arange(-120.0, 150.0 + 0.5, 1.0)
    v0 = (T0 * R0 / r_ring - T0) * math.sin(math.radians(lon))   # (1), flat curve
    tb = np.where(np.abs(v - v0) < 6 * sig, t_k * np.exp(-0.5 * ((v - v0) / sig) ** 2), 0.0)
    return _stack(lon, v, tb)


def test_ring_lands_at_its_radius():
    # a ring at R = 6 kpc seen at several inner longitudes (both quadrants), flat curve, split
    lons = [15.0, 20.0, 25.0, 30.0, 335.0, 340.0]
    m = face_on_map([_ring_stack(lon) for lon in lons], C, cell_kpc=0.5, extent_kpc=12.0)
    xc = 0.5 * (m.x_edges_kpc[:-1] + m.x_edges_kpc[1:])
    rc = np.hypot(xc[:, None], xc[None, :])
    w = m.counts
    assert w.sum() > 0 and m.unit == "Msun pc-2"
    assert abs((rc * w).sum() / w.sum() - 6.0) < 0.5            # within a cell
    assert w[np.abs(rc - 6.0) < 1.0].sum() / w.sum() > 0.95
    assert m.placed["split"] > 0 and m.placed["single"] == 0      # inside R0: always split
    # the split: one sightline's weight half on each side of its tangent point (d = R0 cos l)
    one = face_on_map([_ring_stack(25.0)], C, cell_kpc=0.5, extent_kpc=12.0)
    d_cell = np.hypot(xc[:, None], xc[None, :] - R0)
    d_t = R0 * math.cos(math.radians(25.0))
    near_w, far_w = one.counts[d_cell < d_t].sum(), one.counts[d_cell > d_t].sum()
    assert near_w == pytest.approx(far_w, rel=0.05) and near_w + far_w == pytest.approx(
        one.placed["split"])
    total = sum(m.left_out.values()) + m.placed["split"] + m.placed["single"]
    assert total == 6 * 271
    assert m.left_out["tb_not_positive"] > 0


def test_uniform_disk_density_recovered():
    # Uniform n0 = 0.5 cm^-3 along l = 30 deg, flat curve: T_B(v) = n0 * kpc/cm / 1.823e18 *
    # sum |dd/dv| over the solutions (Dickey & Lockman 1990, optically thin), with the analytic
    # derivative of (2) and (3) of Binney & Merrifield 9.1. The split puts n0 back at each
    # solution: Sigma = sqrt(2 pi) h n0 everywhere it lands.
    n0, lon = 0.5, 30.0
    s = math.sin(math.radians(lon))
    v = np.arange(-60.0, 108.0 + 0.5, 1.0)                  # v_t = 110 km/s
    r = R0 * T0 * s / (v + T0 * s)
    root = np.sqrt(r ** 2 - (R0 * s) ** 2)
    drdv = -r / (v + T0 * s)
    dddv = np.abs(r / root * drdv)                        # |dd/dv| of each solution
    n_sol = np.where(r < R0, 2, 1)
    tb = n0 * CM_PER_KPC / 1.823e18 * dddv * n_sol
    m = face_on_map([_stack(lon, v, tb)], C, cell_kpc=0.25, extent_kpc=20.0)
    sigma0 = math.sqrt(2 * math.pi) * 0.12 * CM_PER_KPC * n0 / ATOMS_CM2_PER_MSUN_PC2
    vals = m.density[np.isfinite(m.density)]
    assert vals.size > 20
    assert np.median(vals) == pytest.approx(sigma0, rel=0.02)
    assert np.all(np.abs(vals / sigma0 - 1) < 0.1)
    assert m.left_out["near_tangent"] == 8 and m.left_out["near_l0_l180"] == 0   # 101..108
    assert m.placed["single"] > 0 and m.placed["split"] > 0


def test_left_out_reasons_counted():
    v = np.arange(-50.0, 200.0 + 0.5, 1.0)                # 251 channels
    tb = np.ones(v.size)
    tb[0], tb[1] = np.nan, -0.5
    # l = 30 deg, flat: v_t = Theta0 (1 - sin 30) = 110 km/s
    m = face_on_map([_stack(30.0, v, tb), _stack(3.0, v, np.ones(v.size)),
                     _stack(60.0, v, np.ones(v.size), glat=30.0)], C, extent_kpc=20.0)
    lo = m.left_out
    assert lo["no_data"] == 1 and lo["tb_not_positive"] == 1
    assert lo["near_tangent"] == 10                        # 101..110 km/s
    assert lo["no_solution"] == 90                         # 111..200 km/s
    assert lo["near_l0_l180"] == 251 and lo["off_plane"] == 251
    placed = m.placed["single"] + m.placed["split"]
    assert sum(lo.values()) + placed == 3 * 251
    # a small map: the farthest (most negative velocity) channels fall outside it
    small = face_on_map([_stack(30.0, v, tb)], C, extent_kpc=6.0)
    assert small.left_out["outside_map"] > 0
    with pytest.raises(ValueError, match="ambiguity"):
        face_on_map([], C, ambiguity="nearest")


def test_latitude_resolves_toward_the_layer():
    # At b = 2 deg the far solution of a ring at R = 6 (l = 20) lies ~0.4 kpc above the plane
    # (3 h with h = 0.12 kpc) and the near one ~0.05 kpc: 'latitude' puts it at the near one.
    st = _ring_stack(20.0)
    st = Stack(**{**st.__dict__, "glat_deg": 2.0})
    m = face_on_map([st], C, ambiguity="latitude", cell_kpc=0.5, extent_kpc=12.0)
    assert m.placed["near"] > 0 and m.placed["far"] == 0
    xc = 0.5 * (m.x_edges_kpc[:-1] + m.x_edges_kpc[1:])
    yy = np.broadcast_to(xc[None, :], m.counts.shape)
    d = np.hypot(np.broadcast_to(xc[:, None], m.counts.shape), yy - R0)
    w = m.counts
    assert (d * w).sum() / w.sum() < R0 * math.cos(math.radians(20.0))   # nearer than tangent
    split = face_on_map([st], C, ambiguity="split", cell_kpc=0.5, extent_kpc=12.0)
    assert split.placed["split"] > 0 and split.placed["near"] == 0
