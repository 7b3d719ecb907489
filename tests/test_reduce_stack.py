"""spinflip.reduce: reading scans (scans.py), grouping by target (grouping.py) and the weighted
stack (stack.py), on synthetic rows with known noise and on a real simulated scan.

Sources: the radiometer equation sigma = T_sys / sqrt(B t) (Dicke 1946, Rev. Sci. Instrum.
17, 268; any radio astronomy text, e.g. Wilson, Rohlfs & Huttemeister, Tools of Radio
Astronomy); N(HI) = 1.823e18 int T_B dv cm^-2, optically thin (Dickey & Lockman 1990, ARA&A
28, 215); the integral of a Gaussian, int T0 exp(-v^2 / 2 s^2) dv = sqrt(2 pi) T0 s
(analytic); the half-power beam width 1.2 lambda / D (common practice, sky/beam.py).
"""

from __future__ import annotations

import math
import os
import shutil
from pathlib import Path

import numpy as np
import pytest
from astropy.io import fits

from spinflip.daemon.sky.beam import beamwidth_deg
from spinflip.daemon.sky.hi_line import C_M_S, HI_REST_FREQ_HZ
from spinflip.daemon.storage.archive import ScanWriter
from spinflip.reduce.grouping import group_by_target, group_object, tolerance_for
from spinflip.reduce.scans import (
    ScanRows,
    ScanSummary,
    Unusable,
    iter_scans,
    iter_summaries,
    read_rows,
    summarise,
)
from spinflip.reduce.stack import stack_target, stack_target_details

B_HZ = 2343.75                                   # channel width, Hz
DV_M_S = -C_M_S * B_HZ / HI_REST_FREQ_HZ         # CDELT1A of a channel, m/s (-0.4947 km/s)


def synthetic_scan(values: np.ndarray, *, tsys_k: np.ndarray, exposure_s: np.ndarray,
                   vframe_m_s: np.ndarray | None = None, flagged: np.ndarray | None = None,
                   glon: float = 180.0, glat: float = 0.0, header: dict | None = None,
                   name: str = "scan-synthetic.fits") -> ScanRows:
    """ScanRows of ``values`` (n, nchan) K on axes CRVAL1A = VFRAME, CRPIX1A = nchan/2 + 1."""
    n, nchan = values.shape
    vframe = np.zeros(n) if vframe_m_s is None else np.asarray(vframe_m_s, dtype=float)
    return ScanRows(
        path=Path(name), header={"BUNIT": "K", "TEMPSCAL": "TA", "BEAMEFF": 1.0,
                                 "DISHDIAM": 3.0, **(header or {})},
        data=values.astype(np.float32),
        flagged=np.zeros((n, nchan), bool) if flagged is None else flagged,
        tsys_k=np.asarray(tsys_k, dtype=float), exposure_s=np.asarray(exposure_s, dtype=float),
        chan_exposure_s=None, vel_crval_m_s=vframe.copy(), vel_cdelt_m_s=np.full(n, DV_M_S),
        crpix=np.full(n, nchan / 2 + 1.0), glon_deg=np.full(n, glon), glat_deg=np.full(n, glat),
        date_obs=np.array(["2026-03-01T04:00:00"] * n), restfreq_hz=np.full(n, HI_REST_FREQ_HZ),
        unit="K", channel_hz=np.full(n, B_HZ), folded=np.zeros(n, bool),
        objects=np.array(["G180.0+00.0"] * n))


def row_axis_km_s(scan: ScanRows, r: int) -> np.ndarray:
    return scan.velocity_m_s(r) / 1e3


def noise_rows(rng: np.random.Generator, tsys: np.ndarray, t: np.ndarray,
               nchan: int) -> np.ndarray:
    """Gaussian noise rows with sigma_i = T_sys,i / sqrt(B t_i) (radiometer equation)."""
    sig = tsys / np.sqrt(B_HZ * t)
    return rng.standard_normal((tsys.size, nchan)) * sig[:, None]


