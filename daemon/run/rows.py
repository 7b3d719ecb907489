"""One finished integration made into a :class:`~spinflip.daemon.products.row.Row`, and the FITS
header of a scan: the calibrator (:func:`spinflip.daemon.calibration.kelvin.calibrate`) with the
interference decisions (:class:`spinflip.daemon.rfi.interference.Interference`), the system
temperature (:class:`spinflip.daemon.calibration.tsys_plan.TsysTracker`) and the sky position.

A row is never silently on a wrong scale: with no trustworthy T_sys, or with the pointing below
``pointing.min_elevation``, it is kept with every channel flagged, and an error event says why
(once).
"""

from __future__ import annotations

import dataclasses
from collections.abc import Callable

import numpy as np
from astropy.coordinates import EarthLocation
from astropy.time import Time

from spinflip.daemon.calibration.kelvin import calibrate, fold_spoiled
from spinflip.daemon.calibration.tsys_plan import TsysPlan, TsysTracker
from spinflip.daemon.dsp.channel_grid import ChannelGrid
from spinflip.daemon.dsp.spectrometer import Integration
from spinflip.daemon.dsp.switching import Schedule
from spinflip.daemon.mount.base import AzEl, separation_deg
from spinflip.daemon.products.row import Row
from spinflip.daemon.rfi.interference import Interference, RfiRecord
from spinflip.daemon.rfi.masks import dc_channels
from spinflip.daemon.sky import coordinates
from spinflip.daemon.sky.hi_line import HI_REST_FREQ_HZ
from spinflip.daemon.sky.kinematics import expected_velocity_range_km_s
from spinflip.daemon.sky.pointing import Pointing
from spinflip.daemon.sky.spectral_axis import velocity_wcs_m_s


def emission_mask(grid: ChannelGrid, lo_hz: float, pointing: Pointing, location: EarthLocation,
                  t_unix_s: float) -> np.ndarray:
    """bool[nchan]: channels of a spectrum at ``lo_hz`` where HI toward ``pointing`` may appear
    (:func:`spinflip.daemon.sky.kinematics.expected_velocity_range_km_s`, LSRK)."""
    t = Time(t_unix_s, format="unix", scale="utc")
    coord = pointing(t)
    pos = coordinates.sky_position(coord, location, t)
    vframe = float(coordinates.vframe_lsrk_m_s(coord, location, t))   # one time: a float
    v_lo, v_hi = expected_velocity_range_km_s(pos.glon_deg, pos.glat_deg)
    v = grid.radio_velocity_km_s(lo_hz, vframe)
    return (v >= v_lo) & (v <= v_hi)


