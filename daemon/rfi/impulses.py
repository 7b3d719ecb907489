"""Time-domain impulse blanking: spectra hit by short broadband bursts leave the accumulation.

The samples of a block are cut into chunks of C = 512 samples (0.2 ms at 2.4 MS/s); each chunk
has a power E_c = sum |x|^2. For Gaussian noise E_c fluctuates by 1/sqrt(C) of its mean (4 %),
while a burst from a spark, a switching supply or a radar pulse raises it many times. Against
a robust level of the block,

    level = median_c E_c,     sigma = 1.4826 median_c |E_c - level|     (MAD, Gaussian-consistent)

a chunk is hit when E_c > level + k sigma (``rfi.impulse_sigma`` = k). Working on the samples
rather than on the spectra keeps a burst's energy together: a polyphase spectrum spreads one
frame over ``taps`` spectra with the prototype's weights, diluting it.

Every spectrum whose window (``taps`` frames of N samples) overlaps a hit chunk is blanked.
Hits in a block's last samples also reach the first spectra of the next block (the
channelizer keeps those samples as its history), so they are carried over, until a retune or a
noise-source change drops the history. A block whose level jumps above 1.5 times the previous
level of the same (LO, noise-source) state is blanked whole: a burst longer than half a block.

The median and MAD are robust as long as bursts hit under half of a block's chunks.

References
----------
Rousseeuw, P. J. & Croux, C. 1993, JASA 88, 1273 (median absolute deviation, 1.4826).
Common practice in radio astronomy for time-domain blanking of impulsive interference.
"""

from __future__ import annotations

from collections.abc import Hashable

import numpy as np

from spinflip.daemon.dsp.robust import robust_sigma

_LONG_BURST_RATIO = 1.5
CHUNK_SAMPLES = 512


def chunk_powers(x: np.ndarray, chunk: int = CHUNK_SAMPLES) -> tuple[np.ndarray, np.ndarray]:
    """(E, start): power of consecutive ``chunk``-sample runs of complex ``x`` and their first
    sample; a last, overlapping chunk covers the tail."""
    n = x.size // chunk
    f = np.ascontiguousarray(x, dtype=np.complex64).view(np.float32)
    a = f[: 2 * n * chunk].reshape(n, 2 * chunk)
    e = np.einsum("ij,ij->i", a, a).astype(np.float64)     # sum of re^2 + im^2 per chunk
    starts = np.arange(n) * chunk
    if x.size % chunk and x.size >= chunk:
        t = f[-2 * chunk:]
        tail = float(np.dot(t, t))
        e = np.append(e, tail)
        starts = np.append(starts, x.size - chunk)
    return e, starts


class ImpulseBlanker:
    """Finds the spectra of a block hit by impulses.

    Parameters
    ----------
    sigma : threshold k in robust standard deviations of the chunk powers
    nchan : N, samples per frame
    taps : frames per spectrum (the filterbank's taps)
    """

    def __init__(self, sigma: float = 6.0, nchan: int = 1024, taps: int = 4):
        self.sigma = float(sigma)
        self.nchan = int(nchan)
        self.window = int(taps) * self.nchan
        self._tail_hits: list = []      # hit ranges of the last block, as offsets from its end
        self._levels: dict = {}         # state -> level of the last block

    def reset(self) -> None:
        """A retune or noise-source change: the channelizer's history, and our carry, go."""
        self._tail_hits = []

    def mask(self, x: np.ndarray, history: int, n_spectra: int,
             state: Hashable | None = None) -> tuple[np.ndarray, int]:
        """Spectra to blank among the ``n_spectra`` the channelizer makes of history + ``x``.

        Parameters
        ----------
        x : complex64 samples of the block (after settle blanking)
        history : samples the channelizer puts in front of ``x`` (its history)
        n_spectra : spectra it makes of them; spectrum j covers stream samples
            [j N, j N + taps N), the stream being history followed by ``x``
        state : hashable receiver state (LO, noise source) for the long-burst check

        Returns
        -------
        blank : bool[n_spectra]
        events : number of separate impulses found in ``x``
        """
        blank = np.zeros(n_spectra, dtype=bool)
        ranges = [(history - b, history - a) for a, b in self._tail_hits]    # carried over
        self._tail_hits = []
        events = 0
        if x.size >= CHUNK_SAMPLES:
            e, starts = chunk_powers(x)
            level = float(np.median(e))
            prev = self._levels.get(state)
            if prev is not None and level > _LONG_BURST_RATIO * prev:
                blank[:] = True
                return blank, 1                   # the whole block; keep the old level
            self._levels[state] = level
            sigma = float(robust_sigma(e))       # 1.4826 MAD (dsp.robust)
            hit = e > level + self.sigma * sigma if sigma > 0 else np.zeros(e.size, bool)
            if hit.any():
                idx = np.flatnonzero(hit)
                events = int(1 + np.count_nonzero(np.diff(idx) > 1))
                for i in idx:
                    a, b = int(starts[i]), int(starts[i]) + CHUNK_SAMPLES
                    ranges.append((history + a, history + b))
                    if b > x.size - self.window:  # still in the next block's history
                        self._tail_hits.append((x.size - b, x.size - a))
        n, w = self.nchan, self.window
        for a, b in ranges:                       # stream samples [a, b) hit
            j0 = max(0, -(-(a - w + 1) // n))     # first j with j N + w > a
            j1 = min(n_spectra, (b - 1) // n + 1)  # last j with j N < b, plus one
            if j1 > j0:
                blank[j0:j1] = True
        return blank, events