# ----------------------------------------------------------------------------------------------
# the stack on synthetic rows
# ----------------------------------------------------------------------------------------------
def test_stack_noise_is_one_over_root_sum_of_radiometer_weights():
    """Radiometer equation (Dicke 1946): rows of different T_sys and exposure, weighted by
    B t / T_sys^2; the stack's measured noise over 8192 channels matches 1/sqrt(sum w)."""
    rng = np.random.default_rng(11)
    tsys = np.array([60.0, 90.0, 150.0, 75.0, 300.0])
    t = np.array([5.0, 2.0, 10.0, 1.0, 7.0])
    scan = synthetic_scan(noise_rows(rng, tsys, t, 8192), tsys_k=tsys, exposure_s=t)
    stack = stack_target([scan], baseline_order=-1, scale_noise=False)
    w_expected = np.sum(B_HZ * t / tsys ** 2)
    assert np.allclose(stack.weight, w_expected, rtol=1e-12)
    assert np.allclose(stack.sigma_k, 1 / math.sqrt(w_expected), rtol=1e-12)
    measured = float(np.std(stack.tb_k))
    predicted = 1 / math.sqrt(w_expected)
    assert abs(measured / predicted - 1) < 0.03, (measured, predicted)
    # an equal-weight mean of the same rows is noisier: the weighting matters
    equal = float(np.std(scan.data.astype(float).mean(axis=0)))
    assert equal > 1.5 * measured


def test_stack_noise_falls_as_one_over_root_n():
    """Radiometer equation: N equal rows stack to sigma_1 / sqrt(N) (N = 1, 4, 16)."""
    rng = np.random.default_rng(12)
    sig1 = 75.0 / math.sqrt(B_HZ * 5.0)
    measured = {}
    for n in (1, 4, 16):
        tsys, t = np.full(n, 75.0), np.full(n, 5.0)
        scan = synthetic_scan(noise_rows(rng, tsys, t, 8192), tsys_k=tsys, exposure_s=t)
        stack = stack_target([scan], baseline_order=-1, scale_noise=False)
        measured[n] = float(np.std(stack.tb_k))
        assert np.allclose(stack.sigma_k, sig1 / math.sqrt(n), rtol=1e-12)
        assert abs(measured[n] / (sig1 / math.sqrt(n)) - 1) < 0.03, (n, measured[n])
    assert abs(measured[1] / measured[16] - 4.0) < 0.2


def test_measured_noise_scaling_and_interpolated_rows():
    """Rows shifted by fractions of a channel: the propagated sigma (sum a^2 w / (sum a w)^2)
    matches the measured noise; the line-free rms check then finds a scale near 1. With
    rows twice as noisy as their T_sys says, the scale finds the factor 2 (radiometer
    prediction vs measurement)."""
    rng = np.random.default_rng(13)
    n, nchan = 6, 4096
    tsys, t = np.full(n, 80.0), np.full(n, 4.0)
    vframe = np.array([0.0, 0.31, 0.5, 0.77, 3.2, 7.9]) * DV_M_S
    scan = synthetic_scan(noise_rows(rng, tsys, t, nchan), tsys_k=tsys, exposure_s=t,
                          vframe_m_s=vframe)
    stack, det = stack_target_details([scan], baseline_order=1)
    inner = stack.weight > 0.99 * np.nanmax(stack.weight)
    ratio = np.std(stack.tb_k[inner] / stack.sigma_k[inner])
    assert abs(ratio - 1) < 0.05, ratio
    assert det.noise_source == "measured" and abs(det.noise_scale - 1) < 0.06
    assert np.nanmin(stack.sigma_k[inner]) < 0.99 / math.sqrt(np.nanmax(stack.weight))
    noisy = synthetic_scan(2 * noise_rows(rng, tsys, t, nchan), tsys_k=tsys, exposure_s=t)
    _s, det2 = stack_target_details([noisy], baseline_order=1)
    assert det2.noise_source == "measured" and abs(det2.noise_scale - 2) < 0.12


