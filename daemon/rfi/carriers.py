"""Persistent narrow-band carriers: channels standing out of a smooth running spectrum.

For each switching phase the mean power spectrum P(k) of every integration is compared with
its own smooth version, a running median over 15 channels (it follows the band-pass, its
ripple and roll-off, but not a line one or two channels wide):

    r(k) = P(k) / median_{|j - k| <= 7} P(j) - 1

in units of the channel's noise: the radiometer equation gives the relative noise of a mean of
m(k) power spectra as 1/sqrt(m(k)) (m after flagging), and a robust spread of r over the band
(1.4826 times its median absolute deviation) takes over where it is larger (structure the
median does not follow). So sigma_k = max(1/sqrt(m_k), sigma_MAD).

A channel is a carrier when r(k) > c_1 sigma_k in this integration (c_1 = c + 2, a strong or
intermittent carrier), or when the mean of r over the last ``history`` = H integrations exceeds
c sigma_k / sqrt(H) (``rfi.carrier_sigma`` = c): a steady carrier of strength s sigma per
integration reaches s sqrt(H) there, so one of s >= (c + 2.33)/sqrt(H) is found at least 99 %
of the time once H integrations are in. Around each detected channel the flag grows over
neighbours with r > 3 sigma_k (the filterbank's leakage of a strong carrier).

The channel at the LO and its two neighbours are never searched: the receiver's DC offset (LO
leakage) puts a steady tone there, which ``rfi.flag_dc`` flags by name. Near the spectral-kurtosis
threshold such a tone is removed in a varying share of blocks, so a search there would report
it appearing and going with the noise level (more easily in integrations with fewer blocks of a
phase, those holding a noise-source firing); :func:`lo_channels` is the one definition both
carrier rules (this shape search and the pipeline's spectral-kurtosis majority) leave out.

The 21 cm line is never flagged here: it is broad and noise-like, but its steep flanks and
narrow components can still stand out of a 15-channel median, so channels whose sky frequency
lies where HI toward the pointing can be (:mod:`spinflip.daemon.sky.kinematics`) are left to
spectral kurtosis, which a noise-like line cannot trigger, and to the observer's masks.

References
----------
Rousseeuw, P. J. & Croux, C. 1993, JASA 88, 1273 (median absolute deviation, 1.4826).
Common practice for narrow-band interference excision: running-median baselines and robust
thresholds (no single source).
"""

from __future__ import annotations

from collections import deque
from collections.abc import Hashable

import numpy as np
from numpy.lib.stride_tricks import sliding_window_view

from spinflip.daemon.dsp.channel_grid import lo_mask
from spinflip.daemon.dsp.robust import robust_sigma

_HALF_WIDTH = 7
_GROW_SIGMA = 3.0
_EDGE_FRACTION = 0.04


def lo_channels(nchan: int) -> np.ndarray:
    """bool[nchan]: the channel at the LO (N // 2) and its two neighbours, never a carrier."""
    return lo_mask(nchan, 1)


def running_median(p: np.ndarray, half_width: int = _HALF_WIDTH) -> np.ndarray:
    """Median of p over channels k - w .. k + w (the ends padded by reflection)."""
    padded = np.pad(p, half_width, mode="reflect")
    return np.median(sliding_window_view(padded, 2 * half_width + 1), axis=1)


def carrier_ratio(p: np.ndarray, usable: np.ndarray) -> tuple[np.ndarray, float]:
    """(r, sigma_MAD): excess over the running median, and its robust spread over ``usable``."""
    p = np.where(np.isfinite(p) & (p > 0), p, np.nan)
    fill = np.where(np.isnan(p), np.nanmedian(p), p)
    ref = running_median(fill)
    r = fill / ref - 1.0
    vals = r[usable & np.isfinite(p)]
    if vals.size < 8:
        return r, float("inf")
    med = np.median(vals)
    return r - med, float(robust_sigma(vals))   # 1.4826 MAD (dsp.robust)


def _grow(seed: np.ndarray, weak: np.ndarray) -> np.ndarray:
    """Extend each run of ``seed`` over adjacent ``weak`` channels."""
    out = seed.copy()
    for _ in range(3):
        nb = np.zeros_like(out)
        nb[1:] |= out[:-1]
        nb[:-1] |= out[1:]
        new = out | (nb & weak)
        if np.array_equal(new, out):
            break
        out = new
    return out


class CarrierFinder:
    """Carrier channels per switching phase, integration after integration.

    Parameters
    ----------
    nchan : channels per spectrum
    sigma : detection threshold c in robust sigmas
    history : integrations in the running mean (persistent weak carriers)
    """

    def __init__(self, nchan: int, sigma: float = 5.0, history: int = 3):
        self.nchan = nchan
        self.sigma = float(sigma)
        self.history = int(history)
        edge = int(np.ceil(_EDGE_FRACTION * nchan))
        self.usable = np.zeros(nchan, dtype=bool)
        self.usable[edge:nchan - edge] = True
        self.usable &= ~lo_channels(nchan)                      # DC: flagged by name
        self._past: dict[Hashable, deque[np.ndarray]] = {}       # (phase, lo) -> deque of r
        self.last_found: dict[Hashable, np.ndarray] = {}         # phase -> the newest result
        self.last_z: dict[Hashable, np.ndarray] = {}             # phase -> r / sigma

    def find(self, key: Hashable, mean_power: np.ndarray, counts: np.ndarray,
             protected: np.ndarray | None = None) -> np.ndarray:
        """bool[nchan]: carrier channels of one phase's mean power spectrum.

        Parameters
        ----------
        key : hashable (phase, LO): the running history is kept per key
        mean_power : float[nchan] mean power per channel of this integration (NaN: no data)
        counts : float[nchan] spectra per channel that went into ``mean_power``
        protected : bool[nchan] channels never flagged by shape (where HI can be)
        """
        r, sigma_mad = carrier_ratio(mean_power, self.usable)
        past = self._past.setdefault(key, deque(maxlen=self.history))
        past.append(r)
        found = np.zeros(self.nchan, dtype=bool)
        self.last_found[key[0] if isinstance(key, tuple) else key] = found
        if not np.isfinite(sigma_mad):
            return found
        with np.errstate(divide="ignore"):
            sigma = np.maximum(1.0 / np.sqrt(np.maximum(counts, 1.0)), sigma_mad)
        self.last_z[key[0] if isinstance(key, tuple) else key] = r / sigma
        seed = r > (self.sigma + 2.0) * sigma
        if len(past) == self.history:
            seed |= np.mean(past, axis=0) > self.sigma * sigma / np.sqrt(self.history)
        allowed = self.usable.copy()
        if protected is not None:
            allowed &= ~protected
        seed &= allowed
        if seed.any():
            found = _grow(seed, (r > _GROW_SIGMA * sigma) & allowed)
        self.last_found[key[0] if isinstance(key, tuple) else key] = found
        return found
