"""Accumulation of channelized power per switching phase into integrations.

For each phase the spectrometer keeps, per channel, the sum of power S1 = sum P_i and of power
squared S2 = sum P_i^2 over the M spectra accumulated (spectral kurtosis needs S2), and the
observing time that went in. Settle samples after each hop are discarded before channelizing;
the channelizer's history is dropped at each hop (and each noise-source change) so no spectrum
mixes two LO settings or two calibration states.

Blocks taken with the calibration noise source on (or in an unknown state, after a failed
switch) are channelized but kept out of the integration: their sums are returned to the caller
for the system-temperature measurement (:mod:`spinflip.daemon.calibration.tsys_meter`), and their time is counted
in ``cal_s`` / ``unknown_s``.

Interference is kept out of the sums while it happens (when a :class:`FlagSettings` is given):

1. impulse blanking (:mod:`spinflip.daemon.rfi.impulses`): spectra whose samples hold a burst (a
   0.2 ms chunk whose power jumps above the block's robust level) are dropped from every
   channel;
2. spectral kurtosis (:mod:`spinflip.daemon.rfi.spectral_kurtosis`) of each channel over the
   block's remaining M spectra, SK = (M + 1)/(M - 1) (M S2/S1^2 - 1): a channel outside the
   thresholds for the configured false-alarm probability leaves this block's sums.

So each channel has its own count of spectra ``m`` (and exposure); the mean power S1/m is
normalised by it. Narrow-band carriers, found per integration, are flagged by the pipeline.
"""

from __future__ import annotations

from collections.abc import Hashable
from dataclasses import dataclass, field

import numpy as np

from spinflip.daemon.dsp.block import REF, SIG, Block
from spinflip.daemon.dsp.channelizer import make_channelizer
from spinflip.daemon.rfi.impulses import ImpulseBlanker
from spinflip.daemon.rfi.spectral_kurtosis import sk_flags


@dataclass(frozen=True)
class FlagSettings:
    """What the spectrometer flags while it accumulates (from ``[rfi]``)."""

    impulses: bool = True
    impulse_sigma: float = 6.0
    sk: bool = True
    sk_pfa: float = 0.0013

    @classmethod
    def from_config(cls, rfi: dict) -> FlagSettings | None:
        if not (rfi["impulses"] or rfi["sk"]):
            return None
        return cls(rfi["impulses"], rfi["impulse_sigma"], rfi["sk"], rfi["sk_pfa"])


@dataclass
class BlockFlags:
    """What flagging removed from one block."""

    blocks: int = 0             # blocks looked at
    spectra: int = 0            # spectra in the blocks
    blanked: int = 0            # spectra blanked by impulses
    impulses: int = 0           # separate impulses found
    sk_cells: int = 0           # channels removed by spectral kurtosis


@dataclass
class PhaseSums:
    """Power sums of one switching phase over one integration."""

    nchan: int
    # zeros[nchan], made by __post_init__
    s1: np.ndarray = field(init=False)
    s2: np.ndarray = field(init=False)
    m: np.ndarray = field(init=False)        # spectra per channel that went in (after flagging)
    sk_hits: np.ndarray = field(init=False)  # blocks in which spectral kurtosis removed the channel
    blocks: int = 0            # blocks offered
    spectra: int = 0           # spectra offered (before flagging)
    exposure_s: float = 0.0    # observing time offered (spectra * N / fs)
    lo_hz: float = 0.0

    def __post_init__(self) -> None:
        self.s1 = np.zeros(self.nchan)
        self.s2 = np.zeros(self.nchan)
        self.m = np.zeros(self.nchan)
        self.sk_hits = np.zeros(self.nchan)

    def mean(self) -> np.ndarray:
        """Mean power per channel, S1 / m (NaN where every spectrum was flagged)."""
        with np.errstate(invalid="ignore", divide="ignore"):
            return np.where(self.m > 0, self.s1 / np.maximum(self.m, 1), np.nan)

    def channel_exposure_s(self) -> np.ndarray:
        """Observing time per channel after flagging, s."""
        if not self.spectra:
            return np.zeros(self.nchan)
        return self.exposure_s * self.m / self.spectra


@dataclass
class Integration:
    """Everything one saved row is made from."""

    sums: dict = field(default_factory=dict)   # phase -> PhaseSums
    t_first_s: float | None = None             # unix time of first sample used
    t_last_s: float = 0.0                      # unix time just after the last sample
    lost_samples: int = 0
    blanked_samples: int = 0
    cal_s: float = 0.0                         # time with the noise source on (not in the sums)
    unknown_s: float = 0.0                     # time with the noise source in an unknown state
    flags: BlockFlags = field(default_factory=BlockFlags)   # what flagging removed, summed