def test_flagged_channel_never_contributes():
    """A flagged channel holding 1e9 K changes nothing; a channel flagged in every row is
    NaN with weight 0 (weight 0 for flagged channels)."""
    rng = np.random.default_rng(14)
    n, nchan = 4, 512
    tsys, t = np.full(n, 70.0), np.full(n, 5.0)
    values = noise_rows(rng, tsys, t, nchan)
    flagged = np.zeros((n, nchan), bool)
    flagged[1, 100] = True
    flagged[:, 300] = True
    ref = stack_target([synthetic_scan(values, tsys_k=tsys, exposure_s=t, flagged=flagged)],
                       baseline_order=-1, scale_noise=False)
    spoiled = values.copy()
    spoiled[1, 100] = 1e9
    spoiled[:, 300] = 1e9
    got = stack_target([synthetic_scan(spoiled, tsys_k=tsys, exposure_s=t, flagged=flagged)],
                       baseline_order=-1, scale_noise=False)
    assert np.array_equal(ref.tb_k, got.tb_k, equal_nan=True)
    axis = row_axis_km_s(synthetic_scan(values, tsys_k=tsys, exposure_s=t), 0)
    k100 = int(np.argmin(np.abs(got.v_km_s - axis[100])))
    k300 = int(np.argmin(np.abs(got.v_km_s - axis[300])))
    assert got.weight[k100] == pytest.approx(3 * B_HZ * 5.0 / 70.0 ** 2)   # 3 rows of 4
    assert np.isnan(got.tb_k[k300]) and got.weight[k300] == 0
    assert np.isnan(got.sigma_k[k300])
    # shifted rows: the flagged value does not leak into neighbouring grid channels either
    shifted = stack_target([synthetic_scan(spoiled, tsys_k=tsys, exposure_s=t, flagged=flagged,
                                           vframe_m_s=np.array([0, 0.4, 0.7, 0.2]) * DV_M_S)],
                           baseline_order=-1, scale_noise=False)
    assert np.nanmax(np.abs(shifted.tb_k)) < 10.0


def gaussian_rows(n: int, nchan: int, t0_k: float, v0_km_s: float, s_km_s: float,
                  vframe_m_s: np.ndarray) -> tuple[ScanRows, np.ndarray]:
    """Noise-free rows holding T0 exp(-(v - v0)^2 / 2 s^2) on each row's own LSRK axis."""
    proto = synthetic_scan(np.zeros((n, nchan)), tsys_k=np.full(n, 70.0),
                           exposure_s=np.full(n, 5.0), vframe_m_s=vframe_m_s)
    values = np.stack([t0_k * np.exp(-0.5 * ((row_axis_km_s(proto, r) - v0_km_s) / s_km_s)
                                     ** 2) for r in range(n)])
    return synthetic_scan(values, tsys_k=np.full(n, 70.0), exposure_s=np.full(n, 5.0),
                          vframe_m_s=vframe_m_s), values


def test_column_density_of_a_gaussian_profile():
    """N(HI) = 1.823e18 int T_B dv (Dickey & Lockman 1990) on T0 = 50 K, s = 8 km/s at
    l = 180 deg (line window -40..+40 km/s): int = sqrt(2 pi) T0 s (analytic)."""
    t0, s = 50.0, 8.0
    scan, _ = gaussian_rows(3, 1024, t0, 0.0, s, np.zeros(3))
    stack = stack_target([scan])
    w_true = math.sqrt(2 * math.pi) * t0 * s
    assert stack.line_window_km_s[0] <= -40 and stack.line_window_km_s[1] >= 40
    assert stack.w_k_km_s == pytest.approx(w_true, rel=2e-3)
    assert stack.nhi_cm2 == pytest.approx(1.823e18 * w_true, rel=2e-3)
    assert stack.baseline_order == 1
    # antenna temperature divided by the main-beam efficiency; TMB taken as saved
    ta = synthetic_scan(scan.data.astype(float), tsys_k=scan.tsys_k, exposure_s=scan.exposure_s,
                        header={"TEMPSCAL": "TA", "BEAMEFF": 0.8})
    tmb = synthetic_scan(scan.data.astype(float), tsys_k=scan.tsys_k,
                         exposure_s=scan.exposure_s, header={"TEMPSCAL": "TMB", "BEAMEFF": 0.8})
    assert stack_target([ta]).w_k_km_s == pytest.approx(w_true / 0.8, rel=2e-3)
    assert stack_target([tmb]).w_k_km_s == pytest.approx(w_true, rel=2e-3)
    # its error from the radiometer noise (these rows are noise-free, so the measured rms is
    # not used): sigma sqrt(n) dv over the 80 km/s window
    radio = stack_target([scan], scale_noise=False)
    sig = 70.0 / math.sqrt(B_HZ * 5.0 * 3)
    assert radio.w_err_k_km_s == pytest.approx(sig * math.sqrt(80.0 * stack.dv_km_s), rel=0.01)
    assert radio.nhi_err_cm2 == pytest.approx(1.823e18 * radio.w_err_k_km_s)


