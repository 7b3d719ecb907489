"""Derived products of a scan, written beside (never over) the calibrated rows.

At the end of a scan (and when a crashed scan is recovered) the rows are averaged on the LSRK
radio-velocity grid of the first row (:func:`spinflip.daemon.sky.spectral_axis.scan_average_lsrk`),
a polynomial baseline is fitted over the line-free channels (:mod:`spinflip.daemon.products.baseline`),
and the line is measured on the baseline-subtracted average:

- candidate line-free channels: outside the velocity range where HI toward the pointing can
  be (:func:`spinflip.daemon.sky.kinematics.expected_velocity_range_km_s`, over every row's l, b)
  and, for a folded spectrum, outside that range moved by +- the switching offset (the fold's
  negative ghosts, F = T(v) - [T(v + dv) + T(v - dv)]/2 with dv = c |offset| / nu0); the
  automatic mode then clips what still stands out; the windows mode takes the user's windows;
- too few line-free channels (fewer than 16 or 2 (order + 1)): no baseline, said in BLMODE;
- the line window is the expected velocity range; flagged gaps of up to 8 channels inside it
  are filled by linear interpolation (:func:`fill_short_gaps`), longer ones left out;
- integrated intensity W = sum_i T_i |dv_i| over that window, K km/s
  (:func:`spinflip.daemon.products.line_integral.integrated_intensity_k_km_s`);
- column density N(HI) = 1.823e18 W cm^-2, optically thin (Dickey & Lockman 1990).

They go into a BINTABLE ``SCAN AVERAGE`` with one row per channel (VRAD, DATA, BASELINE,
BASELINED, LINEFREE, FLAGGED) whose header carries the fit and the line figures; the
``SINGLE DISH`` table is untouched. Spectra in counts (total power) get no product.

References
----------
Dickey, J. M. & Lockman, F. J. 1990, ARA&A 28, 215 (N(HI) from the integrated intensity).
"""

from __future__ import annotations

import numpy as np

from spinflip.daemon.products.baseline import fit_baseline
from spinflip.daemon.products.line_integral import column_density_cm2, integrated_intensity_k_km_s
from spinflip.daemon.sky.hi_line import C_M_S
from spinflip.daemon.sky.kinematics import expected_velocity_range_km_s
from spinflip.daemon.sky.spectral_axis import scan_average_lsrk

EXTNAME = "SCAN AVERAGE"
_LONGEST_GAP = 8          # channels: longer flagged runs inside the line are not filled


