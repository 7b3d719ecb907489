"""Kinematic distances: Galactocentric radius and heliocentric distance from an LSR velocity.

For gas in circular rotation with curve Theta(R), seen from the Sun at R0 moving with the local
standard of rest (Binney & Merrifield 1998, sect. 9.1)::

    v_LSR = (R0 Theta(R) / R - Theta0) sin l cos b                                        (1)

so the angular speed ``omega(R) = Theta(R) / R`` of the gas is
``omega = Theta0 / R0 + v / (R0 sin l cos b)``. For a flat curve (Theta = Theta0) this is closed::

    R = R0 Theta0 sin l / (v / cos b + Theta0 sin l)                                      (2)

For a given curve, (1) is solved for R by bisection on ``omega(R) = Theta(R)/R``, which is
assumed to fall monotonically with R (true of any curve that rises more slowly than solid-body
rotation), between ``r_min_kpc`` and ``r_max_kpc``; NaN where the target omega lies outside.

The heliocentric distance d follows from the triangle Sun-centre-gas in the plane::

    d cos b = R0 cos l -+ sqrt(R^2 - R0^2 sin^2 l)                                         (3)

Inside the solar circle (R < R0, first and fourth quadrants) both signs give d > 0: the *near*
and *far* solutions, equally consistent with the velocity (the kinematic distance ambiguity);
they coincide at the tangent point ``R = R0 |sin l|``. Outside (R > R0) only the + sign gives
d > 0: one solution, returned as *near* with far = NaN. NaN wherever no positive solution exists
(R < R0 |sin l|: a velocity beyond the terminal velocity).

Unreliable channels (what :func:`spinflip.reduce.faceon.face_on_map` leaves out; the choices are
keyword arguments of :func:`reliable`): within ``lon_margin_deg`` (10 deg) of l = 0 or 180 deg,
where circular rotation has no line-of-sight component and (1) cannot separate distances, and
within ``tangent_margin_km_s`` (10 km/s, about the gas's velocity dispersion) of the curve's
terminal velocity ``v_t = (Theta(R0 |sin l|) - Theta0 |sin l|) sign(sin l) cos b``, where near
and far merge and the velocity hardly changes with distance.

References
----------
Binney, J. & Merrifield, M. 1998, *Galactic Astronomy* (Princeton), sect. 9.1 (equations 1-3).
"""

from __future__ import annotations

from collections.abc import Callable

import numpy as np
import numpy.typing as npt

from spinflip.reduce.constants import GalacticConstants

#: A rotation curve: Theta(R) in km/s for R in kpc, vectorised.
Curve = Callable[[np.ndarray], np.ndarray]

_BISECT_STEPS = 60


def radius_kpc(glon_deg: npt.ArrayLike, glat_deg: npt.ArrayLike, v_lsr_km_s: npt.ArrayLike,
               consts: GalacticConstants, curve: Curve | None = None, *,
               r_min_kpc: float = 0.05, r_max_kpc: float = 60.0) -> np.ndarray:
    """Galactocentric radius (kpc) of gas at LSR velocity v toward (l, b), by (1) or (2).

    Parameters
    ----------
    glon_deg, glat_deg, v_lsr_km_s : array_like
        Galactic longitude and latitude (deg) and LSR velocity (km/s); broadcast together.
    consts : GalacticConstants
        R0 and Theta0.
    curve : callable or None
        Theta(R) (km/s, R in kpc, vectorised); None: flat at Theta0, closed form (2).
    r_min_kpc, r_max_kpc : float
        The bracket searched for a given curve.

    Returns
    -------
    numpy.ndarray
        R in kpc; NaN where there is no solution (sin l cos b = 0, or the velocity asks for an
        angular speed the curve does not reach).
    """
    lr = np.radians(np.asarray(glon_deg, dtype=float))
    br = np.radians(np.asarray(glat_deg, dtype=float))
    v = np.asarray(v_lsr_km_s, dtype=float)
    lr, br, v = np.broadcast_arrays(lr, br, v)
    proj = np.sin(lr) * np.cos(br)
    r0, t0 = consts.r0_kpc, consts.theta0_km_s
    with np.errstate(divide="ignore", invalid="ignore"):
        omega = t0 / r0 + v / (r0 * proj)
        if curve is None:
            r = np.where(omega > 0, t0 / omega, np.nan)
            return np.where(np.isfinite(r) & (np.abs(proj) > 1e-12), r, np.nan)
    lo = np.full(v.shape, float(r_min_kpc))
    hi = np.full(v.shape, float(r_max_kpc))

    def f(r: np.ndarray) -> np.ndarray:
        return np.asarray(curve(r), dtype=float) / r - omega

    f_lo, f_hi = f(lo), f(hi)
    ok = np.isfinite(omega) & (np.abs(proj) > 1e-12) & (f_lo >= 0) & (f_hi <= 0)
    for _ in range(_BISECT_STEPS):
        mid = 0.5 * (lo + hi)
        pos = f(mid) >= 0
        lo = np.where(pos, mid, lo)
        hi = np.where(pos, hi, mid)
    return np.where(ok, 0.5 * (lo + hi), np.nan)


