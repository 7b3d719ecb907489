"""Channels flagged by name: the dongle's DC spike, its known spurs, and the observer's masks.

- DC: the RTL2832U's DC offset puts a spike at the LO, channel N // 2 (``rfi.flag_dc``).
- Spurs: baseband offsets from the LO where a receiver makes its own lines (``rfi.spurs_hz``,
  e.g. a clock harmonic that follows the LO); the channel holding each is flagged at every LO.
- Masks: sky-frequency ranges the observer knows are polluted (``rfi.masks_mhz``,
  [[lo, hi], ...] in MHz, topocentric); every channel overlapping a range is flagged.

Channel k of a spectrum at LO f_LO covers sky frequencies f_LO + (k - N//2 -+ 1/2) df
(:class:`spinflip.daemon.dsp.channel_grid.ChannelGrid`).

:func:`dc_channels` is the one place that says which channel ``rfi.flag_dc`` flags.
"""

from __future__ import annotations

from collections.abc import Iterable, Sequence

import numpy as np

from spinflip.daemon.dsp.channel_grid import ChannelGrid, lo_mask


def dc_channels(nchan: int, flag_dc: bool = True) -> np.ndarray:
    """bool[nchan]: the channel ``rfi.flag_dc`` flags (the LO's, N // 2), or none."""
    return lo_mask(nchan) if flag_dc else np.zeros(nchan, dtype=bool)


def named_channels(lo_hz: float, nchan: int, channel_hz: float, flag_dc: bool = True,
                   spurs_hz: Iterable[float] = (),
                   masks_mhz: Sequence[Sequence[float]] = ()) -> np.ndarray:
    """bool[nchan]: the channels flagged by name for a spectrum taken at ``lo_hz``."""
    grid = ChannelGrid(nchan, channel_hz)
    out = dc_channels(nchan, flag_dc)
    for off in spurs_hz:
        k = grid.lo_index + int(round(off / channel_hz))
        if 0 <= k < nchan:
            out[k] = True
    if len(masks_mhz):
        centre = grid.sky_hz(lo_hz)
        lo_edge = centre - 0.5 * channel_hz
        hi_edge = centre + 0.5 * channel_hz
        for lo, hi in masks_mhz:
            out |= (hi_edge > lo * 1e6) & (lo_edge < hi * 1e6)
    return out
