"""Summary of a saved scan (``spinflip inspect FILE``): time, pointing, Tsys, and the line.

The line is found in the scan average on the LSRK radio-velocity axis
(:mod:`spinflip.daemon.sky.spectral_axis`); the calibration provenance comes from the header.

References
----------
Garwood, R. W. 2000, ASP Conf. Ser. 216, 243 (single-dish FITS convention).
"""

from __future__ import annotations

import math
import warnings
from pathlib import Path

import numpy as np

from spinflip.daemon.products.scan_average import EXTNAME as PRODUCT_EXTNAME
from spinflip.daemon.sky.hi_line import C_M_S
from spinflip.daemon.sky.spectral_axis import (  # noqa: F401 (re-exported)
    frequency_axis_hz,
    scan_average_lsrk,
    velocity_axis_lsrk_m_s,
)
from spinflip.daemon.storage.columns import (
    EXTNAME,
    REQUIRED_ROW_KEYS,
    RFI_EXTNAME,
    TSYS_EXTNAME,
)


def _circular_mean_deg(angles_deg: np.ndarray) -> float:
    """Mean direction of angles (so 359 deg and 1 deg average to 0 deg, not 180 deg)."""
    a = np.radians(np.asarray(angles_deg, dtype=np.float64))
    mean = float(np.degrees(math.atan2(np.mean(np.sin(a)), np.mean(np.cos(a)))) % 360.0)
    return 0.0 if mean > 360.0 - 1e-9 else mean  # -1e-14 % 360 would read as 360.00


def _first_line(exc: Exception) -> str:
    text = str(exc).strip().splitlines()
    return text[0] if text else type(exc).__name__


def _load(path: Path) -> tuple[dict, dict[str, np.ndarray], str]:
    """(header, column dict, DATA unit) of a spinflip scan, or ValueError naming the file."""
    from astropy.io import fits
    from astropy.utils.exceptions import AstropyWarning

    if not path.exists():
        raise ValueError(f"{path}: no such file")
    if path.is_dir():
        raise ValueError(f"{path}: is a folder, not a FITS file")
    try:
        with warnings.catch_warnings():
            warnings.simplefilter("ignore", AstropyWarning)
            with fits.open(path, memmap=False) as hdul:
                if EXTNAME not in hdul:
                    raise ValueError(f"{path}: not a spinflip scan (no '{EXTNAME}' table)")
                hdu = hdul[EXTNAME]
                if not isinstance(hdu, fits.BinTableHDU):
                    raise ValueError(f"{path}: not a spinflip scan ('{EXTNAME}' is not a table)")
                names = set(hdu.columns.names)
                missing = [k for k in REQUIRED_ROW_KEYS if k not in names]
                if missing:
                    raise ValueError(f"{path}: not a spinflip scan (no column "
                                     f"{', '.join(missing)})")
                header = dict(hdu.header)
                unit = hdu.columns["DATA"].unit or ""
                cols = {k: np.array(hdu.data[k]) for k in REQUIRED_ROW_KEYS}
                # columns (arrays), RFI kinds (list of str), product header (dict)
                extras: dict[str, object] = {k: np.array(hdu.data[k]) for k in
                          ("FLAGTIME", "SKFRAC", "NIMPULSE", "NCARRIER", "RFIFRAC", "UNCOVFR")
                          if k in names}
                if RFI_EXTNAME in hdul:
                    extras["rfi_kinds"] = [str(k).strip() for k in hdul[RFI_EXTNAME].data["KIND"]]
                if TSYS_EXTNAME in hdul:
                    extras["tsys_history"] = np.array(hdul[TSYS_EXTNAME].data["TSYS"])
                if PRODUCT_EXTNAME in hdul:
                    extras["product"] = dict(hdul[PRODUCT_EXTNAME].header)
                header["_extras"] = extras
    except ValueError as exc:
        if str(exc).startswith(str(path)):
            raise
        raise ValueError(f"{path}: unreadable FITS table ({_first_line(exc)})") from None
    except (OSError, TypeError, KeyError, IndexError) as exc:
        raise ValueError(f"{path}: not a FITS file ({_first_line(exc)})") from None
    return header, cols, unit


