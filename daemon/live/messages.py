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

from spinflip.daemon.products.row import Row
from spinflip.daemon.sky.spectral_axis import frequency_axis_hz, velocity_axis_lsrk_m_s


def row_axes(row: Row, nchan: int) -> tuple[np.ndarray, np.ndarray]:
    """(topocentric sky frequency in Hz, LSRK radio velocity in km/s) of a row's channels."""
    f = frequency_axis_hz(row.lo_hz, row.channel_hz, row.crpix, nchan)
    v = velocity_axis_lsrk_m_s(row.lo_hz, row.channel_hz, row.crpix, row.restfreq_hz,
                               row.vframe_m_s, nchan) / 1e3
    return f, v


def _exposure(row: Row, nchan: int) -> np.ndarray:
    """Per-channel exposure of a row (its EXPOSURE everywhere when it has none per channel)."""
    if row.chan_exposure_s is not None:
        return np.asarray(row.chan_exposure_s)
    return np.full(nchan, row.exposure_s)


class RunningAverage:
    """Equal-weight average of a scan's rows on the LSRK grid of its first row."""

    def __init__(self) -> None:
        self.reset()

    def reset(self) -> None:
        self.rows = 0
        self.first: Row | None = None
        self._num: np.ndarray | None = None     # the three sums: set by the first row
        self._den: np.ndarray | None = None
        self._exp: np.ndarray | None = None

    def add(self, row: Row, nchan: int) -> None:
        f, v = row_axes(row, nchan)
        data = np.asarray(row.data, dtype=np.float64)
        good = ~np.asarray(row.flagged, dtype=bool) & np.isfinite(data)
        exposure = np.asarray(_exposure(row, nchan), np.float64)
        if self.first is None:
            self.first = row
            self.v_km_s, self.f_hz = v, f
            self._num, self._den, self._exp = np.zeros(nchan), np.zeros(nchan), np.zeros(nchan)
        assert self._num is not None and self._den is not None and self._exp is not None
        order = np.argsort(v)
        self._num += np.interp(self.v_km_s, v[order], np.where(good, data, 0.0)[order], 0.0, 0.0)
        self._den += np.interp(self.v_km_s, v[order], good[order].astype(float), 0.0, 0.0)
        self._exp += np.interp(self.v_km_s, v[order], np.where(good, exposure, 0.0)[order],
                               0.0, 0.0)
        self.rows += 1

    def spectrum(self) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
        """(data, flagged, exposure per channel) of the average so far (at least one row)."""
        assert self._num is not None and self._den is not None and self._exp is not None, \
            "the average of no row"
        with np.errstate(invalid="ignore", divide="ignore"):
            mean = np.where(self._den > 1e-9, self._num / self._den, np.nan)
        return mean, ~np.isfinite(mean), self._exp


def spectrum_message(
        row: Row, nchan: int, kind: str, scan: str, index: int, unit: str,
        average: RunningAverage | None = None,
) -> tuple[str, dict, dict[str, tuple[np.ndarray, str]]]:
    """(topic, header, arrays) of a row (``kind = "integration"``) or of the running average."""
    if kind == "average":
        assert average is not None and average.first is not None, "an average has a first row"
        data, flagged, exposure = average.spectrum()
        f, v, ref = average.f_hz, average.v_km_s, average.first
        exposure_s = float(np.nanmax(exposure)) if exposure.size else 0.0
    else:
        f, v = row_axes(row, nchan)
        data, flagged, ref = np.asarray(row.data), np.asarray(row.flagged), row
        exposure = _exposure(row, nchan)
        exposure_s = float(row.exposure_s)
    tsys = float(row.tsys_k)
    pos = row.position
    header = {
        "kind": kind, "scan": scan, "row": int(index), "exposure_s": exposure_s,
        "tsys_k": tsys if np.isfinite(tsys) else None, "unit": unit,
        "restfreq_hz": float(ref.restfreq_hz), "vframe_m_s": float(ref.vframe_m_s),
        "glon_deg": float(pos.glon_deg), "glat_deg": float(pos.glat_deg),
        "azimuth_deg": float(pos.az_deg), "elevation_deg": float(pos.el_deg),
        "ra_deg": float(pos.ra_deg), "dec_deg": float(pos.dec_deg), "object": str(row.object),
        "folded": bool(row.folded),
        "flagged_fraction": float(np.mean(flagged)),
        "blanked_fraction": float(row.flag_time_fraction),
        "nimpulse": int(row.n_impulse), "ncarrier": int(row.n_carrier),
        "pointing_error_deg": (float(row.pointing_error_deg)
                               if np.isfinite(row.pointing_error_deg) else None),
        "time_utc": _iso_z(str(row.date_obs)),
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
