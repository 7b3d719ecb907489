"""The interference decisions of one integration: which channels of each switching phase are
flagged (by name, as carriers), how many carriers there are, and the log records saying what
appeared and went.

Per phase, three rules add up:

* channels flagged by name (:func:`spinflip.daemon.rfi.masks.named_channels`: the DC channel,
  the receiver's spurs, the observer's masks);
* a channel spectral kurtosis removed in most blocks is a strong steady carrier, whose leakage
  reaches ``LEAKAGE_CHANNELS`` neighbours SK may miss: those are flagged too;
* the shape search (:class:`spinflip.daemon.rfi.carriers.CarrierFinder`) finds the weaker
  carriers, never where HI of the pointing may appear (``protected``).

Neither carrier rule looks at the LO channels (:func:`spinflip.daemon.rfi.carriers.lo_channels`):
the receiver's LO leakage there is a steady tone near the SK threshold, removed in a varying
share of blocks. A carrier is logged when it appears (``carrier-on``, with its excess in sigma,
NaN when only spectral kurtosis removed it) and when it goes (``carrier-off``), by sky frequency
rounded to 1 Hz.
"""

from __future__ import annotations

from collections.abc import Callable
from dataclasses import dataclass, field

import numpy as np

from spinflip.daemon.dsp.channel_grid import ChannelGrid
from spinflip.daemon.dsp.spectrometer import Integration
from spinflip.daemon.rfi.carriers import CarrierFinder, lo_channels
from spinflip.daemon.rfi.masks import named_channels

#: Neighbours flagged beside a steady strong carrier (filterbank leakage).
LEAKAGE_CHANNELS = 2


def widen(mask: np.ndarray, k: int) -> np.ndarray:
    """``mask`` grown by ``k`` channels on each side."""
    out = mask.copy()
    for d in range(1, k + 1):
        out[d:] |= mask[:-d]
        out[:-d] |= mask[d:]
    return out


@dataclass(frozen=True)
class RfiRecord:
    """One interference log record (a row of the RFI LOG table): what (``kind``: impulses, sk,
    carrier-on, carrier-off), at which sky frequency (NaN: none), a value and a text."""

    date_obs: str
    kind: str
    freq_hz: float
    value: float
    text: str


@dataclass
class Verdict:
    """What :meth:`Interference.assess` decided for one integration."""

    bad: dict = field(default_factory=dict)      # phase -> bool[nchan], baseband channels
    n_carrier: int = 0                           # carrier channels, all phases
    log: list = field(default_factory=list)      # RfiRecord, in order


class Interference:
    """The interference decisions of a run, integration after integration.

    Parameters
    ----------
    grid : the channel grid
    rfi_cfg : the ``[rfi]`` table (``flag_dc``, ``spurs_hz``, ``masks_mhz``, ``carriers``,
        ``carrier_sigma``, ``carrier_history``)
    protected : callable(phase, t_unix_s) -> bool[nchan], or None
        Channels the shape search leaves alone (where HI may appear).
    """

    def __init__(self, grid: ChannelGrid, rfi_cfg: dict,
                 protected: Callable[[str, float], np.ndarray] | None = None):
        self.grid = grid
        self.cfg = rfi_cfg
        self.protected = protected
        self.carriers = (CarrierFinder(grid.nchan, rfi_cfg["carrier_sigma"],
                                       rfi_cfg["carrier_history"])
                         if rfi_cfg["carriers"] else None)
        self._carrier_freqs: dict = {}   # phase -> set of sky frequencies flagged last time
        self.totals = {"impulses": 0, "carrier_onsets": 0, "sk_cells": 0, "blanked_spectra": 0}

    def assess(self, integ: Integration, t_mid_unix_s: float, date_obs: str) -> Verdict:
        """Per phase: channels flagged by name or as carriers; the count; log records dated
        ``date_obs``."""
        nchan, cfg = self.grid.nchan, self.cfg
        out = Verdict()
        log = out.log
        fl = integ.flags
        self.totals["impulses"] += fl.impulses
        self.totals["sk_cells"] += fl.sk_cells
        self.totals["blanked_spectra"] += fl.blanked
        if fl.impulses:
            log.append(RfiRecord(date_obs, "impulses", float("nan"), float(fl.impulses),
                                 f"{fl.blanked} spectra blanked"))
        if fl.sk_cells and fl.blocks:
            frac = fl.sk_cells / (fl.blocks * nchan)
            log.append(RfiRecord(date_obs, "sk", float("nan"), frac,
                                 f"{fl.sk_cells} channel-blocks removed"))
        for phase, ph in integ.sums.items():
            if not ph.spectra:
                continue
            lo = ph.lo_hz
            mask = named_channels(lo, nchan, self.grid.channel_hz, cfg["flag_dc"],
                                  cfg["spurs_hz"], cfg["masks_mhz"])
            carrier = ((ph.sk_hits > 0.5 * ph.blocks) & ~lo_channels(nchan) if ph.blocks
                       else np.zeros(nchan, bool))
            mask |= widen(carrier, LEAKAGE_CHANNELS)
            found = None
            if self.carriers is not None:
                protected = (self.protected(phase, t_mid_unix_s) if self.protected is not None
                             else np.zeros(nchan, bool))
                found = self.carriers.find((phase, lo), ph.mean(), ph.m, protected)
                mask |= found
                carrier = carrier | found
            out.n_carrier += int(carrier.sum())
            chans = np.flatnonzero(carrier)
            sky = dict(zip(np.round(self.grid.sky_hz(lo, chans), 0), chans, strict=True))
            freqs = set(sky)
            z = None
            if found is not None and self.carriers is not None:   # excess of those it found
                # no z when the noise scale was not finite (then nothing was found): all NaN
                z = np.where(found, self.carriers.last_z.get(phase, np.nan), np.nan)
            before = self._carrier_freqs.get(phase, set())
            for f in sorted(freqs - before):
                strength = float(z[sky[f]]) if z is not None and np.isfinite(z[sky[f]]) else \
                    float("nan")                  # NaN: removed by spectral kurtosis
                log.append(RfiRecord(date_obs, "carrier-on", float(f), strength,
                                     f"{phase} phase"))
            for f in sorted(before - freqs):
                log.append(RfiRecord(date_obs, "carrier-off", float(f), 0.0, f"{phase} phase"))
            self.totals["carrier_onsets"] += len(freqs - before)
            self._carrier_freqs[phase] = freqs
            out.bad[phase] = mask
        return out
