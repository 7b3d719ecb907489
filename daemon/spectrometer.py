"""Accumulation of channelized power per switching phase into integrations.

For each phase the spectrometer keeps, per channel, the sum of power S1 = sum P_i and of power
squared S2 = sum P_i^2 over the M spectra accumulated (spectral kurtosis needs S2), and the
observing time that went in. Settle samples after each hop are discarded before channelizing;
the channelizer's history is dropped at each hop (and each noise-source change) so no spectrum
mixes two LO settings or two calibration states.

Blocks taken with the calibration noise source on (or in an unknown state, after a failed
switch) are channelized but kept out of the integration: their sums are returned to the caller
for the system-temperature measurement (:mod:`spinflip.daemon.tsys`), and their time is counted
in ``cal_s`` / ``unknown_s``.
"""

from __future__ import annotations

from dataclasses import dataclass, field

import numpy as np

from .block import REF, SIG, Block
from .channelizer import make_channelizer
from .samples import u8_to_complex


@dataclass
class PhaseSums:
    """Power sums of one switching phase over one integration."""

    nchan: int
    s1: np.ndarray = None
    s2: np.ndarray = None
    m: int = 0
    exposure_s: float = 0.0
    lo_hz: float = 0.0

    def __post_init__(self):
        self.s1 = np.zeros(self.nchan)
        self.s2 = np.zeros(self.nchan)

    def mean(self) -> np.ndarray:
        """Mean power per channel, S1 / M."""
        return self.s1 / max(self.m, 1)


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


class Spectrometer:
    """Block in, power sums out: conversion, settle blanking, channelizer, S1 and S2 per phase."""

    def __init__(self, nchan: int, method: str = "pfb", taps: int = 4):
        self.nchan = nchan
        self.channelizer = make_channelizer(method, nchan, taps=taps)
        self.current = self._new()
        self._last_lo = None
        self._last_cal = None

    def _new(self) -> Integration:
        return Integration(sums={SIG: PhaseSums(self.nchan), REF: PhaseSums(self.nchan)})

    def add(self, block: Block):
        """Channelize one block; noise-source-off blocks go into the current integration.

        Returns
        -------
        s1 : float64[nchan] sum of the block's power spectra
        m : number of spectra in ``s1``
        """
        integ = self.current
        x = u8_to_complex(block.raw)
        if block.lo_hz != self._last_lo or block.settle_samples or block.cal_on != self._last_cal:
            self.channelizer.reset()
            self._last_lo = block.lo_hz
            self._last_cal = block.cal_on
        skip = min(block.settle_samples, x.size)
        x = x[skip:]
        s1, s2, m = self.channelizer.sums(x)
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
        ph.exposure_s += m * self.nchan / block.sample_rate
        ph.lo_hz = block.lo_hz
        return s1, m

    def take(self) -> Integration:
        """Hand over the finished integration and start a new one."""
        done, self.current = self.current, self._new()
        return done