def test_regridding_puts_the_line_at_its_lsrk_velocity():
    """Rows whose VFRAME differ by whole and fractional channels (their topocentric axes
    shift): each row is regridded on the common LSRK grid, and the stacked line's centre is
    the true 12.34 km/s; its width is not smeared (second moment within 2 %)."""
    v0, s = 12.34, 6.0
    vframe = np.array([0.0, 0.25, 0.5, 0.75, 10.4, -7.3]) * DV_M_S
    scan, values = gaussian_rows(6, 1024, 40.0, v0, s, vframe)
    stack = stack_target([scan], baseline_order=-1)
    inner = stack.weight > 0
    v, tb = stack.v_km_s[inner], stack.tb_k[inner]
    centre = float(np.sum(v * tb) / np.sum(tb))
    width = float(np.sqrt(np.sum((v - centre) ** 2 * tb) / np.sum(tb)))
    assert abs(centre - v0) < 0.02, centre
    assert abs(width / s - 1) < 0.02, width
    # without regridding (rows averaged channel by channel) the line would sit elsewhere
    naive_v = row_axis_km_s(scan, 0)
    naive = values.mean(axis=0)
    assert abs(float(np.sum(naive_v * naive) / np.sum(naive)) - v0) > 0.3


# ----------------------------------------------------------------------------------------------
# reading real scans made by the simulator
# ----------------------------------------------------------------------------------------------
@pytest.fixture(scope="module")
def l30(clean_l30_scan):
    """The session's simulated scan at l = 30 deg (tests/sim_scans.py), read once."""
    return clean_l30_scan


def _folder_state(folder: Path) -> dict:
    return {p.name: (p.stat().st_size, p.stat().st_mtime_ns) for p in folder.iterdir()}


def test_reading_a_simulated_scan(l30):
    """The daemon's FITS file read back: every row, its velocity axis, its header; the stack's
    W agrees with the daemon's own scan average (LINEINT) within 1 %."""
    folder = l30["path"].parent
    before = _folder_state(folder)
    (scan,) = [s for s in iter_scans([folder]) if s.path == l30["path"]]
    assert isinstance(scan, ScanRows)
    rows = l30["rows"]
    assert scan.n_rows == len(rows) and scan.unit == "K"
    assert np.array_equal(scan.data, rows["DATA"]) and np.array_equal(scan.flagged,
                                                                      rows["FLAGGED"])
    k = np.arange(scan.nchan)
    v0 = rows["CRVAL1A"][0] + (k + 1 - rows["CRPIX1A"][0]) * rows["CDELT1A"][0]
    assert np.allclose(scan.velocity_m_s(0), v0)
    assert scan.header["DISHDIAM"] == 3.0 and scan.object == "G030.0+00.0"
    assert scan.position_deg[0] == pytest.approx(30.0, abs=1e-6)
    stack = stack_target([scan])
    assert stack.w_k_km_s == pytest.approx(l30["prod"]["LINEINT"], rel=0.01)
    assert np.isfinite(stack.nhi_err_cm2) and stack.n_rows == len(rows)
    assert _folder_state(folder) == before


