"""Channelizers: critically sampled polyphase filterbank (default) and windowed FFT.

PFB (Crochiere & Rabiner 1983; Price 2016, arXiv:1607.03579): a prototype low-pass
h[n] = sinc(1.2 (n - (L-1)/2)/N) w[n], L = taps*N, Hann window w. Spectrum j from samples
x[jN .. jN + L): y_j[k] = sum_t h[tN + k] x[jN + tN + k] (weighted overlap-add), X_j = FFT(y_j).
Each spectrum consumes N new samples; the last (taps-1)*N samples are kept as history so that
contiguous calls give the same spectra as one long call, and ``reset()`` drops them (after a
retune). Power |X|^2 is normalised by sum(h^2) so white noise of variance s^2 per complex sample
has mean power s^2 in every channel; channels are fftshifted (DC at index N//2).
"""

from __future__ import annotations

import numpy as np
import scipy.fft


_WIDTH = 1.2   # prototype passband width in channels (common practice: about -3 dB crossover)


class Channelizer:
    def __init__(self, nchan: int, coeffs: np.ndarray, taps: int):
        self.nchan = nchan
        self.taps = taps
        self.coeffs = coeffs.astype(np.float32).reshape(taps, nchan)
        # the same real coefficients interleaved (re, im) to weight complex samples viewed as float
        self._coeffs_iq = np.repeat(self.coeffs, 2, axis=1)
        self.norm = np.float32(1.0 / np.sum(coeffs.astype(np.float64) ** 2))
        self._history = np.zeros(0, dtype=np.complex64)

    def reset(self) -> None:
        self._history = np.zeros(0, dtype=np.complex64)

    _CHUNK = 128   # spectra per pass: keeps the working set in the CPU cache

    def _frames(self, x: np.ndarray):
        """Prepend the history, keep the new history, return (float view rows, m spectra)."""
        n, t = self.nchan, self.taps
        x = np.asarray(x, dtype=np.complex64)
        if self._history.size:
            x = np.concatenate([self._history, x])
        m = max(0, (x.size - (t - 1) * n) // n)
        self._history = x[m * n:].copy()       # every sample not yet consumed by a spectrum
        rows = x[: (m + t - 1) * n].view(np.float32).reshape(-1, 2 * n) if m else None
        return rows, m

    def _chunk_power(self, rows: np.ndarray, j: int, k: int) -> np.ndarray:
        """Power of spectra j..k-1 (FFT order): weighted overlap-add, FFT, |X|^2."""
        # y_j = sum_t c_t * x_(j + t) on the (re, im) float view, the coefficients interleaved
        y = rows[j:k] * self._coeffs_iq[0]
        for t in range(1, self.taps):
            y += rows[j + t:k + t] * self._coeffs_iq[t]
        spec = scipy.fft.fft(y.view(np.complex64), axis=1, workers=1, overwrite_x=True)
        p = spec.real ** 2
        p += spec.imag ** 2
        p *= self.norm
        return p

    def power(self, x: np.ndarray) -> np.ndarray:
        """Power spectra (m, nchan) float32 of ``x`` after the history, fftshifted (DC at nchan // 2)."""
        rows, m = self._frames(x)
        out = np.empty((m, self.nchan), dtype=np.float32)
        for j in range(0, m, self._CHUNK):
            k = min(m, j + self._CHUNK)
            out[j:k] = self._chunk_power(rows, j, k)
        return np.fft.fftshift(out, axes=1)

    def sums(self, x: np.ndarray):
        """(S1 = sum P, S2 = sum P^2, M) of the spectra of ``x``, fftshifted, S1 and S2 float64.

        Summed in float32 over runs of 128 spectra (relative rounding below 1e-5), accumulated
        in float64; the power spectra themselves are never all held at once.
        """
        rows, m = self._frames(x)
        s1 = np.zeros(self.nchan)
        s2 = np.zeros(self.nchan)
        for j in range(0, m, self._CHUNK):
            p = self._chunk_power(rows, j, min(m, j + self._CHUNK))
            s1 += p.sum(axis=0)
            p *= p
            s2 += p.sum(axis=0)
        return np.fft.fftshift(s1), np.fft.fftshift(s2), m

    @property
    def enbw_bins(self) -> float:
        """Equivalent noise bandwidth of one channel in bins: integral |H|^2 / |H(0)|^2."""
        # Parseval: mean of |H|^2 over the circle is sum h^2, |H(0)|^2 = (sum h)^2, one bin 1/N
        h = self.coeffs.reshape(-1).astype(np.float64)
        return float(self.nchan * np.sum(h ** 2) / np.sum(h) ** 2)

    def enbw_hz(self, sample_rate: float) -> float:
        return self.enbw_bins * sample_rate / self.nchan


def make_channelizer(method: str, nchan: int, taps: int = 4) -> Channelizer:
    """``pfb``: polyphase filterbank with ``taps`` taps; ``fft``: Hann-windowed FFT."""
    if method == "pfb":
        L = taps * nchan
        n = np.arange(L)
        # the sinc is widened by 1.2 so neighbouring channels cross near -3 dB (about -3.2 dB)
        # and the channel's ENBW is close to one bin; at 1.0 they would cross at -6 dB
        h = np.sinc(_WIDTH * (n - (L - 1) / 2) / nchan) * np.hanning(L)   # symmetric Hann
        return Channelizer(nchan, h, taps)
    if method == "fft":
        k = np.arange(nchan)                      # periodic Hann, as for spectral analysis
        return Channelizer(nchan, 0.5 - 0.5 * np.cos(2 * np.pi * k / nchan), 1)
    raise ValueError(f"unknown channelizer method {method!r}: expected 'pfb' or 'fft'")


