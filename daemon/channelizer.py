"""Channelizers: critically sampled polyphase filterbank (default) and windowed FFT.

PFB (Crochiere & Rabiner 1983; Price 2016, arXiv:1607.03579): a prototype low-pass
h[n] = sinc((n - (L-1)/2)/N) w[n], L = taps*N, Hann window w. Spectrum j from samples
x[jN .. jN + L): y_j[k] = sum_t h[tN + k] x[jN + tN + k] (weighted overlap-add), X_j = FFT(y_j).
Each spectrum consumes N new samples; the last (taps-1)*N samples are kept as history so that
contiguous calls give the same spectra as one long call, and ``reset()`` drops them (after a
retune). Power |X|^2 is normalised by sum(h^2) so white noise of variance s^2 per complex sample
has mean power s^2 in every channel; channels are fftshifted (DC at index N//2).
"""

from __future__ import annotations

import numpy as np
import scipy.fft
import scipy.signal


class Channelizer:
    def __init__(self, nchan: int, coeffs: np.ndarray, taps: int):
        self.nchan = nchan
        self.taps = taps
        self.coeffs = coeffs.astype(np.float32).reshape(taps, nchan)
        self.norm = np.float32(1.0 / np.sum(coeffs.astype(np.float64) ** 2))
        self._history = np.zeros(0, dtype=np.complex64)

    def reset(self) -> None:
        self._history = np.zeros(0, dtype=np.complex64)

    def power(self, x: np.ndarray) -> np.ndarray:
        """Power spectra (m, nchan) float32 of the samples, continuing from the history."""
        n, t = self.nchan, self.taps
        if self._history.size:
            x = np.concatenate([self._history, x.astype(np.complex64, copy=False)])
        m = max(0, (x.size - (t - 1) * n) // n)
        keep = (t - 1) * n
        self._history = x[m * n: m * n + keep].copy() if m else x[-keep:].copy() if keep else x[:0]
        if m == 0:
            return np.zeros((0, n), dtype=np.float32)
        rows = x[: (m + t - 1) * n].reshape(m + t - 1, n)
        y = rows[0:m] * self.coeffs[0]
        for k in range(1, t):
            y += rows[k:k + m] * self.coeffs[k]
        spec = scipy.fft.fft(y, axis=1, workers=1)
        p = spec.real ** 2 + spec.imag ** 2
        p *= self.norm
        return np.fft.fftshift(p, axes=1)

    @property
    def enbw_bins(self) -> float:
        """Equivalent noise bandwidth of one channel in bins: integral |H|^2 / |H(0)|^2."""
        h = self.coeffs.reshape(-1).astype(np.float64)
        w, resp = scipy.signal.freqz(h, worN=16384 * self.taps, whole=True)
        p = np.abs(resp) ** 2
        return float(p.mean() * 2 * np.pi / (2 * np.pi / self.nchan) / p[0])

    def enbw_hz(self, sample_rate: float) -> float:
        return self.enbw_bins * sample_rate / self.nchan


def make_channelizer(method: str, nchan: int, taps: int = 4) -> Channelizer:
    """``pfb``: polyphase filterbank with ``taps`` taps; ``fft``: Hann-windowed FFT."""
    if method == "pfb":
        L = taps * nchan
        n = np.arange(L)
        h = np.sinc((n - (L - 1) / 2) / nchan) * scipy.signal.get_window("hann", L, fftbins=False)
        return Channelizer(nchan, h, taps)
    if method == "fft":
        return Channelizer(nchan, scipy.signal.get_window("hann", nchan), 1)
    raise ValueError(f"unknown channelizer method {method!r}: expected 'pfb' or 'fft'")


def power_sums(power: np.ndarray):
    """(sum P, sum P^2, M) over the spectra axis, float64."""
    return power.sum(axis=0, dtype=np.float64), np.square(power, dtype=np.float64).sum(axis=0), power.shape[0]
