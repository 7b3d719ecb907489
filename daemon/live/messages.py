"""What the daemon publishes live: spectra (each row and the running scan average), status,
progress and events, as messages of :mod:`spinflip.daemon.live.schema`.

The running average follows :func:`spinflip.daemon.sky.spectral_axis.scan_average_lsrk`: every row
is interpolated onto the LSRK radio-velocity grid of the scan's first row, flagged channels with
zero weight, so the line builds up in place while the Earth's motion shifts the topocentric
axis.
"""

from __future__ import annotations

import datetime as _dt

import numpy as np

from spinflip.daemon.sky.spectral_axis import frequency_axis_hz, velocity_axis_lsrk_m_s


def row_axes(row: dict, nchan: int) -> tuple[np.ndarray, np.ndarray]:
    """(topocentric sky frequency in Hz, LSRK radio velocity in km/s) of a row's channels."""
    f = frequency_axis_hz(row["CRVAL1"], row["CDELT1"], row["CRPIX1"], nchan)
    v = velocity_axis_lsrk_m_s(row["CRVAL1"], row["CDELT1"], row["CRPIX1"], row["RESTFREQ"],
                               row["VFRAME"], nchan) / 1e3
    return f, v


class RunningAverage:
    """Equal-weight average of a scan's rows on the LSRK grid of its first row."""

    def __init__(self):
        self.reset()

    def reset(self) -> None:
        self.rows = 0
        self.first = None
        self._num = self._den = self._exp = None

    def add(self, row: dict, nchan: int) -> None:
        f, v = row_axes(row, nchan)
        data = np.asarray(row["DATA"], dtype=np.float64)
        good = ~np.asarray(row["FLAGGED"], dtype=bool) & np.isfinite(data)
        exposure = np.asarray(row.get("CHANEXP", np.full(nchan, row["EXPOSURE"])), np.float64)
        if self.first is None:
            self.first = dict(row)
            self.v_km_s, self.f_hz = v, f
            self._num, self._den, self._exp = np.zeros(nchan), np.zeros(nchan), np.zeros(nchan)
        order = np.argsort(v)
        self._num += np.interp(self.v_km_s, v[order], np.where(good, data, 0.0)[order], 0.0, 0.0)
        self._den += np.interp(self.v_km_s, v[order], good[order].astype(float), 0.0, 0.0)
        self._exp += np.interp(self.v_km_s, v[order], np.where(good, exposure, 0.0)[order],
                               0.0, 0.0)
        self.rows += 1

    def spectrum(self):
        """(data, flagged, exposure per channel) of the average so far."""
        with np.errstate(invalid="ignore", divide="ignore"):
            mean = np.where(self._den > 1e-9, self._num / self._den, np.nan)
        return mean, ~np.isfinite(mean), self._exp


def spectrum_message(row: dict, nchan: int, kind: str, scan: str, index: int, unit: str,
                     average: RunningAverage | None = None):
    """(topic, header, arrays) of a row (``kind = "integration"``) or of the running average."""
    if kind == "average":
        data, flagged, exposure = average.spectrum()
        f, v, ref = average.f_hz, average.v_km_s, average.first
        exposure_s = float(np.nanmax(exposure)) if exposure.size else 0.0
    else:
        f, v = row_axes(row, nchan)
        data, flagged, ref = np.asarray(row["DATA"]), np.asarray(row["FLAGGED"]), row
        exposure = np.asarray(row.get("CHANEXP", np.full(nchan, row["EXPOSURE"])))
        exposure_s = float(row["EXPOSURE"])
    tsys = float(row["TSYS"])
    header = {
        "kind": kind, "scan": scan, "row": int(index), "exposure_s": exposure_s,
        "tsys_k": tsys if np.isfinite(tsys) else None, "unit": unit,
        "restfreq_hz": float(ref["RESTFREQ"]), "vframe_m_s": float(ref["VFRAME"]),
        "glon_deg": float(row["GLON"]), "glat_deg": float(row["GLAT"]),
        "azimuth_deg": float(row["AZIMUTH"]), "elevation_deg": float(row["ELEVATIO"]),
        "ra_deg": float(row["RA"]), "dec_deg": float(row["DEC"]), "object": str(row["OBJECT"]),
        "folded": bool(row.get("FOLDED", 0)),
        "flagged_fraction": float(np.mean(flagged)),
        "blanked_fraction": float(row.get("FLAGTIME", 0.0)),
        "nimpulse": int(row.get("NIMPULSE", 0)), "ncarrier": int(row.get("NCARRIER", 0)),
        "time_utc": _iso_z(str(row["DATE-OBS"])),
        "station": "",
    }
    arrays = {
        "freq_hz": (np.asarray(f, dtype="<f8"), "Hz"),
        "v_lsrk_km_s": (np.asarray(v, dtype="<f8"), "km/s"),
        "data": (np.asarray(data, dtype="<f4"), unit),
        "flagged": (np.asarray(flagged, dtype=bool).astype("|u1"), ""),
        "exposure_s": (np.asarray(exposure, dtype="<f4"), "s"),
    }
    return "spectrum", header, arrays


def _iso_z(date_obs: str) -> str:
    """DATE-OBS (UTC, no zone) as the wire's ``YYYY-MM-DDTHH:MM:SS.ffffffZ``."""
    return _dt.datetime.fromisoformat(date_obs).strftime("%Y-%m-%dT%H:%M:%S.%fZ")
