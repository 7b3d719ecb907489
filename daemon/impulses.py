"""Time-domain impulse blanking: spectra hit by short broadband bursts leave the accumulation.

Each power spectrum j of a block has a total power T_j = sum_k P_j[k] (all channels: the
power of the N-sample frame seen through the filterbank). For Gaussian noise T_j fluctuates
by about 1/sqrt(N_eff) of its mean (a few per cent for N = 1024), while a burst from a spark,
a switching supply or a radar pulse raises it many times. Against a robust level of the block,

    level = median_j T_j,     sigma = 1.4826 median_j |T_j - level|     (MAD, Gaussian-consistent)

a spectrum is hit when T_j > level + k sigma (``rfi.impulse_sigma`` = k). A polyphase spectrum
is made from ``taps`` consecutive frames, so a burst in one frame reaches ``taps`` spectra: the
mask is widened by taps - 1 spectra on each side (across block boundaries forward, through a
carry-over). A block whose level jumps above 1.5 times the previous level of the same
(LO, noise-source) state is blanked whole: a burst longer than half a block.

The median and MAD are robust as long as bursts hit under half of a block's spectra.

References
----------
Rousseeuw, P. J. & Croux, C. 1993, JASA 88, 1273 (median absolute deviation, 1.4826).
Common practice in radio astronomy for time-domain blanking of impulsive interference.
"""

from __future__ import annotations

import numpy as np

_MAD_TO_SIGMA = 1.4826
_LONG_BURST_RATIO = 1.5


class ImpulseBlanker:
    """Finds the spectra of a block hit by impulses.

    Parameters
    ----------
    sigma : threshold k in robust standard deviations of the block's total powers
    taps : spectra reached by one frame (the filterbank's taps)
    """

    def __init__(self, sigma: float = 6.0, taps: int = 4):
        self.sigma = float(sigma)
        self.spread = max(int(taps) - 1, 0)
        self._carry = 0                 # spectra at the start of the next block to blank
        self._levels: dict = {}         # state -> level of the last block

    def reset(self) -> None:
        """A retune or noise-source change: no carry-over into unrelated spectra."""
        self._carry = 0

    def mask(self, totals: np.ndarray, state=None) -> tuple[np.ndarray, int]:
        """Spectra to blank, and how many separate impulses were found.

        Parameters
        ----------
        totals : float[m] total power of each spectrum of the block
        state : hashable key of the receiver state (LO, noise source) for the long-burst check

        Returns
        -------
        blank : bool[m]
        events : number of separate runs of hit spectra (before widening)
        """
        t = np.asarray(totals, dtype=np.float64)
        m = t.size
        blank = np.zeros(m, dtype=bool)
        if m == 0:
            return blank, 0
        level = float(np.median(t))
        sigma = _MAD_TO_SIGMA * float(np.median(np.abs(t - level)))
        prev = self._levels.get(state)
        if prev is not None and level > _LONG_BURST_RATIO * prev:
            self._carry = 0
            return np.ones(m, dtype=bool), 1          # the whole block: keep the old level
        self._levels[state] = level
        hit = t > level + self.sigma * sigma if sigma > 0 else np.zeros(m, dtype=bool)
        events = int(np.count_nonzero(hit[1:] & ~hit[:-1]) + hit[0]) if m else 0
        if self._carry:
            blank[: self._carry] = True
        if hit.any():
            s = self.spread
            idx = np.flatnonzero(hit)
            for i in idx:
                blank[max(i - s, 0): i + s + 1] = True
            self._carry = max(0, idx[-1] + s + 1 - m)
        else:
            self._carry = 0
        return blank, events
