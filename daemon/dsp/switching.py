"""The frequency-switching schedule: which LO and phase at which observing time.

The signal phase sits at the configured centre frequency, the reference phase at the centre
plus ``offset_hz``, rounded to a whole number of channels so that the two spectra can be
folded by an integer shift. Each phase lasts ``dwell_s`` (rounded to whole blocks); after each
hop the first ``settle_s`` of samples are blanked while the tuner's PLL and filters settle.

The calibration noise source fires for whole switching cycles, so that every firing has both
phases with the source on, and off cycles on both sides of it (for the on/off measurement of
the system temperature, see :mod:`spinflip.daemon.calibration.tsys_meter`). With cycle number
c = block_index // blocks_per_cycle, a firing period of P cycles and n on-cycles, the source is
on when ``1 <= c mod P <= n``: cycle 0 of each period is the "off before", cycle n + 1 the
"off after".
"""

from __future__ import annotations

import math
from dataclasses import dataclass

from spinflip.daemon.dsp.block import REF, SIG


@dataclass(frozen=True)
class Schedule:
    mode: str            # "frequency" or "none"
    sig_lo_hz: float
    shift_channels: int  # reference LO minus signal LO, in channels
    channel_hz: float
    blocks_per_dwell: int
    settle_samples: int
    cal_period_cycles: int = 0   # 0: the noise source never fires
    cal_on_cycles: int = 0

    @classmethod
    def from_config(cls, cfg: dict, block_samples: int | None = None,
                    noise_source: bool | None = None) -> Schedule:
        """The schedule of a configuration.

        ``block_samples`` overrides ``source.block_samples`` (a source may round it);
        ``noise_source`` overrides whether the noise source fires (default: when
        ``calibration.tsys_from = "noise_source"``).
        """
        src, sw, sp, cal = cfg["source"], cfg["switching"], cfg["spectrometer"], cfg["calibration"]
        fs, nchan = src["sample_rate"], sp["channels"]
        block_s = (block_samples or src["block_samples"]) / fs
        shift = round(sw["offset_hz"] / (fs / nchan)) if sw["mode"] == "frequency" else 0
        bpd = max(1, round(sw["dwell_s"] / block_s))
        cycle_s = block_s * (2 * bpd if sw["mode"] == "frequency" else 1)
        fire = cal["tsys_from"] == "noise_source" if noise_source is None else noise_source
        on = max(1, math.ceil(cal["cal_on_s"] / cycle_s - 1e-9)) if fire else 0
        period = max(on + 2, round(cal["cal_interval_s"] / cycle_s)) if fire else 0
        return cls(mode=sw["mode"], sig_lo_hz=src["center_freq"], shift_channels=shift,
                   channel_hz=fs / nchan, blocks_per_dwell=bpd,
                   settle_samples=int(round(sw["settle_s"] * fs)),
                   cal_period_cycles=period, cal_on_cycles=on)

    @property
    def ref_lo_hz(self) -> float:
        return self.sig_lo_hz + self.shift_channels * self.channel_hz

    def phase_of_block(self, index: int) -> str:
        """Phase of block number ``index`` counted from the start of the run."""
        if self.mode == "none":
            return SIG
        return SIG if (index // self.blocks_per_dwell) % 2 == 0 else REF

    def lo_of(self, phase: str) -> float:
        return self.sig_lo_hz if phase == SIG else self.ref_lo_hz

    def is_hop(self, index: int) -> bool:
        """True when block ``index`` is the first after a retune (or the very first)."""
        return index == 0 or (self.mode == "frequency" and index % self.blocks_per_dwell == 0)

    @property
    def blocks_per_cycle(self) -> int:
        return 1 if self.mode == "none" else 2 * self.blocks_per_dwell

    def cal_on(self, index: int, extra_from: int | None = None) -> bool:
        """Whether the noise source is on during block ``index``; ``extra_from``: the first
        block of an extra firing asked for now (whole cycles, off cycles around it)."""
        if not self.cal_period_cycles:
            return False
        if extra_from is not None:
            first = -(-extra_from // self.blocks_per_cycle) + 1    # a whole off cycle first
            if first <= index // self.blocks_per_cycle < first + self.cal_on_cycles:
                return True
        c = (index // self.blocks_per_cycle) % self.cal_period_cycles
        return 1 <= c <= self.cal_on_cycles