def _rows_of(path: Path) -> tuple[dict, list]:
    """The header and the rows (as ScanWriter takes them) of a FITS scan."""
    with fits.open(path) as h:
        hdr = {k: v for k, v in h["SINGLE DISH"].header.items()
               if k not in ("EXTNAME", "NMATRIX") and not k.startswith(("TTYPE", "TFORM",
               "TUNIT", "TDIM", "NAXIS")) and k not in ("XTENSION", "BITPIX", "PCOUNT",
                                                       "GCOUNT", "TFIELDS", "HISTORY",
                                                       "COMMENT")}
        table = h["SINGLE DISH"].data
        rows = []
        for r in table:
            row = {}
            for name in table.columns.names:
                v = r[name]
                if isinstance(v, np.ndarray):
                    row[name] = v.astype(bool) if name == "FLAGGED" else v.astype(np.float32)
                elif isinstance(v, (str, np.str_)):
                    row[name] = str(v)
                elif isinstance(v, np.integer):
                    row[name] = int(v)
                else:
                    row[name] = float(v)
            rows.append(row)
    return hdr, rows


def test_a_journal_without_its_fits_is_read_and_left_alone(l30, tmp_path):
    """A journal left by a crash (written by the daemon's ScanWriter, copied as a crash
    leaves it): read with the recovery rules (torn tail dropped) and the folder unchanged:
    same files, sizes and mtimes. A journal held by a running writer is a scan in progress."""
    header, rows = _rows_of(l30["path"])
    live_dir = tmp_path / "live"
    live_dir.mkdir()
    writer = ScanWriter(live_dir, "scan-live", header, len(rows[0]["DATA"]))
    try:
        for row in rows:
            writer.append(row)
        (held,) = list(iter_scans([live_dir]))
        assert isinstance(held, Unusable) and "in progress" in held.reason
        crashed = tmp_path / "night"
        crashed.mkdir()
        jpath = crashed / "scan-crashed.journal"
        data = writer.journal_path.read_bytes()
        jpath.write_bytes(data[:-100])              # a torn last record, as a crash leaves it
    finally:
        writer.close()
    os.utime(jpath, ns=(1_700_000_000_000_000_000, 1_700_000_000_000_000_000))
    before = _folder_state(crashed)
    (scan,) = list(iter_scans([crashed]))
    assert isinstance(scan, ScanRows) and scan.from_journal
    assert scan.n_rows == len(rows) - 1
    assert any("torn" in n for n in scan.notes)
    assert np.array_equal(scan.data, l30["rows"]["DATA"][:-1])
    summary = summarise(jpath)
    assert isinstance(summary, ScanSummary) and summary.n_rows == len(rows) - 1
    assert _folder_state(crashed) == before
    # beside its FITS file a journal is not read a second time
    shutil.copy(l30["path"], crashed / "scan-crashed.fits")
    found = list(iter_scans([crashed]))
    assert [s.path.name for s in found] == ["scan-crashed.fits"]


def _copy(src: Path, dst: Path, **changes) -> Path:
    """A copy of a scan with header cards or columns changed (``COL__GLON=...``)."""
    shutil.copy(src, dst)
    with fits.open(dst, mode="update") as h:
        hdu = h["SINGLE DISH"]
        for key, value in changes.items():
            if key.startswith("COL__"):
                hdu.data[key[5:]][:] = value
            else:
                hdu.header[key] = value
    return dst


