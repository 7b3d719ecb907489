"""The longitude-velocity (l-v) diagram: the stacks along the Galactic plane on one grid.

:func:`lv_image` puts each stack's brightness temperature on a common LSRK velocity grid and
stacks the rows by Galactic longitude into a 2-D image (:class:`LvImage`); pure NumPy, no
plotting (:func:`spinflip.reduce.plots.lv_png` draws it). :func:`resample_profile` is the
one resampling rule, used by the image and by the terminal UI's survey view.

Conventions
-----------
Longitudes are wrapped to (-180, 180] deg, so that the inner Galaxy's first quadrant
(0 < l < 90) and fourth quadrant (270 < l < 360, here -90 < l < 0) meet at l = 0 without a
seam; the image's rows are sorted by ascending wrapped longitude. The picture draws l
decreasing to the right, as sky maps do (l increasing to the left, the way the sky is seen
from inside the Galaxy looking out). Velocities are LSRK radio velocities, km/s, the grid's
cell centres ``v_lo, v_lo + step, ...`` up to ``v_hi``.

Resampling: a grid cell takes the mean of the finite channels whose centres fall in it
(channels finer than the grid are binned, noise going down as the square root of their
number); a cell no channel centre falls in (channels coarser than the grid) takes the linear
interpolation between the two finite channels around its centre; anything else (outside the
stack's coverage, or between a finite and a NaN channel) is NaN.
"""

from __future__ import annotations

import math
from collections.abc import Iterable
from dataclasses import dataclass

import numpy as np

from .profile import Stack

#: Default velocity grid: step and range (cell centres), km/s.
V_STEP_KM_S = 1.0
V_RANGE_KM_S = (-250.0, 250.0)
#: Default latitude limit of "along the plane", deg (None in :func:`lv_image`: no limit).
MAX_ABS_GLAT_DEG = 5.0


@dataclass(frozen=True, eq=False)
class LvImage:
    """The l-v diagram as numbers.

    Attributes
    ----------
    glon_deg : numpy.ndarray
        (n_lon,) Galactic longitude of each row, deg, wrapped to (-180, 180], ascending.
    glat_deg : numpy.ndarray
        (n_lon,) Galactic latitude of each row, deg (the mean of the stacks in a binned row).
    v_km_s : numpy.ndarray
        (n_v,) LSRK radio velocity of each column's centre, km/s, ascending, uniform.
    tb_k : numpy.ndarray
        (n_lon, n_v) brightness temperature, K; NaN where no data.
    objects : tuple of str
        The targets in each row (several joined by "+" when ``lon_step_deg`` binned them).
    """

    glon_deg: np.ndarray
    glat_deg: np.ndarray
    v_km_s: np.ndarray
    tb_k: np.ndarray
    objects: tuple[str, ...]

    @property
    def v_step_km_s(self) -> float:
        """The velocity grid's step, km/s."""
        return float(self.v_km_s[1] - self.v_km_s[0]) if self.v_km_s.size > 1 else math.nan


def wrap_glon_deg(glon_deg: float | np.ndarray) -> np.ndarray:
    """Longitude wrapped to (-180, 180] deg (e.g. 350 -> -10, 180 -> 180, -180 -> 180)."""
    lon = np.asarray(glon_deg, dtype=float)
    out = np.mod(lon, 360.0)
    return np.where(out > 180.0, out - 360.0, out)


def velocity_grid(v_step_km_s: float = V_STEP_KM_S,
                  v_range_km_s: tuple[float, float] = V_RANGE_KM_S) -> np.ndarray:
    """Cell centres ``lo, lo + step, ...`` up to ``hi`` (inclusive within 1e-9 step), km/s.

    Raises
    ------
    ValueError
        A step that is not a positive finite number, or a range that is not finite lo < hi.
    """
    step = float(v_step_km_s)
    if not (math.isfinite(step) and step > 0):
        raise ValueError(f"velocity step {v_step_km_s!r}: expected a positive number of km/s")
    try:
        lo, hi = (float(v) for v in v_range_km_s)
    except (TypeError, ValueError):
        raise ValueError(f"velocity range {v_range_km_s!r}: expected (lo, hi) in km/s") from None
    if not (math.isfinite(lo) and math.isfinite(hi) and lo < hi):
        raise ValueError(f"velocity range {v_range_km_s!r}: expected finite lo < hi in km/s")
    n = int(math.floor((hi - lo) / step + 1e-9)) + 1
    return lo + step * np.arange(n)


