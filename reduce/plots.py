"""The reduction's pictures, as PNG files: the l-v diagram, the rotation curve, the face-on
HI map and one target's profile.

The only module of spinflip that imports matplotlib, with the headless Agg backend (no
display needed). Figures are made with :class:`matplotlib.figure.Figure` directly, never
through ``pyplot``: no figure is registered anywhere, so nothing stays open and a season of
pictures does not grow the memory. Each ``*_figure`` function returns the figure (tests and
callers can read its axes); each ``*_png`` function draws it, writes it (to a temporary file
in the same folder, then renamed over ``path``: a reader never sees half a picture) and
returns the path.

Inputs are plain values with the documented attributes, so that this module depends on no
other part of the reduction but the types it names:

- terminal-velocity points (:class:`TerminalPoint`: ``glon_deg``, ``v_terminal_km_s``,
  ``v_terminal_err_km_s``, ``r_kpc``, ``theta_km_s``, ``theta_err_km_s``), such as
  ``spinflip.reduce.tangent.TerminalPoint``;
- a face-on map (:class:`FaceOnMap`: ``x_edges_kpc``, ``y_edges_kpc``, ``density``,
  ``unit``, ``quantity``, ``ambiguity``, ``consts``), such as
  ``spinflip.reduce.faceon.FaceOnMap``; ``density`` is indexed [x cell, y cell] (the
  convention of ``numpy.histogram2d``), in Galactocentric coordinates with the Galactic
  centre at (0, 0), the Sun at (0, R0) and l = 90 deg towards +x.
"""

from __future__ import annotations

import os
import tempfile
from collections.abc import Iterable
from pathlib import Path

import matplotlib

matplotlib.use("Agg")

import numpy as np  # noqa: E402
from matplotlib.figure import Figure  # noqa: E402
from matplotlib.patches import Circle  # noqa: E402

from spinflip.reduce.faceon import FaceOnMap  # noqa: E402
from spinflip.reduce.tangent import TerminalPoint, keplerian_km_s  # noqa: E402

from .constants import GalacticConstants  # noqa: E402
from .lv import LvImage, wrap_glon_deg  # noqa: E402
from .profile import Stack  # noqa: E402

#: Size of every figure, inches, and its resolution, dots per inch.
FIGSIZE_IN = (8.0, 5.5)
DPI = 100
#: Colour maps: brightness temperature, surface density.
CMAP_TB = "viridis"
CMAP_DENSITY = "magma"

LABEL_GLON = "l (deg)"
LABEL_V = "v_LSRK (km/s)"
LABEL_R = "R (kpc)"
LABEL_THETA = "Theta (km/s)"
LABEL_X = "x (kpc)"
LABEL_Y = "y (kpc)"


def _save(fig: Figure, path: str | os.PathLike) -> Path:
    """Write ``fig`` as PNG to ``path`` (temporary file, then renamed over it)."""
    out = Path(path)
    fd, tmp = tempfile.mkstemp(prefix=f".{out.name}.", suffix=".tmp", dir=out.parent)
    try:
        with os.fdopen(fd, "wb") as f:
            fig.savefig(f, format="png", dpi=DPI)
        os.replace(tmp, out)
    except BaseException:
        Path(tmp).unlink(missing_ok=True)
        raise
    finally:
        fig.clear()
    return out


def _limits(values: np.ndarray, lo_pct: float = 1.0, hi_pct: float = 99.5) -> tuple[float, float]:
    """Colour limits from the finite values' percentiles; (0, 1) when there are none."""
    finite = values[np.isfinite(values)]
    if not finite.size:
        return 0.0, 1.0
    lo, hi = (float(v) for v in np.percentile(finite, [lo_pct, hi_pct]))
    return (lo, hi) if hi > lo else (lo - 0.5, lo + 0.5)


