"""A face-on map of the HI in the Galactic plane from kinematic distances.

Frame (the plots use the same): Galactocentric, in the plane, kpc. The Galactic centre at
(0, 0), the Sun at (0, R0); x grows toward l = 90 deg as seen from the Sun, y from the centre
toward the Sun. Gas at heliocentric distance d toward (l, b) lies at::

    x = d cos b sin l,        y = R0 - d cos b cos l,        z = d sin b

Channel by channel (every channel of every stack): R from the velocity and the rotation curve,
the distance(s) d by :mod:`spinflip.reduce.distances`. The channel's column (optically thin,
Dickey & Lockman 1990)::

    N = 1.823e18 T_B dv                      [cm^-2; T_B in K, dv in km/s]

lies along the path length |Delta d| that the channel's velocity width spans (d at the channel's
two edges), so the HI volume density there is ``n = N / (|Delta d| * 3.0857e21 cm/kpc)``, and the
surface density of a Gaussian layer of scale height h (sigma_z) with that mid-plane density is
``Sigma = sqrt(2 pi) h n``; h = ``SCALE_HEIGHT_KPC`` = 0.12 kpc, one value at every radius (about
the cold-plus-warm HI layer inside the solar circle, Dickey & Lockman 1990, from memory; the
real layer flares outside R0, so Sigma is underestimated there). Sigma is given in solar masses
of hydrogen atoms per pc^2 (HI only: no helium, no molecular or ionised gas).

The near/far ambiguity inside the solar circle (``ambiguity``):

- ``"split"``: half the channel's column at the near and half at the far solution.
- ``"latitude"``: each solution gets the share ``g_i / (g_near + g_far)`` of the column, with
  ``g = exp(-z^2 / 2 h^2)`` the Gaussian layer at its height ``z = d sin b``, and the mid-plane
  density ``n_i = N share_i / (g_i |Delta d_i|)``; at b = 0 this is the split, away from the
  plane the far solution (high above the layer) loses its share. Channels whose every solution
  lies more than ``max_height_sigma`` (3) scale heights from the plane are left out.

Each solution adds its Sigma to its cell with its share as weight; the map is the weighted mean
per cell (NaN where empty), ``counts`` the sum of the shares (channels; a split channel counts
1/2 in each of its two cells).

Channels left out, with the reason (``FaceOnMap.left_out``; :data:`LEFT_OUT_REASONS`): no data
(NaN), T_B <= 0, within ``lon_margin_deg`` of l = 0 or 180 deg, the target more than
``max_glat_deg`` from the plane, no solution (velocity beyond the terminal velocity, or the
second and third quadrants at a velocity that asks for R < R0), within ``tangent_margin_km_s`` of
the terminal velocity, every solution too far from the plane (``latitude`` only), or outside
the map.

References
----------
Dickey, J. M. & Lockman, F. J. 1990, ARA&A 28, 215 (N_HI = 1.823e18 int T_B dv; layer thickness).
Binney, J. & Merrifield, M. 1998, *Galactic Astronomy*, sect. 9.1 (kinematic distances).
"""

from __future__ import annotations

import math
from collections.abc import Iterable
from dataclasses import dataclass, field

import numpy as np

from spinflip.daemon.sky.hi_line import HI_COLUMN_PER_K_KM_S_CM2
from spinflip.reduce.constants import GalacticConstants
from spinflip.reduce.distances import Curve, radius_kpc, reliable
from spinflip.reduce.profile import Stack

#: Gaussian scale height (sigma_z) of the HI layer, kpc (Dickey & Lockman 1990, from memory).
SCALE_HEIGHT_KPC = 0.12

#: Centimetres per kiloparsec (IAU 2012 au and parsec = 648000/pi au).
CM_PER_KPC = 3.0856775814913673e21

#: Hydrogen atoms per cm^2 in one solar mass of hydrogen per pc^2: M_sun / (m_H pc^2), with
#: M_sun = 1.98841e33 g (IAU 2015 nominal solar mass parameter / CODATA G) and m_H =
#: 1.6735575e-24 g (the hydrogen atom, CODATA); values from memory, checked in the tests
#: against astropy.constants.
ATOMS_CM2_PER_MSUN_PC2 = 1.98841e33 / (1.6735575e-24 * (CM_PER_KPC / 1e3) ** 2)