def summarize(path: Path) -> dict:
    """Summary of one saved scan, as plain JSON-ready values with units in the key names.

    Keys: ``file``, ``origin``, ``telescope``, ``rows``, ``nchan``, ``objects``, ``object``,
    ``date_obs_first``, ``date_obs_last`` (UTC, mid-integration), ``duration_s`` (between the
    first and last mid-integration times), ``exposure_s`` (sum of EXPOSURE), ``glon_deg``,
    ``glat_deg``, ``azimuth_deg``, ``elevation_deg`` (means; circular means for the longitudes),
    ``tsys_mean_k``, ``tsys_min_k``, ``tsys_max_k`` (None where no row carries a Tsys),
    ``data_unit``, ``channel_width_hz``, ``channel_width_km_s``, ``restfreq_hz``, ``specsys``,
    ``line_peak`` (maximum of the scan average, in ``data_unit``), ``line_velocity_lsrk_km_s``
    (LSRK radio velocity of that channel), ``flagged_fraction`` (of all channel-rows, FLAGGED:
    for any reason), ``interference_flagged_fraction`` (mean of RFIFRAC: flagged for
    interference) and ``uncovered_fraction`` (mean of UNCOVFR: without a fold partner, flagged
    but no interference); these two are None for files written before those columns.

    Raises
    ------
    ValueError
        The file is missing, not FITS, or not a scan in the layout of
        :mod:`spinflip.daemon.storage.archive` (one line naming the file and the problem).
    """
    from astropy.time import Time

    path = Path(path)
    header, c, unit = _load(path)
    nrow = len(c["TSYS"])
    if nrow == 0:
        raise ValueError(f"{path}: the scan holds no integrations")
    data = np.asarray(c["DATA"], dtype=np.float64).reshape(nrow, -1)
    flagged = np.asarray(c["FLAGGED"], dtype=bool).reshape(nrow, -1)
    nchan = data.shape[1]
    f64 = {k: np.asarray(c[k], dtype=np.float64) for k in
           ("TSYS", "EXPOSURE", "CRVAL1", "CDELT1", "CRPIX1", "RESTFREQ", "VFRAME", "GLON",
            "GLAT", "AZIMUTH", "ELEVATIO")}
    dates = [str(d).strip() for d in c["DATE-OBS"]]
    try:
        times = Time(dates, format="isot", scale="utc")
    except ValueError as exc:
        raise ValueError(f"{path}: DATE-OBS is not an ISO time ({_first_line(exc)})") from None
    first, last = times.argmin(), times.argmax()

    v_grid, mean = scan_average_lsrk(data, flagged, f64["CRVAL1"], f64["CDELT1"],
                                     f64["CRPIX1"], f64["RESTFREQ"], f64["VFRAME"])
    if np.all(np.isnan(mean)):
        peak, v_peak = None, None
    else:
        ipk = int(np.nanargmax(mean))
        peak, v_peak = float(mean[ipk]), float(v_grid[ipk] / 1e3)

    tsys = f64["TSYS"][np.isfinite(f64["TSYS"]) & (f64["TSYS"] > 0)]
    extras = header.pop("_extras", {})
    product = extras.get("product", {})
    history = extras.get("tsys_history", np.zeros(0))
    v_axis = velocity_axis_lsrk_m_s(f64["CRVAL1"][0], f64["CDELT1"][0], f64["CRPIX1"][0],
                                    f64["RESTFREQ"][0], f64["VFRAME"][0], nchan) / 1e3
    objects = list(dict.fromkeys(str(o).strip() for o in c["OBJECT"]))
    cdelt = float(f64["CDELT1"][0])
    return {
        "file": str(path),
        "origin": str(header.get("ORIGIN", "")),
        "telescope": str(header.get("TELESCOP", "")),
        "rows": int(nrow),
        "nchan": int(nchan),
        "object": objects[0],
        "objects": objects,
        "date_obs_first": dates[first],
        "date_obs_last": dates[last],
        "duration_s": float((times[last] - times[first]).sec),
        "exposure_s": float(np.sum(f64["EXPOSURE"])),
        "glon_deg": _circular_mean_deg(f64["GLON"]),
        "glat_deg": float(np.mean(f64["GLAT"])),
        "azimuth_deg": _circular_mean_deg(f64["AZIMUTH"]),
        "elevation_deg": float(np.mean(f64["ELEVATIO"])),
        "tsys_mean_k": float(np.mean(tsys)) if tsys.size else None,
        "tsys_min_k": float(np.min(tsys)) if tsys.size else None,
        "tsys_max_k": float(np.max(tsys)) if tsys.size else None,
        "data_unit": unit,
        "channel_width_hz": abs(cdelt),
        # radio convention: dv = c |df| / RESTFREQ
        "channel_width_km_s": float(C_M_S * abs(cdelt) / f64["RESTFREQ"][0] / 1e3),
        "restfreq_hz": float(f64["RESTFREQ"][0]),
        "specsys": str(header.get("SPECSYS", "")),
        "line_peak": peak,
        "line_velocity_lsrk_km_s": v_peak,
        "flagged_fraction": float(np.mean(flagged)),
        "velocity_axis_lsrk_km_s": [float(v_axis.min()), float(v_axis.max())],
        "vframe_km_s": [float(f64["VFRAME"].min() / 1e3), float(f64["VFRAME"].max() / 1e3)],
        "tsys_source": str(header.get("TSYSSRC", "")),
        "tsys_measurements": int(history.size),
        "tsys_measured_mean_k": (float(np.nanmean(history)) if np.isfinite(history).any()
                                 else None),
        "calibration_record": str(header.get("CALFILE", "")) or None,
        "temperature_scale": str(header.get("TEMPSCAL", "")),
        "beam_efficiency": float(header.get("BEAMEFF", 1.0)),
        "baseline": str(product.get("BLMODE", "")) or None,
        "baseline_rms_k": float(product["BLRMS"]) if "BLRMS" in product else None,
        "line_window_km_s": ([float(product["LINEVLO"]), float(product["LINEVHI"])]
                             if "LINEVLO" in product else None),
        "line_integral_k_km_s": float(product["LINEINT"]) if "LINEINT" in product else None,
        "nhi_cm2": float(product["NHI"]) if "NHI" in product else None,
        "blanked_time_fraction": (float(np.mean(extras["FLAGTIME"]))
                                  if "FLAGTIME" in extras else None),
        "sk_removed_fraction": float(np.mean(extras["SKFRAC"])) if "SKFRAC" in extras else None,
        "impulses": int(np.sum(extras["NIMPULSE"])) if "NIMPULSE" in extras else None,
        "carrier_onsets": int(sum(k == "carrier-on" for k in extras.get("rfi_kinds", []))),
        "interference_flagged_fraction": (float(np.mean(extras["RFIFRAC"]))
                                          if "RFIFRAC" in extras else None),
        "uncovered_fraction": float(np.mean(extras["UNCOVFR"])) if "UNCOVFR" in extras else None,
    }