def expected_emission(v_km_s: np.ndarray, glon_deg: np.ndarray, glat_deg: np.ndarray,
                      ghost_shift_km_s: float = 0.0) -> tuple[np.ndarray, np.ndarray]:
    """(line, ghosts): bool masks of where HI (and, if shifted, its fold ghosts) can be."""
    line = np.zeros(v_km_s.size, dtype=bool)
    ghosts = np.zeros(v_km_s.size, dtype=bool)
    # GLON and GLAT are columns of one table: one of each per row
    pairs = sorted({(round(float(l), 1), round(float(b), 1))
                    for l, b in zip(glon_deg, glat_deg, strict=True)})
    for l, b in pairs[:: max(1, len(pairs) // 20)]:
        lo, hi = expected_velocity_range_km_s(l, b)
        line |= (v_km_s >= lo) & (v_km_s <= hi)
        if ghost_shift_km_s:
            for sh in (ghost_shift_km_s, -ghost_shift_km_s):
                ghosts |= (v_km_s >= lo + sh) & (v_km_s <= hi + sh)
    return line, ghosts


def analyse(data: np.ndarray, flagged: np.ndarray, crval1: np.ndarray, cdelt1: np.ndarray,
            crpix1: np.ndarray, restfreq: np.ndarray, vframe_m_s: np.ndarray,
            glon_deg: np.ndarray, glat_deg: np.ndarray, baseline_cfg: dict,
            ghost_shift_km_s: float = 0.0) -> dict:
    """Scan average, baseline and line figures of a scan's rows (arrays as in the FITS table).

    Returns
    -------
    dict with ``v_m_s``, ``mean_k``, ``good``, ``window`` (bool, the line window),
    ``baselined_k`` (the average minus the baseline, or the average itself when no baseline
    could be fitted), ``integral`` (:class:`LineIntegral` over the window), ``nhi_cm2``,
    ``blmode`` (what was done) and ``fit`` (:class:`BaselineFit` or None).
    """
    v, mean = scan_average_lsrk(data, flagged, crval1, cdelt1, crpix1, restfreq, vframe_m_s)
    good = np.isfinite(mean)
    vk = v / 1e3
    line, ghosts = expected_emission(vk, glon_deg, glat_deg, ghost_shift_km_s)
    order = baseline_cfg["order"]
    fit, blmode = None, baseline_cfg["mode"]
    if blmode == "windows":
        fit = fit_baseline(np.where(good, mean, 0.0), ~good, vk, order,
                           windows=baseline_cfg["windows_km_s"])
    elif blmode == "auto":
        candidates = good & ~line & ~ghosts
        if candidates.sum() >= max(16, 2 * (order + 1)):
            fit = fit_baseline(np.where(good, mean, 0.0), ~candidates, vk, order)
        else:
            blmode = "none"
    resid = fit.subtract(np.where(good, mean, np.nan)) if fit is not None else mean.copy()
    filled, n_filled = fill_short_gaps(resid, line)
    win = line & np.isfinite(filled)
    integral = integrated_intensity_k_km_s(np.where(win, filled, 0.0), vk, good=win)
    return {"v_m_s": v, "mean_k": mean, "good": good, "fit": fit, "blmode": blmode,
            "baselined_k": resid, "window": win, "integral": integral, "filled": n_filled,
            "nhi_cm2": float(column_density_cm2(integral.integral_k_km_s))}


def fill_short_gaps(y: np.ndarray, where: np.ndarray,
                    longest: int = _LONGEST_GAP) -> tuple[np.ndarray, int]:
    """Linear interpolation across runs of at most ``longest`` NaN channels inside ``where``.

    A carrier flagged in every row leaves a gap of a few channels in the line; left out, it
    would take its share of the line with it (a 3-channel gap on a 60 K line at 0.5 km/s per
    channel is ~90 K km/s). Interpolating over it is common practice; longer gaps stay gaps.

    Returns the filled copy and the number of channels filled.
    """
    out = np.array(y, dtype=np.float64)
    bad = ~np.isfinite(out)
    ok = np.flatnonzero(~bad)
    if ok.size < 2:
        return out, 0
    filled = 0
    k = 0
    n = out.size
    while k < n:
        if bad[k]:
            j = k
            while j < n and bad[j]:
                j += 1
            if k > 0 and j < n and j - k <= longest and where[k:j].all():
                out[k:j] = np.interp(np.arange(k, j), [k - 1, j], [out[k - 1], out[j]])
                filled += j - k
            k = j
        else:
            k += 1
    return out, filled


def scan_products(header: dict, nchan: int, rows: list, baseline_cfg: dict) -> list:
    """HDUs of derived products for :func:`spinflip.daemon.storage.archive.ScanWriter` (``products``)."""
    from astropy.io import fits

    if header.get("BUNIT", "K") != "K" or baseline_cfg["mode"] == "off":
        return []
    col = {k: np.array([r[k] for r in rows], dtype=np.float64)
           for k in ("CRVAL1", "CDELT1", "CRPIX1", "RESTFREQ", "VFRAME", "GLON", "GLAT")}
    data = np.stack([r["DATA"] for r in rows]).astype(np.float64)
    flagged = np.stack([r["FLAGGED"] for r in rows]).astype(bool)
    folded = any(int(r.get("FOLDED", 0)) for r in rows)
    shift = C_M_S * abs(float(header.get("SWOFFSET", 0.0))) / col["RESTFREQ"][0] / 1e3
    a = analyse(data, flagged, col["CRVAL1"], col["CDELT1"], col["CRPIX1"], col["RESTFREQ"],
                col["VFRAME"], col["GLON"], col["GLAT"], baseline_cfg,
                ghost_shift_km_s=shift if folded else 0.0)
    fit = a["fit"]
    nchan_out = a["v_m_s"].size
    cols = [
        fits.Column(name="VRAD", format="D", unit="m/s", array=a["v_m_s"]),
        fits.Column(name="DATA", format="E", unit="K", array=a["mean_k"].astype(np.float32)),
        fits.Column(name="BASELINE", format="E", unit="K", array=(
            fit.model(a["v_m_s"] / 1e3) if fit is not None else np.zeros(nchan_out)
        ).astype(np.float32)),
        fits.Column(name="BASELINED", format="E", unit="K",
                    array=a["baselined_k"].astype(np.float32)),
        fits.Column(name="LINEFREE", format="L",
                    array=fit.line_free if fit is not None else np.zeros(nchan_out, bool)),
        fits.Column(name="LINEWIN", format="L", array=a["window"]),
        fits.Column(name="FLAGGED", format="L", array=~a["good"]),
    ]
    hdu = fits.BinTableHDU.from_columns(cols)
    h = hdu.header
    h["EXTNAME"] = (EXTNAME, "scan average on the LSRK grid of the first row")
    h["SPECSYS"] = ("LSRK", "frame of VRAD")
    h["VELDEF"] = ("RADI-LSR", "radio convention")
    h["BLMODE"] = (a["blmode"], "baseline: auto, windows or none")
    if a["blmode"] == "none":
        h["COMMENT"] = "No baseline: no line-free channels (widen switching.offset_hz)."
    if fit is not None:
        h["BLORDER"] = (fit.order, "polynomial order of the baseline")
        h["BLRMS"] = (float(fit.rms_k), "[K] rms of the line-free residual")
    win_v = a["v_m_s"][a["window"]] / 1e3
    if win_v.size and np.isfinite(a["integral"].integral_k_km_s):
        h["LINEVLO"] = (float(win_v.min()), "[km/s] line window, lowest LSRK velocity")
        h["LINEVHI"] = (float(win_v.max()), "[km/s] line window, highest LSRK velocity")
        h["LINEINT"] = (float(a["integral"].integral_k_km_s), "[K km/s] integral of T dv")
        h["NHI"] = (float(a["nhi_cm2"]), "[cm-2] 1.823e18 LINEINT, optically thin")
        h["LINEFILL"] = (int(a["filled"]), "flagged channels interpolated in the window")
    h["COMMENT"] = "Derived product; the calibrated rows are in SINGLE DISH, unchanged."
    return [hdu]