#: Why a channel was left out: key -> one line.
LEFT_OUT_REASONS: dict[str, str] = {
    "no_data": "no data in the channel (NaN)",
    "tb_not_positive": "T_B <= 0",
    "near_l0_l180": "too near l = 0 or 180 deg",
    "off_plane": "target too far from the plane (|b| above the limit)",
    "no_solution": "no kinematic distance (beyond the terminal velocity, or R < R0 needed "
                   "outside the inner Galaxy)",
    "near_tangent": "too near the terminal velocity (near and far merge)",
    "above_layer": "every solution too far above the gas layer",
    "outside_map": "outside the map",
}

AMBIGUITIES = ("split", "latitude")


@dataclass(frozen=True)
class FaceOnMap:
    """The gridded face-on map; frame and method in the module docstring.

    ``density[i, j]`` is the cell ``x_edges_kpc[i]..[i+1]``, ``y_edges_kpc[j]..[j+1]``.
    ``placed`` counts the channels mapped: ``single`` (one solution, outside the solar circle),
    ``split`` (both), ``near`` / ``far`` (``latitude`` put 90 % or more of it there).
    """

    x_edges_kpc: np.ndarray
    y_edges_kpc: np.ndarray
    density: np.ndarray
    unit: str
    quantity: str
    counts: np.ndarray
    left_out: dict[str, int]
    ambiguity: str
    consts: GalacticConstants
    placed: dict[str, int] = field(default_factory=dict)
    scale_height_kpc: float = SCALE_HEIGHT_KPC


def _raw_distances(lr: float, br: float, r: np.ndarray,
                   r0: float) -> tuple[np.ndarray, np.ndarray]:
    """d (along the sightline) for the - and + signs of (3); NaN where not positive."""
    with np.errstate(invalid="ignore"):
        root = np.sqrt(r ** 2 - (r0 * math.sin(lr)) ** 2)
        a = r0 * math.cos(lr)
        dm, dp = (a - root) / math.cos(br), (a + root) / math.cos(br)
    return np.where(dm > 0, dm, np.nan), np.where(dp > 0, dp, np.nan)


