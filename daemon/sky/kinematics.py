"""Galactic kinematics: where along the velocity axis the HI of a sightline can be.

For gas in circular rotation with a flat rotation curve (speed Theta0 at every radius), seen
from the Sun at galactocentric radius R0, the LSR radial velocity of gas at distance d toward
Galactic (l, b) is

    R^2   = R0^2 + (d cos b)^2 - 2 R0 d cos b cos l
    v_LSR = (Theta0 R0 / R - Theta0) sin l cos b

(Binney & Merrifield 1998, sect. 9.1; common practice). The HI of a sightline lies between the
smallest and largest v_LSR over the path through the gas layer, widened by a margin for the
velocity dispersion and streaming motions. The daemon uses this range to keep the line out of
the channels it calibrates and baselines with ("line-free" channels), so the range is meant
generous rather than tight.

Galactic constants: R0 = 8.5 kpc, Theta0 = 220 km/s (IAU 1985 recommendation,
MNRAS 221, 1023, 1986).

References
----------
Binney, J. & Merrifield, M. 1998, Galactic Astronomy, Princeton, sect. 9.1.
IAU 1985 Galactic constants, MNRAS 221, 1023 (1986).
"""

from __future__ import annotations

import numpy as np
import numpy.typing as npt

#: IAU 1985 Galactic constants (MNRAS 221, 1023, 1986).
R0_KPC = 8.5
THETA0_KM_S = 220.0

_PATH_KPC = 25.0          # how far in the plane the gas disk is followed
_LAYER_KPC = 1.5          # half-thickness of the (flaring) HI layer followed off the plane
_MARGIN_KM_S = 40.0       # dispersion (about 8-10 km/s, several sigma) plus streaming motions


def circular_velocity_lsr_km_s(glon_deg: npt.ArrayLike, glat_deg: npt.ArrayLike,
                               distance_kpc: npt.ArrayLike, r0_kpc: float = R0_KPC,
                               theta0_km_s: float = THETA0_KM_S) -> np.ndarray:
    """LSR radial velocity of gas in flat circular rotation at ``distance_kpc`` toward (l, b).

    ``v = (Theta0 R0 / R - Theta0) sin l cos b`` with
    ``R = sqrt(R0^2 + (d cos b)^2 - 2 R0 d cos b cos l)`` (Binney & Merrifield 1998, 9.1).
    """
    lr, br = np.radians(glon_deg), np.radians(glat_deg)
    dp = np.asarray(distance_kpc, dtype=float) * np.cos(br)
    r = np.sqrt(r0_kpc ** 2 + dp ** 2 - 2 * r0_kpc * dp * np.cos(lr))
    r = np.maximum(r, 0.5)            # inside 0.5 kpc the flat curve means nothing
    return (theta0_km_s * r0_kpc / r - theta0_km_s) * np.sin(lr) * np.cos(br)


def expected_velocity_range_km_s(glon_deg: float, glat_deg: float,
                                 margin_km_s: float = _MARGIN_KM_S) -> tuple[float, float]:
    """(lowest, highest) LSR velocity at which HI toward (l, b) can appear, km/s.

    The path runs to 25 kpc in the plane, or until it leaves a layer 1.5 kpc thick off the
    plane; the extremes of :func:`circular_velocity_lsr_km_s` along it, widened by
    ``margin_km_s`` on both sides (local gas at v = 0 is always included).
    """
    b = abs(float(glat_deg))
    d_max = _PATH_KPC if b < 1e-3 else min(_PATH_KPC, _LAYER_KPC / np.sin(np.radians(b)))
    d = np.linspace(0.0, d_max, 2001)
    v = circular_velocity_lsr_km_s(glon_deg, glat_deg, d)
    return float(min(v.min(), 0.0) - margin_km_s), float(max(v.max(), 0.0) + margin_km_s)
