"""The l-v image (reduce/lv.py) and the reduction's pictures (reduce/plots.py).

Outside references used below:
- PNG signature: the 8 bytes 89 50 4E 47 0D 0A 1A 0A (PNG specification, ISO/IEC 15948,
  section 5.2; from memory).
- Keplerian rotation: Theta^2 = G M / R for all the mass M inside R, so Theta is proportional
  to R^-1/2 (Newtonian gravity; textbook, from memory).
- IAU 1985 Galactic constants R0 = 8.5 kpc, Theta0 = 220 km/s (MNRAS 221, 1023, 1986).
"""

from __future__ import annotations

import math
from types import SimpleNamespace

import matplotlib.image
import matplotlib.pyplot as plt
import numpy as np
import pytest

from spinflip.reduce import plots
from spinflip.reduce.constants import CONSTANTS
from spinflip.reduce.lv import lv_image, resample_profile, velocity_grid, wrap_glon_deg
from spinflip.reduce.profile import Stack

PNG_SIGNATURE = b"\x89PNG\r\n\x1a\n"       # ISO/IEC 15948 section 5.2 (from memory)
IAU = CONSTANTS["iau1985"]


def make_stack(glon, lines=((0.0, 20.0, 8.0),), v=None, glat=0.0, name=None,
               noise_k=0.0, seed=0) -> Stack:
    """A Stack with Gaussian lines (centre km/s, peak K, sigma km/s) on ``v`` (default
    0.5 km/s channels from -200 to +200)."""
    v = np.arange(-200.0, 200.0 + 1e-9, 0.5) if v is None else np.asarray(v, float)
    tb = np.zeros(v.size)
    for c, peak, s in lines:
        tb += peak * np.exp(-0.5 * ((v - c) / s) ** 2)
    tb += np.random.default_rng(seed).normal(0.0, noise_k, v.size) if noise_k else 0.0
    sigma = np.full(v.size, max(noise_k, 0.1))
    return Stack(object=name or f"G{glon:05.1f}", glon_deg=glon, glat_deg=glat, v_km_s=v,
                 tb_k=tb, sigma_k=sigma, weight=1.0 / sigma ** 2, exposure_s=600.0,
                 n_rows=60, n_scans=2, w_k_km_s=1.0, w_err_k_km_s=0.1, nhi_cm2=1.823e18,
                 nhi_err_cm2=1.8e17, line_window_km_s=(-50.0, 50.0), baseline_order=1,
                 scans=("scan-0001.fits",))


def point(glon, vt, r, theta, err=4.0):
    """A terminal-velocity point with the attributes plots.py reads (TerminalPoint's names)."""
    return SimpleNamespace(glon_deg=glon, v_terminal_km_s=vt, v_terminal_err_km_s=2.0,
                           r_kpc=r, theta_km_s=theta, theta_err_km_s=err)


def tangent_points():
    """Points of a flat curve at Theta0 by the tangent-point relation R = R0 sin l,
    v_t = Theta - Theta0 sin l (first quadrant)."""
    out = []
    for lon in (20.0, 30.0, 40.0, 50.0, 60.0):
        s = math.sin(math.radians(lon))
        out.append(point(lon, IAU.theta0_km_s * (1 - s), IAU.r0_kpc * s, IAU.theta0_km_s))
    return out


def assert_png(path, min_size=(100, 100)):
    raw = path.read_bytes()
    assert raw[:8] == PNG_SIGNATURE and len(raw) > 1000
    img = matplotlib.image.imread(path)
    assert img.shape[0] >= min_size[1] and img.shape[1] >= min_size[0]
    assert float(np.ptp(img[..., :3])) > 0.1          # not a blank picture
    assert plt.get_fignums() == []                     # nothing left open


# ----------------------------------------------------------------------------------------------
# lv_image
# ----------------------------------------------------------------------------------------------
def test_lv_image_puts_lines_in_their_cells_and_leaves_gaps_nan():
    # l = 50 first, to show rows are sorted; the l = 30 stack covers only -100..+100 km/s
    s50 = make_stack(50.0, lines=((-30.0, 10.0, 3.0),))
    s30 = make_stack(30.0, lines=((60.0, 25.0, 3.0),), v=np.arange(-100.0, 100.01, 0.5))
    img = lv_image([s50, s30], v_step_km_s=2.0, v_range_km_s=(-150.0, 150.0))
    assert list(img.glon_deg) == [30.0, 50.0] and img.objects == ("G030.0", "G050.0")
    assert img.tb_k.shape == (2, 151) and img.v_step_km_s == 2.0
    assert img.v_km_s[0] == -150.0 and img.v_km_s[-1] == 150.0
    assert img.v_km_s[int(np.nanargmax(img.tb_k[0]))] == 60.0
    assert img.v_km_s[int(np.nanargmax(img.tb_k[1]))] == -30.0
    # the 2 km/s cell centred on 60 holds the channels at 59, 59.5, 60, 60.5 km/s: their mean
    d = np.array([-1.0, -0.5, 0.0, 0.5])
    assert np.nanmax(img.tb_k[0]) == pytest.approx(25.0 * np.mean(np.exp(-0.5 * (d / 3) ** 2)))
    gap = (img.v_km_s < -101.0) | (img.v_km_s > 101.0)
    assert np.isnan(img.tb_k[0, gap]).all() and np.isfinite(img.tb_k[0, ~gap]).all()
    assert np.isfinite(img.tb_k[1]).all()


