"""The frequency-switching schedule: which LO and phase at which observing time.

The signal phase sits at the configured centre frequency, the reference phase at the centre
plus ``offset_hz``, rounded to a whole number of channels so that the two spectra can be
folded by an integer shift. Each phase lasts ``dwell_s`` (rounded to whole blocks); after each
hop the first ``settle_s`` of samples are blanked while the tuner's PLL and filters settle.
"""

from __future__ import annotations

from dataclasses import dataclass

from .block import REF, SIG


@dataclass(frozen=True)
class Schedule:
    mode: str            # "frequency" or "none"
    sig_lo_hz: float
    shift_channels: int  # reference LO minus signal LO, in channels
    channel_hz: float
    blocks_per_dwell: int
    settle_samples: int

    @classmethod
    def from_config(cls, cfg: dict) -> "Schedule":
        src, sw, sp = cfg["source"], cfg["switching"], cfg["spectrometer"]
        fs, nchan = src["sample_rate"], sp["channels"]
        block_s = src["block_samples"] / fs
        shift = round(sw["offset_hz"] / (fs / nchan)) if sw["mode"] == "frequency" else 0
        return cls(mode=sw["mode"], sig_lo_hz=src["center_freq"], shift_channels=shift,
                   channel_hz=fs / nchan, blocks_per_dwell=max(1, round(sw["dwell_s"] / block_s)),
                   settle_samples=int(round(sw["settle_s"] * fs)))

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
