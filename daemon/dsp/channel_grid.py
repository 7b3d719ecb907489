"""The spectrometer's channel grid: which sky frequency each channel holds at a given LO.

Channel k of an N-channel spectrum taken at LO f_LO is centred on

    f_k = f_LO + (k - N // 2) * df,      df = sample rate / N,

so the LO sits in channel N // 2 (the dongle's DC spike lands there), and the FITS reference
pixel (1-based) of the frequency axis is N // 2 + 1 with CRVAL1 = f_LO, CDELT1 = df. Made once
per run (:meth:`ChannelGrid.from_schedule`) and passed to whatever needs a channel's frequency.
"""

from __future__ import annotations

from dataclasses import dataclass
from typing import TYPE_CHECKING

import numpy as np
import numpy.typing as npt

from spinflip.daemon.sky.hi_line import radio_velocity_m_s

if TYPE_CHECKING:
    from spinflip.daemon.dsp.switching import Schedule


@dataclass(frozen=True)
class ChannelGrid:
    """``nchan`` channels of width ``channel_hz`` (the sample rate over ``nchan``)."""

    nchan: int
    channel_hz: float

    @classmethod
    def from_schedule(cls, nchan: int, schedule: Schedule) -> ChannelGrid:
        """The grid of a switching schedule's spectra (its ``channel_hz``)."""
        return cls(int(nchan), float(schedule.channel_hz))

    @property
    def sample_rate_hz(self) -> float:
        """The band the channels cover: ``nchan * channel_hz``."""
        return self.nchan * self.channel_hz

    @property
    def lo_index(self) -> int:
        """The channel holding the LO (0-based): ``nchan // 2``."""
        return self.nchan // 2

    @property
    def crpix(self) -> float:
        """FITS reference pixel (1-based) of the LO channel: ``nchan // 2 + 1``."""
        return self.lo_index + 1.0

    def sky_hz(self, lo_hz: float, channels: npt.ArrayLike | None = None) -> np.ndarray:
        """Sky frequency (Hz) of ``channels`` (default: all) in a spectrum taken at ``lo_hz``."""
        k = np.arange(self.nchan) if channels is None else np.asarray(channels)
        return lo_hz + (k - self.lo_index) * self.channel_hz

    def radio_velocity_km_s(self, lo_hz: float, vframe_m_s: float = 0.0) -> np.ndarray:
        """Radio velocity (km/s) of every channel of HI at ``lo_hz``, shifted by ``vframe_m_s``
        (the LSRK correction) (:func:`spinflip.daemon.sky.hi_line.radio_velocity_m_s`)."""
        return (radio_velocity_m_s(self.sky_hz(lo_hz)) + vframe_m_s) / 1e3

    def lo_mask(self, neighbours: int = 0) -> np.ndarray:
        """bool[nchan]: the LO channel and ``neighbours`` channels on each side of it."""
        return lo_mask(self.nchan, neighbours)


def lo_mask(nchan: int, neighbours: int = 0) -> np.ndarray:
    """bool[nchan]: the LO channel (``nchan // 2``) and ``neighbours`` channels on each side."""
    out = np.zeros(nchan, dtype=bool)
    out[max(nchan // 2 - neighbours, 0):nchan // 2 + neighbours + 1] = True
    return out