# ----------------------------------------------------------------------------------------------
# l-v diagram
# ----------------------------------------------------------------------------------------------
def lon_cells(glon_deg: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """Cell edges for rows at (possibly irregular) longitudes, and which cell is which row.

    Each row gets a cell of width w = the median spacing of the longitudes (1 deg for a
    single row), cut at the midpoint to a closer neighbour; where two neighbours are further
    apart than w, an empty cell (row index -1) fills the gap, which the picture leaves blank.

    Returns
    -------
    edges : numpy.ndarray
        Ascending cell edges, deg (one more than the cells).
    rows : numpy.ndarray of int
        Per cell, the row of ``glon_deg`` it shows, or -1 for a gap.
    """
    lon = np.asarray(glon_deg, dtype=float)
    if lon.size == 0:
        return np.zeros(0), np.zeros(0, dtype=int)
    spacing = np.diff(lon)
    width = float(np.median(spacing[spacing > 0])) if (spacing > 0).any() else 1.0
    edges = [lon[0] - width / 2]
    rows: list[int] = []
    for i in range(lon.size):
        right = lon[i] + width / 2
        if i + 1 < lon.size:
            right = min(right, 0.5 * (lon[i] + lon[i + 1]))
        if right > edges[-1]:
            rows.append(i)
            edges.append(right)
        if i + 1 < lon.size:
            left_next = max(lon[i + 1] - width / 2, edges[-1])
            if left_next > edges[-1]:
                rows.append(-1)
                edges.append(left_next)
    return np.array(edges), np.array(rows, dtype=int)


def lv_figure(image: LvImage, points: Iterable[TerminalPoint] = ()) -> Figure:
    """The l-v diagram: longitude (deg, decreasing to the right) against LSRK velocity
    (km/s), colour = T_B (K) with a colour bar; terminal-velocity points marked with their
    velocity error bars."""
    fig = Figure(figsize=FIGSIZE_IN)
    ax = fig.add_subplot()
    edges, rows = lon_cells(image.glon_deg)
    if rows.size:
        data = np.full((image.v_km_s.size, rows.size), np.nan)
        shown = rows >= 0
        data[:, shown] = image.tb_k[rows[shown]].T
        step = image.v_step_km_s if image.v_km_s.size > 1 else 1.0
        v_edges = np.concatenate([image.v_km_s - step / 2, [image.v_km_s[-1] + step / 2]])
        vmin, vmax = _limits(data)
        mesh = ax.pcolormesh(edges, v_edges, np.ma.masked_invalid(data), cmap=CMAP_TB,
                             vmin=vmin, vmax=vmax, shading="flat")
        fig.colorbar(mesh, ax=ax, label="T_B (K)")
        ax.set_xlim(edges[-1], edges[0])             # l decreasing to the right
        ax.set_ylim(v_edges[0], v_edges[-1])
    else:
        ax.text(0.5, 0.5, "no stacks along the plane", ha="center", va="center",
                transform=ax.transAxes)
    pts = list(points)
    if pts:
        lon = wrap_glon_deg(np.array([p.glon_deg for p in pts], dtype=float))
        vt = np.array([p.v_terminal_km_s for p in pts], dtype=float)
        err = np.array([getattr(p, "v_terminal_err_km_s", np.nan) for p in pts], dtype=float)
        ax.errorbar(lon, vt, yerr=np.where(np.isfinite(err), err, 0.0), fmt="o", ms=4,
                    color="red", mec="white", mew=0.6, ecolor="red", capsize=2,
                    label="terminal velocity")
        ax.legend(loc="upper right", fontsize="small")
    ax.set_xlabel(LABEL_GLON)
    ax.set_ylabel(LABEL_V)
    ax.set_title(f"l-v diagram: {image.glon_deg.size} pointings, T_B (K)")
    fig.tight_layout()
    return fig


def lv_png(path: str | os.PathLike, image: LvImage,
           points: Iterable[TerminalPoint] = ()) -> Path:
    """Write the l-v diagram (:func:`lv_figure`) to ``path`` as PNG; returns the path."""
    return _save(lv_figure(image, points), path)


# ----------------------------------------------------------------------------------------------
# rotation curve
# ----------------------------------------------------------------------------------------------
def rotation_curve_figure(points: Iterable[TerminalPoint],
                          consts: GalacticConstants) -> Figure:
    """Theta(R) with error bars, the Keplerian curve through the innermost point, Theta0 as
    a flat line and R0 marked; the legend names the constants and their reference.

    Lines (``ax.get_lines()`` labels): "Keplerian from the innermost point" (from R_in to
    R0), "flat at Theta0", "R0"; the points are an errorbar container "tangent points".
    """
    pts = sorted((p for p in points if np.isfinite(p.r_kpc) and np.isfinite(p.theta_km_s)),
                 key=lambda p: p.r_kpc)
    fig = Figure(figsize=FIGSIZE_IN)
    ax = fig.add_subplot()
    r_top = consts.r0_kpc * 1.05
    if pts:
        r = np.array([p.r_kpc for p in pts])
        th = np.array([p.theta_km_s for p in pts])
        err = np.array([p.theta_err_km_s for p in pts], dtype=float)
        ax.errorbar(r, th, yerr=np.where(np.isfinite(err), err, 0.0), fmt="o", ms=4,
                    capsize=2, label="tangent points")
        rk = np.linspace(r[0], max(consts.r0_kpc, r[-1]), 200)
        ax.plot(rk, keplerian_km_s(rk, float(r[0]), float(th[0])), "--", color="grey",
                label="Keplerian from the innermost point")
        r_top = max(r_top, float(r[-1]) * 1.05)
    else:
        ax.text(0.5, 0.5, "no tangent points", ha="center", va="center",
                transform=ax.transAxes)
    ax.plot([0.0, r_top], [consts.theta0_km_s] * 2, ":", color="black",
            label=f"flat at Theta0 = {consts.theta0_km_s:g} km/s")
    ax.axvline(consts.r0_kpc, color="tab:orange", lw=1,
               label=f"R0 = {consts.r0_kpc:g} kpc")
    ax.set_xlim(0.0, r_top)
    ax.set_xlabel(LABEL_R)
    ax.set_ylabel(LABEL_THETA)
    ax.set_title(f"Rotation curve by the tangent-point method ({len(pts)} points)")
    ax.legend(loc="best", fontsize="small",
              title=f"{consts.name}: {consts.reference}", title_fontsize="small")
    fig.tight_layout()
    return fig


def rotation_curve_png(path: str | os.PathLike, points: Iterable[TerminalPoint],
                       consts: GalacticConstants) -> Path:
    """Write the rotation curve (:func:`rotation_curve_figure`) as PNG; returns the path."""
    return _save(rotation_curve_figure(points, consts), path)


# ----------------------------------------------------------------------------------------------
# face-on map
# ----------------------------------------------------------------------------------------------
def _density_yx(facemap: FaceOnMap) -> np.ndarray:
    """The map's density as [y cell, x cell] for ``pcolormesh`` (it is [x, y])."""
    nx, ny = facemap.x_edges_kpc.size - 1, facemap.y_edges_kpc.size - 1
    d = np.asarray(facemap.density, dtype=float)
    if d.shape != (nx, ny):
        raise ValueError(f"face-on map density of shape {d.shape}: expected ({nx}, {ny}) "
                         "= (x cells, y cells) from its edges")
    return d.T


def faceon_figure(facemap: FaceOnMap) -> Figure:
    """The face-on map: x, y in kpc (equal aspect), colour = density with its unit, the Sun
    at (0, R0), the Galactic centre at (0, 0) and the solar circle marked."""
    r0 = facemap.consts.r0_kpc
    fig = Figure(figsize=(7.0, 6.5))
    ax = fig.add_subplot()
    data = _density_yx(facemap)
    vmin, vmax = _limits(data, 0.0, 99.5)
    mesh = ax.pcolormesh(facemap.x_edges_kpc, facemap.y_edges_kpc, np.ma.masked_invalid(data),
                         cmap=CMAP_DENSITY, vmin=vmin, vmax=vmax, shading="flat")
    short = facemap.quantity.split(" (")[0]           # the details go under the map
    fig.colorbar(mesh, ax=ax, label=f"{short} ({facemap.unit})")
    ax.add_patch(Circle((0.0, 0.0), r0, fill=False, ls="--", color="cyan", lw=1,
                        label=f"solar circle, R0 = {r0:g} kpc"))
    ax.plot([0.0], [r0], marker="*", ms=12, color="yellow", mec="black", ls="none",
            label="Sun")
    ax.plot([0.0], [0.0], marker="X", ms=10, color="black", mec="white", ls="none",
            label="Galactic centre")
    ax.set_aspect("equal")
    ax.set_xlim(facemap.x_edges_kpc[0], facemap.x_edges_kpc[-1])
    ax.set_ylim(facemap.y_edges_kpc[0], facemap.y_edges_kpc[-1])
    ax.set_xlabel(LABEL_X)
    ax.set_ylabel(LABEL_Y)
    ax.set_title(f"Face-on HI map ({facemap.consts.name})", fontsize="medium")
    fig.text(0.01, 0.01, f"{facemap.quantity}; near/far: {facemap.ambiguity}",
             fontsize="x-small", wrap=True)
    ax.legend(loc="upper right", fontsize="small")
    fig.tight_layout()
    return fig


def faceon_png(path: str | os.PathLike, facemap: FaceOnMap) -> Path:
    """Write the face-on map (:func:`faceon_figure`) as PNG; returns the path."""
    return _save(faceon_figure(facemap), path)


# ----------------------------------------------------------------------------------------------
# one profile
# ----------------------------------------------------------------------------------------------
def profile_figure(stack: Stack) -> Figure:
    """One target's stacked profile: T_B (K) against LSRK velocity (km/s), the +-1 sigma
    noise band, the line window shaded, W and N(HI) in the title."""
    fig = Figure(figsize=FIGSIZE_IN)
    ax = fig.add_subplot()
    v, tb, sig = stack.v_km_s, stack.tb_k, stack.sigma_k
    ax.fill_between(v, tb - sig, tb + sig, color="tab:blue", alpha=0.25, lw=0,
                    label="+-1 sigma")
    ax.plot(v, tb, color="tab:blue", lw=1, label="T_B")
    lo, hi = stack.line_window_km_s
    if np.isfinite(lo) and np.isfinite(hi) and hi > lo:
        ax.axvspan(lo, hi, color="grey", alpha=0.15, label="line window")
    ax.axhline(0.0, color="black", lw=0.5)
    ax.set_xlabel(LABEL_V)
    ax.set_ylabel("T_B (K)")
    ax.set_title(f"{stack.object}  l = {stack.glon_deg:.2f} deg  b = {stack.glat_deg:+.2f} deg\n"
                 f"W = {stack.w_k_km_s:.1f} +- {stack.w_err_k_km_s:.1f} K km/s,  "
                 f"N(HI) = {stack.nhi_cm2:.3g} cm^-2 (optically thin),  {stack.n_scans} scans",
                 fontsize="medium")
    ax.legend(loc="upper right", fontsize="small")
    fig.tight_layout()
    return fig


def profile_png(path: str | os.PathLike, stack: Stack) -> Path:
    """Write one target's profile (:func:`profile_figure`) as PNG; returns the path."""
    return _save(profile_figure(stack), path)
