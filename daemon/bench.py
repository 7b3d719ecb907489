"""``spinflip bench``: DSP throughput and radiometer efficiency, side by side with a baseline.

Throughput: on the same 8-bit IQ samples (Gaussian noise quantised as the dongle does), the
DSP chain (LUT conversion, channelizer, sums of power and power squared) against
``scipy.signal.welch`` (Hann window, same FFT length, no overlap, two-sided; conversion included
on both sides). Best of three interleaved repetitions each, one core (numpy and scipy.fft
are single-threaded here). Figures are ratios against the baseline of the same run.

Radiometer efficiency: eta = sigma_ideal / sigma_measured, with sigma_ideal / T = 1 / sqrt(B tau)
(radiometer equation, total power, K = 1; Wilson, Rohlfs & Huttemeister, Tools of Radio
Astronomy), B the channelizer's equivalent noise bandwidth and tau the averaged time, and
sigma_measured the relative standard deviation over channels of the averaged spectrum of
noise of known temperature.
"""

from __future__ import annotations

import platform
import time

import numpy as np
import scipy
import scipy.signal

from .channelizer import make_channelizer
from .samples import complex_to_u8, u8_to_complex

REAL_TIME_RATE = 2.4e6


def _noise_u8(n: int, seed: int) -> np.ndarray:
    rng = np.random.default_rng(seed)
    x = (0.15 * (rng.standard_normal(n, dtype=np.float32)
                 + 1j * rng.standard_normal(n, dtype=np.float32))).astype(np.complex64)
    return complex_to_u8(x)


def _chain(raw: np.ndarray, method: str, nchan: int, taps: int):
    ch = make_channelizer(method, nchan, taps=taps)
    return ch.sums(u8_to_complex(raw))


def _welch(raw: np.ndarray, nchan: int):
    return scipy.signal.welch(u8_to_complex(raw), nperseg=nchan, noverlap=0, window="hann",
                              return_onesided=False, detrend=False)


def _efficiency(method: str, nchan: int, taps: int, seed: int, n_spectra: int = 4800) -> float:
    ch = make_channelizer(method, nchan, taps=taps)
    rng = np.random.default_rng(seed + 1)
    n = nchan * (n_spectra + taps)
    x = (rng.standard_normal(n, dtype=np.float32) + 1j * rng.standard_normal(n, dtype=np.float32))
    p = ch.power(x.astype(np.complex64))
    groups = 16                                   # pooled over channels and 16 time groups:
    m = p.shape[0] // groups                      # ~15000 degrees of freedom, 0.6 % error
    keep = np.r_[8:nchan // 2 - 2, nchan // 2 + 3:nchan - 8]
    g = p[: groups * m, keep].reshape(groups, m, keep.size).mean(axis=1)
    measured = np.sqrt(np.mean(g.var(axis=0, ddof=1) / g.mean(axis=0) ** 2))
    ideal = 1.0 / np.sqrt(ch.enbw_bins * m)      # B tau = (ENBW bins * df) * (m / df)
    return float(ideal / measured)


def run_bench(seconds: float = 2.0, nchan: int = 1024, taps: int = 4, seed: int = 1) -> dict:
    """Measure throughput (MS/s, real-time factor at 2.4 MS/s, ratio to welch) and efficiency."""
    n = int(seconds * REAL_TIME_RATE) // nchan * nchan
    raw = _noise_u8(n, seed)
    best = {"pfb": np.inf, "fft": np.inf, "welch": np.inf}
    for _ in range(3):
        for name in best:
            t0 = time.perf_counter()
            if name == "welch":
                _welch(raw, nchan)
            else:
                _chain(raw, name, nchan, taps)
            best[name] = min(best[name], time.perf_counter() - t0)
    msps = {k: n / v / 1e6 for k, v in best.items()}
    return {
        "throughput_msps": msps,
        "realtime_factor_2p4": {k: msps[k] * 1e6 / REAL_TIME_RATE for k in ("pfb", "fft")},
        "ratio_vs_welch": {k: msps[k] / msps["welch"] for k in ("pfb", "fft")},
        "radiometer_efficiency": {k: _efficiency(k, nchan, taps, seed) for k in ("pfb", "fft")},
        "nchan": nchan, "taps": taps, "seconds_of_data": n / REAL_TIME_RATE,
        "machine": platform.machine(), "python": platform.python_version(),
        "numpy": np.__version__, "scipy": scipy.__version__,
    }


def format_bench(r: dict) -> str:
    t, rt, q, e = (r["throughput_msps"], r["realtime_factor_2p4"], r["ratio_vs_welch"],
                   r["radiometer_efficiency"])
    return "\n".join([
        f"spinflip bench: {r['nchan']} channels, {r['seconds_of_data']:.2f} s of 2.4 MS/s data, "
        f"one core ({r['machine']}, numpy {r['numpy']})",
        f"  PFB chain ({r['taps']} taps): {t['pfb']:7.1f} MS/s = {rt['pfb']:5.1f} x real time, "
        f"{q['pfb']:.2f} x scipy.signal.welch",
        f"  Hann FFT chain   : {t['fft']:7.1f} MS/s = {rt['fft']:5.1f} x real time, "
        f"{q['fft']:.2f} x scipy.signal.welch",
        f"  welch baseline   : {t['welch']:7.1f} MS/s",
        f"  radiometer efficiency (B = ENBW): PFB {e['pfb']:.3f}, Hann FFT {e['fft']:.3f}",
    ])
