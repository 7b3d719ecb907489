"""Channels flagged by name: the dongle's DC spike, its known spurs, and the observer's masks.

- DC: the RTL2832U's DC offset puts a spike at the LO, channel N // 2 (``rfi.flag_dc``).
- Spurs: baseband offsets from the LO where a receiver makes its own lines (``rfi.spurs_hz``,
  e.g. a clock harmonic that follows the LO); the channel holding each is flagged at every LO.
- Masks: sky-frequency ranges the observer knows are polluted (``rfi.masks_mhz``,
  [[lo, hi], ...] in MHz, topocentric); every channel overlapping a range is flagged.

Channel k of a spectrum at LO f_LO covers sky frequencies f_LO + (k - N//2 -+ 1/2) df.
"""

from __future__ import annotations

import numpy as np


def named_channels(lo_hz: float, nchan: int, channel_hz: float, flag_dc: bool = True,
                   spurs_hz=(), masks_mhz=()) -> np.ndarray:
    """bool[nchan]: the channels flagged by name for a spectrum taken at ``lo_hz``."""
    out = np.zeros(nchan, dtype=bool)
    centre = nchan // 2
    if flag_dc:
        out[centre] = True
    for off in spurs_hz:
        k = centre + int(round(off / channel_hz))
        if 0 <= k < nchan:
            out[k] = True
    if len(masks_mhz):
        k = np.arange(nchan)
        lo_edge = lo_hz + (k - centre - 0.5) * channel_hz
        hi_edge = lo_hz + (k - centre + 0.5) * channel_hz
        for lo, hi in masks_mhz:
            out |= (hi_edge > lo * 1e6) & (lo_edge < hi * 1e6)
    return out