def test_unusable_files_say_why_in_one_line(l30, tmp_path):
    """Garbage named scan-x.fits, another program's file, a scan in counts, mixed rest
    frequencies, a FIFO: each an Unusable with one line; the usable scan still comes through."""
    src = l30["path"]
    _copy(src, tmp_path / "scan-a.fits")
    (tmp_path / "scan-x.fits").write_bytes(b"this is not FITS\n" * 50)
    _copy(src, tmp_path / "scan-b.fits", BUNIT="count")
    _copy(src, tmp_path / "scan-c.fits", ORIGIN="another program")
    _copy(src, tmp_path / "scan-d.fits", COL__RESTFREQ=HI_REST_FREQ_HZ + 1.0e6)
    os.mkfifo(tmp_path / "scan-e.fits")          # would hang a reader that opened it
    found = {x.path.name: x for x in iter_scans([tmp_path])}
    assert isinstance(found["scan-a.fits"], ScanRows)
    reasons = {name: x.reason for name, x in found.items() if isinstance(x, Unusable)}
    assert set(reasons) == {"scan-x.fits", "scan-b.fits", "scan-c.fits", "scan-d.fits",
                            "scan-e.fits"}
    for text in reasons.values():
        assert "\n" not in text and "Traceback" not in text and 0 < len(text) < 300
    assert "FITS" in reasons["scan-x.fits"]
    assert "'count'" in reasons["scan-b.fits"]
    assert "another program" in reasons["scan-c.fits"]
    assert "rest frequency" in reasons["scan-d.fits"] and "scan-a.fits" in reasons["scan-d.fits"]
    assert "FIFO" in reasons["scan-e.fits"]
    assert str(read_rows(tmp_path / "scan-x.fits")).startswith(str(tmp_path / "scan-x.fits"))


def test_grouping_by_target(l30, tmp_path):
    """Two scans of one target (0.5 deg apart, inside a quarter of the 4.8 deg beam of a 3 m
    dish: HPBW = 1.2 lambda / D) and one 2 deg away: two groups; OBJECT the most common."""
    src = l30["path"]
    _copy(src, tmp_path / "scan-1.fits")
    _copy(src, tmp_path / "scan-2.fits", COL__GLON=30.5, COL__OBJECT="G030.5+00.0")
    _copy(src, tmp_path / "scan-3.fits", COL__GLON=32.0, COL__OBJECT="G032.0+00.0")
    _copy(src, tmp_path / "scan-4.fits", COL__GLON=30.2)
    summaries = [s for s in iter_summaries([tmp_path]) if isinstance(s, ScanSummary)]
    tol = tolerance_for(summaries[0].header)
    assert tol == pytest.approx(0.25 * math.degrees(1.2 * C_M_S / HI_REST_FREQ_HZ / 3.0))
    assert tol == pytest.approx(0.25 * beamwidth_deg(3.0)) and 0.5 < tol < 2.0
    groups = group_by_target(summaries)
    assert [[s.name for s in g] for g in groups] == [["scan-1.fits", "scan-2.fits",
                                                      "scan-4.fits"], ["scan-3.fits"]]
    assert group_object(groups[0]) == "G030.0+00.0"
    rows = [s for s in iter_scans([tmp_path]) if isinstance(s, ScanRows)]
    assert [len(g) for g in group_by_target(rows)] == [3, 1]
    assert [len(g) for g in group_by_target(rows, tolerance_deg=0.1)] == [1, 1, 1, 1]
    stack = stack_target(group_by_target(rows)[0])
    assert stack.n_scans == 3 and stack.object == "G030.0+00.0"
    # no DISHDIAM (an older file): 1 deg
    assert tolerance_for({}) == 1.0


def test_line_free_channels_on_one_side_only_give_an_offset_not_a_slope():
    """A slope fitted on channels at one side of the line would be extrapolated across it
    (a folded spectrum's band edge): with line-free channels above the line only, the baseline
    is an offset (order 0), which it removes; with channels on both sides, order 1 stays."""
    rng = np.random.default_rng(7)
    n, nchan = 4, 1024
    shift = np.full(n, 230e3)                   # axis about -23..+483 km/s: line at the low end
    scan, values = gaussian_rows(n, nchan, 40.0, 0.0, 8.0, shift)
    noisy = synthetic_scan(values + 3.0 + noise_rows(rng, np.full(n, 70.0), np.full(n, 5.0),
                                                     nchan),
                           tsys_k=np.full(n, 70.0), exposure_s=np.full(n, 5.0), vframe_m_s=shift)
    stack, details = stack_target_details([noisy])
    assert stack.baseline_order == 0
    assert any("one side" in note for note in details.notes)
    free = details.line_free
    assert abs(np.nanmedian(stack.tb_k[free])) < 0.1          # the 3 K offset is gone
    both = stack_target([gaussian_rows(n, nchan, 40.0, 0.0, 8.0, np.zeros(n))[0]])
    assert both.baseline_order == 1