def heliocentric_kpc(glon_deg: npt.ArrayLike, glat_deg: npt.ArrayLike, r_kpc: npt.ArrayLike,
                     consts: GalacticConstants) -> tuple[np.ndarray, np.ndarray]:
    """(near, far) heliocentric distances (kpc, along the sightline) of radius R toward (l, b).

    By (3), divided by cos b. Inside the solar circle two solutions (near <= far); outside one,
    returned as near with far = NaN; NaN where none is positive.
    """
    lr = np.radians(np.asarray(glon_deg, dtype=float))
    br = np.radians(np.asarray(glat_deg, dtype=float))
    r = np.asarray(r_kpc, dtype=float)
    lr, br, r = np.broadcast_arrays(lr, br, r)
    r0 = consts.r0_kpc
    with np.errstate(invalid="ignore"):
        root = np.sqrt(r ** 2 - (r0 * np.sin(lr)) ** 2)     # NaN where no solution
        a = r0 * np.cos(lr)
        d1, d2 = (a - root) / np.cos(br), (a + root) / np.cos(br)
        near = np.where(d1 > 0, d1, np.where(d2 > 0, d2, np.nan))
        far = np.where(d1 > 0, d2, np.nan)
    return near, far


def terminal_velocity_km_s(glon_deg: npt.ArrayLike, glat_deg: npt.ArrayLike,
                           consts: GalacticConstants, curve: Curve | None = None) -> np.ndarray:
    """The curve's terminal velocity toward (l, b), km/s: (1) at the tangent point.

    ``v_t = (Theta(R0 |sin l|) - Theta0 |sin l|) sign(sin l) cos b``; meaningful in the first
    and fourth quadrants (elsewhere the sightline has no tangent point; returned as NaN).
    """
    lr = np.radians(np.asarray(glon_deg, dtype=float))
    br = np.radians(np.asarray(glat_deg, dtype=float))
    s = np.abs(np.sin(lr))
    rt = consts.r0_kpc * s
    theta = np.full_like(rt, consts.theta0_km_s) if curve is None else np.asarray(
        curve(rt), dtype=float)
    vt = (theta - consts.theta0_km_s * s) * np.sign(np.sin(lr)) * np.cos(br)
    return np.where(np.cos(lr) > 0, vt, np.nan)


def reliable(glon_deg: npt.ArrayLike, glat_deg: npt.ArrayLike, v_lsr_km_s: npt.ArrayLike,
             consts: GalacticConstants, curve: Curve | None = None, *,
             lon_margin_deg: float = 10.0,
             tangent_margin_km_s: float = 10.0) -> tuple[np.ndarray, np.ndarray]:
    """Masks (near_l0_l180, near_tangent) of channels without a reliable distance.

    ``near_l0_l180``: ``|sin l| < sin(lon_margin_deg)``. ``near_tangent`` (inner Galaxy, cos l
    > 0): the velocity within ``tangent_margin_km_s`` of the terminal velocity on the allowed
    side, ``0 <= (v_t - v) sign(v_t) < margin``.
    """
    lr = np.radians(np.asarray(glon_deg, dtype=float))
    v = np.asarray(v_lsr_km_s, dtype=float)
    near_l0 = np.abs(np.sin(lr)) < np.sin(np.radians(lon_margin_deg))
    vt = terminal_velocity_km_s(glon_deg, glat_deg, consts, curve)
    with np.errstate(invalid="ignore"):
        gap = (vt - v) * np.sign(vt)
        near_t = np.isfinite(vt) & (gap >= 0) & (gap < tangent_margin_km_s)
    near_l0, near_t = np.broadcast_arrays(near_l0, near_t)
    return near_l0, near_t & ~near_l0