class RowMaker:
    """Makes the rows of a run.

    Parameters
    ----------
    cfg : the configuration
    grid : the channel grid
    schedule : the source's switching schedule
    location : the site (astropy EarthLocation)
    tsys : where each row's T_sys comes from
    interference : the interference decisions
    warn_once : callable(key, severity, text): an event said once per key
    """

    def __init__(self, cfg: dict, grid: ChannelGrid, schedule: Schedule,
                 location: EarthLocation, tsys: TsysTracker, interference: Interference,
                 warn_once: Callable[[str, str, str], None]):
        self.cfg = cfg
        self.grid = grid
        self.schedule = schedule
        self.location = location
        self.tsys = tsys
        self.interference = interference
        self.warn_once = warn_once

    def make(self, integ: Integration, pointing: Pointing,
             reached: Callable[[float], AzEl | None] | None = None
             ) -> tuple[Row, list[RfiRecord]]:
        """The row of a finished integration, and the interference log records that go with it.

        ``reached(t_unix)``: where a pointing driver said the dish was at that time (None: no
        report); its az/el replace the target's in the row, and PNTERR is the angle between
        the two (:func:`spinflip.daemon.mount.base.separation_deg`). Galactic and equatorial
        coordinates stay the target's."""
        cfg, sch, grid = self.cfg, self.schedule, self.grid
        nchan = grid.nchan
        switched = sch.mode == "frequency"
        tsys, age, trusted = self.tsys.tsys_for(integ.t_last_s)
        scale_k = tsys if np.isfinite(tsys) else cfg["calibration"]["tsys_k"]
        assert integ.t_first_s is not None, "a finished integration holds at least one block"
        t_mid = Time((integ.t_first_s + integ.t_last_s) / 2, format="unix", scale="utc")
        date_obs = t_mid.isot
        verdict = self.interference.assess(integ, float(t_mid.unix), date_obs)
        bad = verdict.bad
        spec = calibrate(integ, nchan, sch.shift_channels, switched, scale_k,
                         False, cfg["calibration"]["main_beam_efficiency"], bad=bad)
        coord = pointing(t_mid)
        pos = coordinates.sky_position(coord, self.location, t_mid)
        dish = reached(float(t_mid.unix)) if reached is not None else None
        error_deg = float("nan")
        if dish is not None:
            error_deg = separation_deg(dish, AzEl(pos.az_deg, pos.el_deg))
            pos = dataclasses.replace(pos, az_deg=dish.az_deg, el_deg=dish.el_deg)
        vframe = float(coordinates.vframe_lsrk_m_s(coord, self.location, t_mid))  # one time
        flagged = spec.flagged
        if spec.unit == "K" and not trusted:
            flagged = np.ones_like(flagged)      # on no trustworthy scale: kept, all flagged
            if not np.isfinite(tsys):
                self.warn_once("no-tsys", "error", "no system temperature measured yet: rows are"
                               f" saved fully flagged, scaled with calibration.tsys_k = "
                               f"{cfg['calibration']['tsys_k']:g} K as a placeholder")
            elif self.tsys.plan.kind == "noise_source":
                self.warn_once("old-tsys", "error", f"newest system temperature is {age:.0f} s "
                               "old (> calibration.tsys_max_age_s): rows are saved fully flagged")
        if pos.el_deg < cfg["pointing"]["min_elevation"]:
            flagged = np.ones_like(flagged)
            self.warn_once("low-el", "error", f"{pointing.object} is at elevation "
                           f"{pos.el_deg:.1f} deg, below pointing.min_elevation = "
                           f"{cfg['pointing']['min_elevation']:g} deg: rows are saved fully "
                           "flagged")
        # interference apart from fold coverage: the baseband channels flagged for it (carriers,
        # spurs, masks; every spectrum removed by SK or blanking), not the DC channel flagged by
        # name, carried through the fold onto the covered channels they spoil
        dc = dc_channels(nchan, cfg["rfi"]["flag_dc"])
        rfi_base = np.zeros(nchan, dtype=bool)
        for mask in bad.values():
            rfi_base |= mask
        for ph in integ.sums.values():
            if ph.spectra:
                rfi_base |= ph.m == 0
        rfi_flagged = fold_spoiled(rfi_base & ~dc, sch.shift_channels, spec.folded)
        fl = integ.flags
        crval1a, cdelt1a = velocity_wcs_m_s(sch.sig_lo_hz, grid.channel_hz, HI_REST_FREQ_HZ,
                                            vframe)
        row = Row(
            data=spec.data, flagged=flagged, tsys_k=tsys, exposure_s=spec.exposure_s,
            date_obs=date_obs, lo_hz=sch.sig_lo_hz, channel_hz=grid.channel_hz,
            crpix=grid.crpix, restfreq_hz=HI_REST_FREQ_HZ, vframe_m_s=vframe,
            object=pointing.object, position=pos, vel_crval_m_s=crval1a, vel_cdelt_m_s=cdelt1a,
            tsys_age_s=age, lost_samples=int(integ.lost_samples),
            blanked_samples=int(integ.blanked_samples), cal_s=float(integ.cal_s),
            unknown_s=float(integ.unknown_s), folded=bool(spec.folded),
            chan_exposure_s=spec.chan_exposure_s,
            flag_time_fraction=fl.blanked / fl.spectra if fl.spectra else 0.0,
            flag_freq_fraction=float(np.mean(flagged)),
            rfi_fraction=float(np.mean(rfi_flagged)),
            uncovered_fraction=float(np.mean(~spec.covered)),
            sk_fraction=fl.sk_cells / (fl.blocks * nchan) if fl.blocks else 0.0,
            n_impulse=int(fl.impulses), n_carrier=int(verdict.n_carrier),
            pointing_error_deg=error_deg,
        )
        return row, verdict.log


def scan_header(cfg: dict, schedule: Schedule, source_kind: str, block_s: float, plan: TsysPlan,
                switch_text: str, pointing: Pointing) -> dict:
    """The FITS header cards of a scan (site, spectral frames, switching, calibration)."""
    site = cfg["site"]
    sch = schedule
    unit = "K" if sch.mode == "frequency" else "count"
    eta = cfg["calibration"]["main_beam_efficiency"]
    head = {
        "TELESCOP": site["telescope"], "SITENAME": site["name"],
        "SITELAT": site["lat"], "SITELONG": site["lon"], "SITEELEV": site["height_m"],
        "DISHDIAM": site["dish_diameter_m"],
        "SPECSYS": "TOPOCENT", "SSYSOBS": "TOPOCENT", "VELDEF": "RADI-LSR", "BUNIT": unit,
        "CTYPE1A": "VRAD", "CUNIT1A": "m/s", "SPECSYSA": "LSRK",
        "SOURCE": source_kind, "SWMODE": sch.mode, "SWOFFSET": sch.shift_channels *
        sch.channel_hz, "SWDWELL": sch.blocks_per_dwell * block_s,
        "CHANMETH": cfg["spectrometer"]["method"], "PFBTAPS": cfg["spectrometer"]["taps"],
        "TSYSSRC": plan.text,
        "TEMPSCAL": ("TMB" if eta < 1 else "TA") if unit == "K" else "COUNTS",
        "BEAMEFF": eta,
        "CALSWTCH": switch_text if plan.kind == "noise_source" else "none",
        "SAMPRATE": cfg["source"]["sample_rate"], "GAIN": cfg["source"]["gain"],
        "PNTFRAME": pointing.frame,
    }
    head.update(plan.cards)
    return head