def test_lv_image_longitude_bins_leave_empty_rows_and_wrap_the_fourth_quadrant():
    stacks = [make_stack(350.0), make_stack(10.0), make_stack(11.0, lines=((0.0, 40.0, 8.0),))]
    img = lv_image(stacks, lon_step_deg=5.0)
    assert list(img.glon_deg) == [-10.0, -5.0, 0.0, 5.0, 10.0]
    assert np.isnan(img.tb_k[1:4]).all()                   # no stack between -10 and 10
    # the 10 and 11 deg stacks share the 10 deg cell: the mean of 20 K and 40 K
    assert np.nanmax(img.tb_k[4]) == pytest.approx(30.0, rel=1e-3)
    assert img.objects[4] == "G010.0+G011.0"
    assert list(wrap_glon_deg([0.0, 180.0, 180.5, 359.0, -10.0])) == [0.0, 180.0, -179.5,
                                                                         -1.0, -10.0]


def test_lv_image_leaves_stacks_off_the_plane_out_and_handles_none():
    img = lv_image([make_stack(30.0, glat=10.0)])
    assert img.tb_k.shape == (0, 501) and img.glon_deg.size == 0
    assert lv_image([make_stack(30.0, glat=10.0)], max_abs_glat_deg=None).glon_deg.size == 1


def test_resample_interpolates_coarse_channels_and_keeps_nan_gaps():
    v = np.arange(-10.0, 10.01, 4.0)                       # 4 km/s channels, 1 km/s grid
    t = 2.0 * v + 1.0
    t[3] = np.nan                                          # v = 2: no value
    grid = velocity_grid(1.0, (-10.0, 10.0))
    out = resample_profile(v[::-1], t[::-1], grid)         # order of the channels is free
    lin = 2.0 * grid + 1.0
    near_nan = (grid > -2.0) & (grid < 6.0)                # between a NaN and its neighbours
    np.testing.assert_allclose(out[~near_nan], lin[~near_nan])
    assert np.isnan(out[near_nan & ~np.isin(grid, [-2.0, 6.0])]).all()
    with pytest.raises(ValueError, match="velocity step"):
        velocity_grid(0.0)


# ----------------------------------------------------------------------------------------------
# pictures
# ----------------------------------------------------------------------------------------------
def test_lv_png_is_a_labelled_picture_with_the_points(tmp_path):
    img = lv_image([make_stack(lon, lines=((100 - 2 * lon, 20.0, 6.0),))
                    for lon in (20.0, 25.0, 30.0, 60.0)])
    fig = plots.lv_figure(img, tangent_points())
    ax = fig.axes[0]
    assert ax.get_xlabel() == "l (deg)" and ax.get_ylabel() == "v_LSRK (km/s)"
    assert fig.axes[1].get_ylabel() == "T_B (K)"                  # the colour bar
    lo, hi = ax.get_xlim()
    assert lo > hi                                                 # l decreasing to the right
    assert "terminal velocity" in [t.get_text() for t in ax.get_legend().get_texts()]
    out = plots.lv_png(tmp_path / "lv.png", img, tangent_points())
    assert out == tmp_path / "lv.png"
    assert_png(out, (700, 450))
    assert not list(tmp_path.glob(".*.tmp"))                       # no temporary file left


def test_lon_cells_leave_survey_gaps_blank():
    edges, rows = plots.lon_cells(np.array([20.0, 25.0, 30.0, 60.0, 65.0]))
    assert list(rows) == [0, 1, 2, -1, 3, 4]
    np.testing.assert_allclose(edges, [17.5, 22.5, 27.5, 32.5, 57.5, 62.5, 67.5])


def test_rotation_curve_png_keplerian_flat_line_and_legend(tmp_path):
    pts = tangent_points()
    fig = plots.rotation_curve_figure(pts, IAU)
    ax = fig.axes[0]
    assert ax.get_xlabel() == "R (kpc)" and ax.get_ylabel() == "Theta (km/s)"
    lines = {ln.get_label(): ln for ln in ax.get_lines()}
    kep = lines["Keplerian from the innermost point"]
    r, th = (np.asarray(a, float) for a in kep.get_data())
    r_in = IAU.r0_kpc * math.sin(math.radians(20.0))
    assert r[0] == pytest.approx(r_in) and th[0] == pytest.approx(IAU.theta0_km_s)
    # Theta R^1/2 constant: falls as R^-1/2 (Kepler)
    np.testing.assert_allclose(th * np.sqrt(r), IAU.theta0_km_s * math.sqrt(r_in), rtol=1e-12)
    assert np.all(np.diff(th) < 0)
    flat = lines["flat at Theta0 = 220 km/s"]
    assert set(np.asarray(flat.get_ydata(), float)) == {220.0}
    r0_line = lines["R0 = 8.5 kpc"]
    assert set(np.asarray(r0_line.get_xdata(), float)) == {8.5}
    legend = ax.get_legend()
    assert legend.get_title().get_text() == "iau1985: MNRAS 221, 1023, 1986"
    # the points' error bars come from theta_err_km_s
    container = ax.containers[0]
    assert container.get_label() == "tangent points"
    seg = container.lines[2][0].get_segments()[0]
    assert seg[1][1] - seg[0][1] == pytest.approx(2 * 4.0)
    assert_png(plots.rotation_curve_png(tmp_path / "rc.png", pts, IAU))