class Spectrometer:
    """Block in, power sums out: conversion, settle blanking, channelizer, S1 and S2 per phase."""

    def __init__(self, nchan: int, method: str = "pfb", taps: int = 4,
                 flagging: FlagSettings | None = None):
        self.nchan = nchan
        self.channelizer = make_channelizer(method, nchan, taps=taps)
        self.flagging = flagging
        self.blanker = (ImpulseBlanker(flagging.impulse_sigma, nchan, self.channelizer.taps)
                        if flagging is not None and flagging.impulses else None)
        self.current = self._new()
        self._last_lo: float | None = None
        self._last_cal: bool | None = None

    def _new(self) -> Integration:
        return Integration(sums={SIG: PhaseSums(self.nchan), REF: PhaseSums(self.nchan)})

    def add(self, block: Block) -> tuple[np.ndarray, np.ndarray]:
        """Channelize one block; noise-source-off blocks go into the current integration.

        Returns
        -------
        s1 : float64[nchan] sum of the block's power spectra
        m : float64[nchan] number of spectra in ``s1`` per channel
        """
        integ = self.current
        if block.lo_hz != self._last_lo or block.settle_samples or block.cal_on != self._last_cal:
            self.channelizer.reset()
            if self.blanker is not None:
                self.blanker.reset()
            self._last_lo = block.lo_hz
            self._last_cal = block.cal_on
        skip = min(block.settle_samples, block.raw.size // 2)
        # converted into the channelizer's buffer behind its history (code - 127.5: the
        # blanker is scale-free, the channelizer folds 1/127.5 into its coefficients)
        x = self.channelizer.load_u8(block.raw[2 * skip:])
        sk_bad = None
        if self.flagging is None:
            s1, s2, spectra = self.channelizer.sums(x)
            m = np.full(self.nchan, float(spectra))
        else:
            s1, s2, m, spectra, sk_bad = self._flagged_sums(x, (block.lo_hz, block.cal_on),
                                                            integ.flags)
        if integ.t_first_s is None:
            integ.t_first_s = block.t0_unix_s
        integ.t_last_s = block.t0_unix_s + block.duration_s
        integ.lost_samples += block.lost_before
        integ.blanked_samples += skip
        if block.cal_on is None:
            integ.unknown_s += block.duration_s
            return s1, m
        if block.cal_on:
            integ.cal_s += block.duration_s
            return s1, m
        ph = integ.sums[block.phase]
        ph.s1 += s1
        ph.s2 += s2
        ph.m += m
        ph.blocks += 1
        if sk_bad is not None:
            ph.sk_hits += sk_bad
        ph.spectra += spectra
        ph.exposure_s += spectra * self.nchan / block.sample_rate
        ph.lo_hz = block.lo_hz
        return s1, m

    def _flagged_sums(self, x: np.ndarray, state: Hashable, tally: BlockFlags
                      ) -> tuple[np.ndarray, np.ndarray, np.ndarray, int, np.ndarray | None]:
        """S1, S2 and per-channel counts of a block without the spectra and cells flagged."""
        assert self.flagging is not None, "only called with flagging configured (see add)"
        history = getattr(self.channelizer, "pending_samples", 0)
        spectra = self.channelizer.spectra_for(x.size)
        tally.blocks += 1
        tally.spectra += spectra
        blank = None
        if self.blanker is not None and spectra:
            blank, events = self.blanker.mask(x, history, spectra, state)
            if blank.any():
                tally.blanked += int(blank.sum())
                tally.impulses += events
            else:
                blank = None
        s1, s2, used = self.channelizer.sums(x, exclude=blank)
        m = np.full(self.nchan, float(used))
        bad = None
        if self.flagging.sk and used >= 16:
            bad = sk_flags(s1, s2, used, self.flagging.sk_pfa)
            if bad.any():
                s1[bad] = 0.0
                s2[bad] = 0.0
                m[bad] = 0.0
                tally.sk_cells += int(bad.sum())
        return s1, s2, m, spectra, bad

    def restart(self) -> None:
        """After a gap in the samples (pause, new pointing): the next block starts afresh, so
        no spectrum spans the gap."""
        self._last_lo = None
        self._last_cal = None

    def take(self) -> Integration:
        """Hand over the finished integration and start a new one."""
        done, self.current = self.current, self._new()
        return done