def face_on_map(stacks: Iterable[Stack], consts: GalacticConstants, curve: Curve | None = None,
                *, cell_kpc: float = 0.5, extent_kpc: float = 20.0, ambiguity: str = "split",
                scale_height_kpc: float = SCALE_HEIGHT_KPC, lon_margin_deg: float = 10.0,
                tangent_margin_km_s: float = 10.0, max_glat_deg: float = 10.0,
                max_height_sigma: float = 3.0) -> FaceOnMap:
    """HI surface density in the plane from every channel of every stack.

    Parameters
    ----------
    stacks : iterable of Stack
        The targets (streamed: one at a time is held).
    consts : GalacticConstants
        R0 and Theta0.
    curve : callable or None
        Theta(R) for the kinematic distances; None: flat at Theta0.
    cell_kpc, extent_kpc : float
        Cell size, and the map's half-width (x and y from -extent to +extent), kpc.
    ambiguity : {"split", "latitude"}
        How the near/far ambiguity is handled (module docstring).
    scale_height_kpc : float
        h of the Gaussian layer, kpc.
    lon_margin_deg, tangent_margin_km_s : float
        Channels left out near l = 0/180 deg and near the terminal velocity
        (:func:`spinflip.reduce.distances.reliable`).
    max_glat_deg : float
        Targets farther from the plane are left out whole.
    max_height_sigma : float
        ``latitude``: channels whose solutions all lie beyond this many h are left out.

    Returns
    -------
    FaceOnMap
    """
    if ambiguity not in AMBIGUITIES:
        raise ValueError(f"ambiguity must be one of {', '.join(AMBIGUITIES)}, not {ambiguity!r}")
    if not (cell_kpc > 0 and extent_kpc > 0):
        raise ValueError("cell_kpc and extent_kpc must be positive")
    n_cell = max(1, int(round(2 * extent_kpc / cell_kpc)))
    edges = np.linspace(-extent_kpc, extent_kpc, n_cell + 1)
    sums = np.zeros((n_cell, n_cell))
    weights = np.zeros((n_cell, n_cell))
    left = dict.fromkeys(LEFT_OUT_REASONS, 0)
    placed = {"single": 0, "split": 0, "near": 0, "far": 0}
    r0 = consts.r0_kpc
    sigma_per_n = math.sqrt(2 * math.pi) * scale_height_kpc * CM_PER_KPC / ATOMS_CM2_PER_MSUN_PC2
    g_min = math.exp(-0.5 * max_height_sigma ** 2)

    for st in stacks:
        v = np.asarray(st.v_km_s, dtype=float)
        tb = np.asarray(st.tb_k, dtype=float)
        if v.size < 2:
            left["no_data"] += int(v.size)
            continue
        dv = abs(float(v[1] - v[0]))
        lon, lat = float(st.glon_deg) % 360.0, float(st.glat_deg)
        lr, br = math.radians(lon), math.radians(lat)
        todo = np.ones(v.size, dtype=bool)

        def drop(mask: np.ndarray, key: str, todo: np.ndarray = todo) -> None:
            m = mask & todo
            left[key] += int(m.sum())
            todo &= ~m

        drop(~np.isfinite(tb), "no_data")
        drop(tb <= 0, "tb_not_positive")
        near_l0, near_t = reliable(lon, lat, v, consts, curve, lon_margin_deg=lon_margin_deg,
                                   tangent_margin_km_s=tangent_margin_km_s)
        drop(np.broadcast_to(near_l0, v.shape), "near_l0_l180")
        drop(np.full(v.shape, abs(lat) > max_glat_deg), "off_plane")
        if not todo.any():
            continue
        # distances at the channel centres and both edges, for the two signs of (3)
        vv = np.stack((v, v - dv / 2, v + dv / 2))
        rr = radius_kpc(lon, lat, vv, consts, curve)
        dm, dp = _raw_distances(lr, br, rr, r0)
        ok_m = np.all(np.isfinite(dm), axis=0)
        ok_p = np.all(np.isfinite(dp), axis=0)
        inside = np.isfinite(rr[0]) & (rr[0] < r0)
        drop(near_t & inside, "near_tangent")
        drop(~(ok_m | ok_p), "no_solution")
        if not todo.any():
            continue
        sols = []
        for ok, d in ((ok_m, dm), (ok_p, dp)):
            with np.errstate(invalid="ignore"):
                span = np.abs(d[2] - d[1])
                g = (np.exp(-0.5 * (d[0] * math.sin(br) / scale_height_kpc) ** 2)
                     if ambiguity == "latitude" else np.ones(v.size))
            good = ok & (span > 0) & todo
            sols.append((good, d[0], span, np.where(good, g, 0.0)))
        gsum = sols[0][3] + sols[1][3]
        if ambiguity == "latitude":
            drop((gsum < g_min) & (sols[0][0] | sols[1][0]), "above_layer")
        drop(~(sols[0][0] | sols[1][0]), "no_solution")
        column = HI_COLUMN_PER_K_KM_S_CM2 * tb * dv
        kept = np.zeros(v.size, dtype=bool)
        in_map = np.zeros(v.size, dtype=bool)
        shares = []
        for good, d, span, g in sols:
            good = good & todo
            with np.errstate(invalid="ignore", divide="ignore"):
                share = np.where(good, g / gsum, 0.0)
                n = column * share / (np.where(good, g, 1.0) * span * CM_PER_KPC)
            x = d * math.cos(br) * math.sin(lr)
            y = r0 - d * math.cos(br) * math.cos(lr)
            ix = np.floor((x + extent_kpc) / (2 * extent_kpc) * n_cell)
            iy = np.floor((y + extent_kpc) / (2 * extent_kpc) * n_cell)
            on = good & (share > 0) & (ix >= 0) & (ix < n_cell) & (iy >= 0) & (iy < n_cell)
            i, j = ix[on].astype(int), iy[on].astype(int)
            np.add.at(sums, (i, j), share[on] * n[on] * sigma_per_n)
            np.add.at(weights, (i, j), share[on])
            kept |= good
            in_map |= on
            shares.append(share)
        drop(kept & ~in_map, "outside_map")
        both = (shares[0] > 0) & (shares[1] > 0) & in_map
        placed["single"] += int((in_map & ~both).sum())
        if ambiguity == "split":
            placed["split"] += int(both.sum())
        else:
            placed["near"] += int((both & (shares[0] >= 0.9)).sum())
            placed["far"] += int((both & (shares[1] >= 0.9)).sum())
            placed["split"] += int((both & (shares[0] < 0.9) & (shares[1] < 0.9)).sum())

    with np.errstate(invalid="ignore", divide="ignore"):
        density = np.where(weights > 0, sums / weights, np.nan)
    how = ("split: half at the near and half at the far solution" if ambiguity == "split" else
           "latitude: shared by the Gaussian layer's weight exp(-z^2/2h^2) at each solution")
    return FaceOnMap(x_edges_kpc=edges, y_edges_kpc=edges.copy(), density=density,
                     unit="Msun pc-2",
                     quantity=("HI surface density (hydrogen atoms only, optically thin, "
                               f"Gaussian layer h = {scale_height_kpc:g} kpc)"),
                     counts=weights, left_out=left, ambiguity=how, consts=consts, placed=placed,
                     scale_height_kpc=scale_height_kpc)