def test_rotation_curve_without_points_still_draws(tmp_path):
    assert_png(plots.rotation_curve_png(tmp_path / "rc.png", [], CONSTANTS["maser2014"]))


def face_on_map(consts=IAU):
    """A map with a ring of gas at R = 6 kpc, density[ix, iy] as numpy.histogram2d gives."""
    edges = np.arange(-16.0, 16.01, 0.5)
    centres = 0.5 * (edges[1:] + edges[:-1])
    x, y = np.meshgrid(centres, centres, indexing="ij")
    dens = np.exp(-0.5 * ((np.hypot(x, y) - 6.0) / 1.0) ** 2) * (y > -2.0)   # [ix, iy]
    return SimpleNamespace(x_edges_kpc=edges, y_edges_kpc=edges, density=dens,
                           unit="Msun/pc^2", quantity="HI surface density",
                           counts=np.ones_like(dens), left_out={}, ambiguity="split",
                           consts=consts)


def test_faceon_png_marks_sun_centre_and_solar_circle(tmp_path):
    fm = face_on_map()
    fig = plots.faceon_figure(fm)
    ax = fig.axes[0]
    assert ax.get_xlabel() == "x (kpc)" and ax.get_ylabel() == "y (kpc)"
    assert ax.get_aspect() == 1.0
    assert fig.axes[1].get_ylabel() == "HI surface density (Msun/pc^2)"
    lines = {ln.get_label(): ln for ln in ax.get_lines()}
    assert list(lines["Sun"].get_xydata()[0]) == [0.0, 8.5]
    assert list(lines["Galactic centre"].get_xydata()[0]) == [0.0, 0.0]
    circle = [p for p in ax.patches if p.get_label().startswith("solar circle")][0]
    assert circle.get_radius() == 8.5 and tuple(circle.center) == (0.0, 0.0)
    # the image is density transposed: row = y cell (the gas is cut below y = -2)
    mesh = ax.collections[0]
    shown = np.ma.getdata(mesh.get_array()).reshape(64, 64)
    np.testing.assert_allclose(shown, fm.density.T)
    assert_png(plots.faceon_png(tmp_path / "faceon.png", fm), (600, 550))
    bad = face_on_map()
    bad.density = bad.density[:, :10]
    with pytest.raises(ValueError, match="x cells, y cells"):
        plots.faceon_figure(bad)


def test_profile_png(tmp_path):
    st = make_stack(120.0, lines=((-50.0, 30.0, 10.0),), noise_k=0.2)
    ax = plots.profile_figure(st).axes[0]
    assert ax.get_xlabel() == "v_LSRK (km/s)" and ax.get_ylabel() == "T_B (K)"
    assert "N(HI)" in ax.get_title() and "optically thin" in ax.get_title()
    assert_png(plots.profile_png(tmp_path / "p.png", st))


def test_a_season_of_pictures_leaves_nothing_open(tmp_path):
    img = lv_image([make_stack(lon) for lon in (10.0, 20.0)])
    for _ in range(12):
        plots.lv_png(tmp_path / "lv.png", img)
        plots.rotation_curve_png(tmp_path / "rc.png", tangent_points(), IAU)
    assert plt.get_fignums() == [] and sorted(p.name for p in tmp_path.iterdir()) == \
        ["lv.png", "rc.png"]


def test_the_daemon_never_imports_the_reduction_and_nothing_else_matplotlib():
    """matplotlib is the pictures' only (DEVELOPERS.md): the daemon imports neither it nor
    spinflip.reduce; the terminal UI (whose survey view uses the reduction's numpy code) does
    not import matplotlib."""
    import subprocess
    import sys
    code = ("import sys; import spinflip.daemon.run.observation, spinflip.cli; "
            "a = ('matplotlib' in sys.modules, "
            "any(m.startswith('spinflip.reduce') for m in sys.modules)); "
            "import spinflip.tui.app, spinflip.tui.survey; "
            "print(*a, 'matplotlib' in sys.modules)")
    out = subprocess.run([sys.executable, "-c", code], capture_output=True, text=True, timeout=60)
    assert out.returncode == 0, out.stderr
    assert out.stdout.strip() == "False False False"
