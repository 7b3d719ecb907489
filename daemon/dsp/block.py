"""The Block: raw 8-bit IQ samples plus what is known about them."""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

#: Switching phases.
SIG, REF = "sig", "ref"


@dataclass
class Block:
    """Interleaved uint8 IQ (``raw``, 2 bytes per complex sample) and its context.

    Attributes
    ----------
    raw : uint8 array, interleaved I, Q
    lo_hz : LO (centre) frequency the samples were taken at, Hz
    sample_rate : complex samples per second
    t0_unix_s : time of the first sample, UTC, seconds since 1970 (simulated time for sim)
    phase : switching phase, ``"sig"`` or ``"ref"``
    cal_on : whether the calibration noise source was on; None when unknown (its switch failed):
        such samples go neither into spectra nor into system-temperature measurements
    lost_before : complex samples lost between the previous block and this one
    settle_samples : leading samples to discard (the tuner settling after a hop)
    index : number of this block in the run's switching schedule (0 for the first)
    clock_step_s : a step of the system clock noticed just before this block, s (0: none);
        positive: the clock jumped forward and the timestamps followed it; negative: it jumped
        back and the timestamps did not (see :mod:`spinflip.daemon.sources.sample_clock`)
    """

    raw: np.ndarray
    lo_hz: float
    sample_rate: float
    t0_unix_s: float
    phase: str = SIG
    cal_on: bool | None = False
    lost_before: int = 0
    settle_samples: int = 0
    index: int = 0
    clock_step_s: float = 0.0

    @property
    def n_samples(self) -> int:
        return self.raw.size // 2

    @property
    def duration_s(self) -> float:
        return self.n_samples / self.sample_rate