def format_summary(d: dict) -> str:
    """Human-readable text of :func:`summarize`'s dict, a unit on every number."""
    unit = d["data_unit"] or "(no unit)"
    if d["tsys_mean_k"] is None:
        tsys = "n/a (no row carries a system temperature)"
    else:
        tsys = (f"mean {d['tsys_mean_k']:.1f} K (min {d['tsys_min_k']:.1f} K, "
                f"max {d['tsys_max_k']:.1f} K)")
    if d["line_peak"] is None:
        line = "n/a (every channel flagged)"
    else:
        line = (f"peak {d['line_peak']:.4g} {unit} at v_LSRK = "
                f"{d['line_velocity_lsrk_km_s']:+.2f} km/s (radio convention)")
    objects = ", ".join(d["objects"])
    flagged = f"{100 * d['flagged_fraction']:.1f} % of channels flagged"
    if d.get("uncovered_fraction") is not None:
        flagged += f" ({100 * d['uncovered_fraction']:.1f} % not covered by the fold)"
    lines = [
        f"file      {d['file']}  (written by {d['origin'] or 'unknown'}; "
        f"telescope {d['telescope'] or 'unnamed'})",
        f"rows      {d['rows']} integrations, {d['exposure_s']:.1f} s total exposure",
        f"time      {d['date_obs_first']} .. {d['date_obs_last']} UTC (mid-integration), "
        f"span {d['duration_s']:.1f} s",
        f"pointing  {objects}: l = {d['glon_deg']:.2f} deg, b = {d['glat_deg']:+.2f} deg; "
        f"az = {d['azimuth_deg']:.1f} deg, el = {d['elevation_deg']:.1f} deg (means)",
        f"Tsys      {tsys}",
        f"spectrum  {d['nchan']} channels of {d['channel_width_hz'] / 1e3:.3f} kHz "
        f"({d['channel_width_km_s']:.3f} km/s), rest frequency {d['restfreq_hz'] / 1e6:.6f} MHz, "
        f"DATA in {unit}, axis {d['specsys'] or '?'}; {flagged}",
        f"line      {line}",
        f"velocity  LSRK radio velocity {d['velocity_axis_lsrk_km_s'][0]:+.1f} .. "
        f"{d['velocity_axis_lsrk_km_s'][1]:+.1f} km/s; VFRAME {d['vframe_km_s'][0]:+.3f} .. "
        f"{d['vframe_km_s'][1]:+.3f} km/s",
        f"calib     Tsys from {d['tsys_source'] or 'unknown'}; {d['tsys_measurements']} "
        f"noise-source measurements"
        + (f" (mean {d['tsys_measured_mean_k']:.2f} K)" if d["tsys_measured_mean_k"] else "")
        + (f"; record {d['calibration_record']}" if d["calibration_record"] else "")
        + (f"; scale {d['temperature_scale']}, eta_mb {d['beam_efficiency']:g}"
           if d["temperature_scale"] else ""),
    ]
    if d["blanked_time_fraction"] is not None:
        lines.append(f"rfi       {d['impulses']} impulses ({100 * d['blanked_time_fraction']:.2f} % "
                     f"of spectra blanked), {100 * d['sk_removed_fraction']:.2f} % of channel-blocks "
                     f"removed by spectral kurtosis, {d['carrier_onsets']} carrier onsets; "
                     + (f"{100 * d['interference_flagged_fraction']:.2f} % of channels flagged "
                        "for interference"
                        if d.get("interference_flagged_fraction") is not None else flagged))
    if d["line_integral_k_km_s"] is not None:
        rms = (f", rms {d['baseline_rms_k']:.3f} K" if d["baseline_rms_k"] is not None else "")
        lines.append(f"integral  {d['line_integral_k_km_s']:.1f} K km/s over "
                     f"{d['line_window_km_s'][0]:+.1f} .. {d['line_window_km_s'][1]:+.1f} km/s "
                     f"(LSRK); N(HI) = {d['nhi_cm2']:.3e} cm^-2 if optically thin; baseline "
                     f"{d['baseline']}{rms}"
                     + (" (no line-free channels: widen switching.offset_hz)"
                        if d["baseline"] == "none" else ""))
    return "\n".join(lines)