def resample_profile(v_km_s: np.ndarray, values: np.ndarray, grid_km_s: np.ndarray) -> np.ndarray:
    """One profile on a uniform velocity grid (the module's resampling rule).

    Parameters
    ----------
    v_km_s : numpy.ndarray
        Channel velocities, km/s, in any order (monotonic or not).
    values : numpy.ndarray
        The channels' values (e.g. T_B in K); NaN: no value.
    grid_km_s : numpy.ndarray
        Uniform ascending cell centres, km/s (:func:`velocity_grid`), at least 2.

    Returns
    -------
    numpy.ndarray
        float64 of ``grid_km_s``'s length: the mean of the finite channels whose centres fall
        in each cell [centre - step/2, centre + step/2); where none does, the linear
        interpolation between the two finite neighbouring channels around the centre; NaN
        where neither applies.
    """
    v = np.asarray(v_km_s, dtype=float).ravel()
    t = np.asarray(values, dtype=float).ravel()
    grid = np.asarray(grid_km_s, dtype=float)
    if v.shape != t.shape:
        raise ValueError(f"profile has {v.size} velocities and {t.size} values: expected equal")
    if grid.size < 2:
        raise ValueError("velocity grid: expected at least 2 cells")
    out = np.full(grid.size, np.nan)
    good = np.isfinite(v) & np.isfinite(t)
    if not good.any():
        return out
    step = float(grid[1] - grid[0])
    lo_edge = float(grid[0]) - 0.5 * step
    # binning: cell index of each finite channel
    k = np.floor((v[good] - lo_edge) / step).astype(np.int64)
    inside = (k >= 0) & (k < grid.size)
    counts = np.bincount(k[inside], minlength=grid.size)
    sums = np.bincount(k[inside], weights=t[good][inside], minlength=grid.size)
    binned = counts > 0
    out[binned] = sums[binned] / counts[binned]
    # interpolation where no channel centre fell, between two finite neighbours only
    order = np.argsort(v, kind="stable")
    vs, ts = v[order], t[order]
    fin = np.isfinite(vs)
    vs, ts = vs[fin], ts[fin]                       # NaN values stay, to break the interpolation
    if vs.size >= 2:
        empty = ~binned & (grid >= vs[0]) & (grid <= vs[-1])
        if empty.any():
            g = grid[empty]
            j = np.clip(np.searchsorted(vs, g, side="right"), 1, vs.size - 1)
            a, b = ts[j - 1], ts[j]
            va, vb = vs[j - 1], vs[j]
            frac = np.where(vb > va, (g - va) / np.where(vb > va, vb - va, 1.0), 0.0)
            out[np.flatnonzero(empty)] = a + frac * (b - a)   # NaN when a or b is NaN
    return out


def lv_image(stacks: Iterable[Stack], *, v_step_km_s: float = V_STEP_KM_S,
             v_range_km_s: tuple[float, float] = V_RANGE_KM_S,
             lon_step_deg: float | None = None,
             max_abs_glat_deg: float | None = MAX_ABS_GLAT_DEG) -> LvImage:
    """The stacks along the plane as an l-v image (see the module's conventions).

    Parameters
    ----------
    stacks : iterable of Stack
        Read once; only the velocity axis and ``tb_k`` of each are used.
    v_step_km_s, v_range_km_s : float, (float, float)
        The common velocity grid (cell centres), km/s.
    lon_step_deg : float, optional
        None: one row per stack. A step: rows on a regular longitude grid of that step
        (centres at multiples of it), each the mean of the stacks in it (NaN where none of
        them has a value), and all-NaN rows for the empty cells between the first and the
        last: the gaps of the survey.
    max_abs_glat_deg : float, optional
        Stacks with |b| above this are left out ("along the plane"); None keeps every stack.

    Returns
    -------
    LvImage
        With no stack left: 0 rows (``tb_k`` of shape (0, n_v)).
    """
    grid = velocity_grid(v_step_km_s, v_range_km_s)
    if lon_step_deg is not None and not (math.isfinite(lon_step_deg) and lon_step_deg > 0):
        raise ValueError(f"longitude step {lon_step_deg!r}: expected a positive number of deg")
    lons, lats, rows, names = [], [], [], []
    for s in stacks:
        if max_abs_glat_deg is not None and abs(float(s.glat_deg)) > max_abs_glat_deg:
            continue
        lons.append(float(wrap_glon_deg(s.glon_deg)))
        lats.append(float(s.glat_deg))
        rows.append(resample_profile(s.v_km_s, s.tb_k, grid))
        names.append(s.object)
    if not rows:
        return LvImage(np.zeros(0), np.zeros(0), grid, np.zeros((0, grid.size)), ())
    lon = np.array(lons)
    lat = np.array(lats)
    tb = np.vstack(rows)
    order = np.argsort(lon, kind="stable")
    lon, lat, tb = lon[order], lat[order], tb[order]
    objects = [names[i] for i in order]
    if lon_step_deg is None:
        return LvImage(lon, lat, grid, tb, tuple(objects))
    cell = np.round(lon / lon_step_deg).astype(np.int64)
    first, last = int(cell[0]), int(cell[-1])
    n = last - first + 1
    sums = np.zeros((n, grid.size))
    counts = np.zeros((n, grid.size))
    lat_sum = np.zeros(n)
    lat_n = np.zeros(n)
    binned_names: list[list[str]] = [[] for _ in range(n)]
    for c, b, row, name in zip(cell - first, lat, tb, objects, strict=True):
        fin = np.isfinite(row)
        sums[c, fin] += row[fin]
        counts[c, fin] += 1
        lat_sum[c] += b
        lat_n[c] += 1
        binned_names[c].append(name)
    with np.errstate(invalid="ignore", divide="ignore"):
        image = np.where(counts > 0, sums / np.where(counts > 0, counts, 1), np.nan)
        mean_lat = np.where(lat_n > 0, lat_sum / np.where(lat_n > 0, lat_n, 1), np.nan)
    centres = (first + np.arange(n)) * float(lon_step_deg)
    return LvImage(centres, mean_lat, grid, image, tuple("+".join(x) for x in binned_names))
