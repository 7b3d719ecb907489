"""``spinflip bench``: DSP throughput and radiometer efficiency, side by side with a baseline.

Throughput
    The same 8-bit IQ samples for every contender: complex Gaussian noise of sigma = 0.15 full
    scale per component, quantised as the dongle's ADC does (:func:`complex_to_u8`: about
    19 codes rms, clipping negligible). Fed in blocks of the daemon's default size (262144
    samples), each contender converts every block with :func:`u8_to_complex` (conversion
    included on both sides) and then

    * ours (``pfb`` and ``fft``): channelizes it and adds the power and power-squared sums
      (:meth:`Channelizer.sums`), exactly what the daemon's spectrometer does per block;
    * baseline: ``scipy.signal.welch(x, nperseg=nchan, noverlap=0, window="hann",
      return_onesided=False, detrend=False)`` and adds its mean spectrum (no power-squared
      sum: the baseline does less work). ``detrend=False`` because ours does not detrend
      either; welch's default (``"constant"``) would only make the baseline slower.

    Each is timed with ``time.perf_counter``, best of three repetitions, the three contenders
    interleaved within each repetition so a slow moment of the machine hits all alike. The DSP
    runs on one core: numpy's element-wise work is single-threaded, the DFT is
    ``scipy.fft.fft(workers=1)``, and scipy.signal.welch uses scipy.fft's default of one worker.

Radiometer efficiency
    On simulated noise of known system temperature T (complex Gaussian, float, E|x|^2 = T; no
    quantisation), average groups of M spectra and measure the relative scatter of the averaged
    channel power about T, pooled over channels and groups::

        sigma_meas / T = sqrt(mean_(groups, channels) (Pbar - T)^2) / T.

    The radiometer equation (total power, K = 1; Wilson, Rohlfs & Huttemeister, *Tools of Radio
    Astronomy*) gives sigma / T = 1 / sqrt(B tau), here with B the channelizer's equivalent
    noise bandwidth ENBW_bins fs / N and tau = M N / fs, so B tau = ENBW_bins M. The figure is
    eta = (1 / sqrt(B tau)) / (sigma_meas / T): 1.0 is an ideal radiometer of bandwidth ENBW.
    The Hann FFT without overlap has independent spectra but ENBW = 1.5 channels (Harris 1978),
    so eta = 1 / sqrt(1.5) = 0.816: a third of the samples' weight is thrown away by the taper.
    The PFB channel is close to rectangular (ENBW ~ 1) with little correlation between
    successive spectra, so eta ~ 1. The value predicted from the coefficients
    (:attr:`Channelizer.expected_radiometer_efficiency`) is reported beside the measurement.
    With 16 groups of N channels the pooled estimate has ~16 N degrees of freedom
    (about 0.6 % error at N = 1024, more where neighbouring channels correlate).

Cost of interference flagging
    The daemon's spectrometer (:class:`Spectrometer`) on the same blocks, with and without its
    flagging (impulse blanking on 0.2 ms chunks, spectral kurtosis per channel and block), plus
    the carrier search once per 10 s of data; the share is t_flagged / t_plain - 1, both timed
    in the same repetitions.

References
----------
.. [1] T. L. Wilson, K. Rohlfs and S. Huttemeister, *Tools of Radio Astronomy*, Springer
       (radiometer equation, from memory of its chapter on receivers).
.. [2] F. J. Harris, Proc. IEEE 66, 51-83, 1978 (ENBW of the Hann window: 1.50 bins).
"""

from __future__ import annotations

import platform
import time

import numpy as np
import scipy
import scipy.signal

from spinflip.daemon.commands.bench_stages import bare_fft_ns, core_share, stage_profile
from spinflip.daemon.dsp.block import Block
from spinflip.daemon.dsp.channelizer import Channelizer, make_channelizer
from spinflip.daemon.dsp.samples import complex_to_u8, u8_to_complex
from spinflip.daemon.dsp.spectrometer import FlagSettings, Spectrometer
from spinflip.daemon.rfi.carriers import CarrierFinder

#: Reference sample rate for the real-time factor (the usual 8-bit dongle rate), samples/s.
REAL_TIME_RATE = 2.4e6
#: Noise level of the synthetic 8-bit data, per component, in units of full scale.
NOISE_SIGMA_FS = 0.15
#: Samples per block, as the daemon's default [source] block_samples.
BLOCK_SAMPLES = 262144
_REPEATS = 3


def _noise_u8(n: int, seed: int) -> np.ndarray:
    """``n`` complex samples of Gaussian noise, sigma 0.15 full scale per component, as uint8 IQ."""
    rng = np.random.default_rng(seed)
    x = np.empty(n, dtype=np.complex64)
    x.real = rng.standard_normal(n, dtype=np.float32)
    x.imag = rng.standard_normal(n, dtype=np.float32)
    x *= NOISE_SIGMA_FS
    return complex_to_u8(x)


def _blocks(raw: np.ndarray) -> list[np.ndarray]:
    step = 2 * BLOCK_SAMPLES
    return [raw[i:i + step] for i in range(0, raw.size, step)]


def _run_ours(blocks: list[np.ndarray], ch: Channelizer) -> int:
    """The daemon's per-block DSP: convert, channelize, sums of P and P^2."""
    ch.reset()
    nchan = ch.nchan
    s1, s2, m = np.zeros(nchan), np.zeros(nchan), 0
    for b in blocks:
        a1, a2, k = ch.sums(ch.load_u8(b))
        s1 += a1
        s2 += a2
        m += k
    return m


def _run_spectrometer(blocks: list[np.ndarray], nchan: int, taps: int,
                      flagging: FlagSettings | None, sample_rate: float) -> int:
    """The daemon's spectrometer over the blocks, with or without flagging (and carriers)."""
    sp = Spectrometer(nchan, "pfb", taps, flagging)
    finder = CarrierFinder(nchan) if flagging is not None else None
    per_integration = max(1, int(round(10.0 * sample_rate / BLOCK_SAMPLES)))
    for i, b in enumerate(blocks):
        sp.add(Block(raw=b, lo_hz=1.42e9, sample_rate=sample_rate, t0_unix_s=0.0, index=i))
        if finder is not None and (i + 1) % per_integration == 0:
            ph = sp.current.sums["sig"]
            finder.find(("sig", 1.42e9), ph.mean(), ph.m)
    return sp.take().sums["sig"].spectra


def _run_welch(blocks: list[np.ndarray], nchan: int) -> int:
    """Baseline: convert, scipy.signal.welch per block, sum of the mean spectra."""
    acc = np.zeros(nchan)
    for b in blocks:
        _, pxx = scipy.signal.welch(u8_to_complex(b), nperseg=nchan, noverlap=0, window="hann",
                                    return_onesided=False, detrend=False)
        acc += pxx
    return int(acc.size)


def radiometer_efficiency(method: str, nchan: int = 1024, taps: int = 4, seed: int = 1,
                          spectra_per_group: int = 300, groups: int = 16,
                          tsys: float = 1.0) -> float:
    """Measured radiometer efficiency eta of a channelizer on noise of known temperature.

    Parameters
    ----------
    method, nchan, taps : channelizer as for :func:`make_channelizer`.
    seed : int
        Random seed of the noise.
    spectra_per_group : int
        M, spectra averaged per group.
    groups : int
        Independent groups pooled.
    tsys : float
        Noise power E|x|^2 per complex sample (the "system temperature" in power units).

    Returns
    -------
    float
        eta = (1 / sqrt(ENBW_bins * M)) / (sigma_meas / tsys); see the module docstring.
    """
    ch = make_channelizer(method, nchan, taps=taps, streaming=False)
    rng = np.random.default_rng(seed + 1000)
    m_total = groups * spectra_per_group
    n = nchan * (m_total + ch.taps - 1)
    x = np.empty(n, dtype=np.complex64)
    s = np.float32(np.sqrt(tsys / 2.0))             # per component: E|x|^2 = 2 s^2 = tsys
    x.real = rng.standard_normal(n, dtype=np.float32) * s
    x.imag = rng.standard_normal(n, dtype=np.float32) * s
    p = ch.power(x)
    g = p.reshape(groups, spectra_per_group, nchan).mean(axis=1, dtype=np.float64)
    sigma_meas = np.sqrt(np.mean((g - tsys) ** 2)) / tsys
    sigma_radiometer = 1.0 / np.sqrt(ch.enbw_bins * spectra_per_group)   # 1/sqrt(B tau)
    return float(sigma_radiometer / sigma_meas)


def run_bench(seconds: float = 2.0, nchan: int = 1024, sample_rate: float = 2.4e6,
              seed: int = 1, taps: int = 4, cfg: dict | None = None) -> dict:
    """Measure DSP throughput against scipy.signal.welch, and radiometer efficiency.

    Parameters
    ----------
    seconds : float
        Seconds of data at ``sample_rate`` per measurement.
    nchan : int
        Channels (FFT length of every contender).
    sample_rate : float
        Sample rate of the data in samples/s: sets how many samples ``seconds`` is and the
        channel width for the ENBW in Hz.
    seed : int
        Random seed of the synthetic data.
    taps : int
        PFB taps.

    Returns
    -------
    dict
        ``throughput_msps`` {pfb, fft, welch} (Msamples/s, best of 3), ``realtime_factor_2p4``
        {pfb, fft} (throughput / 2.4 MS/s), ``ratio_vs_welch`` {pfb, fft},
        ``radiometer_efficiency`` {pfb, fft} (measured) and ``radiometer_efficiency_expected``
        {pfb, fft} (from the coefficients), ``enbw_bins`` and ``enbw_hz`` {pfb, fft},
        ``simulator`` {simulated_s_per_wall_s, block_samples, sample_rate} (the simulator alone
        under ``--fast``, :func:`spinflip.daemon.commands.bench_sim.simulator_speed`),
        ``spectrometer_msps`` {plain, flagged} (the daemon's PFB spectrometer without and with
        interference flagging), ``flagging_cost_share`` (t_flagged / t_plain - 1),
        ``nchan``, ``taps``, ``sample_rate``, ``seconds_of_data``, ``block_samples``,
        ``machine``, ``python``, ``numpy``, ``scipy``, ``threads`` (always 1: one core).
    """
    n = max(nchan, int(seconds * sample_rate) // nchan * nchan)
    raw = _noise_u8(n, seed)
    blocks = _blocks(raw)
    chans = {k: make_channelizer(k, nchan, taps=taps) for k in ("pfb", "fft")}
    xs = [u8_to_complex(b) for b in blocks]
    best = {"pfb": np.inf, "fft": np.inf, "bare_fft": np.inf, "welch": np.inf, "plain": np.inf,
            "flagged": np.inf}
    for _ in range(_REPEATS):
        for name in best:
            t0 = time.perf_counter()
            if name == "bare_fft":
                bare_fft_ns(xs, nchan)
            elif name == "welch":
                _run_welch(blocks, nchan)
            elif name == "plain":
                _run_spectrometer(blocks, nchan, taps, None, sample_rate)
            elif name == "flagged":
                _run_spectrometer(blocks, nchan, taps, FlagSettings(), sample_rate)
            else:
                _run_ours(blocks, chans[name])
            best[name] = min(best[name], time.perf_counter() - t0)
    msps = {k: n / v / 1e6 for k, v in best.items()}
    ours = ("pfb", "fft")
    if cfg is None:
        from spinflip.daemon.config import defaults
        cfg = defaults()
    fs_cfg = float(cfg["source"]["sample_rate"])
    raw_cfg = _noise_u8(max(int(cfg["spectrometer"]["channels"]) * 4, int(seconds * fs_cfg)),
                        seed + 7)
    from spinflip.daemon.commands.bench_sim import simulator_speed
    sim = simulator_speed(min(3.0, max(0.5, seconds)))
    return {
        "simulator": sim,
        "throughput_msps": {k: msps[k] for k in ("pfb", "fft", "bare_fft", "welch")},
        "fraction_of_bare_fft": {k: msps[k] / msps["bare_fft"] for k in ours},
        "stage_ns_per_sample": {k: stage_profile(blocks, chans[k]) for k in ours},
        "core_share": (cs := core_share(cfg, raw_cfg, raw_cfg.size / 2 / fs_cfg))["share"],
        "core_share_config": {k: v for k, v in cs.items() if k != "share"},
        "realtime_factor_2p4": {k: msps[k] * 1e6 / REAL_TIME_RATE for k in ours},
        "ratio_vs_welch": {k: msps[k] / msps["welch"] for k in ours},
        "spectrometer_msps": {"plain": msps["plain"], "flagged": msps["flagged"]},
        "flagging_cost_share": best["flagged"] / best["plain"] - 1.0,
        "radiometer_efficiency": {k: radiometer_efficiency(k, nchan, taps, seed) for k in ours},
        "radiometer_efficiency_expected": {k: chans[k].expected_radiometer_efficiency
                                           for k in ours},
        "enbw_bins": {k: chans[k].enbw_bins for k in ours},
        "enbw_hz": {k: chans[k].enbw_hz(sample_rate) for k in ours},
        "nchan": nchan, "taps": taps, "sample_rate": float(sample_rate),
        "seconds_of_data": n / sample_rate, "block_samples": BLOCK_SAMPLES, "threads": 1,
        "machine": platform.machine(), "python": platform.python_version(),
        "numpy": np.__version__, "scipy": scipy.__version__,
    }


def format_bench(r: dict) -> str:
    """Human-readable summary of :func:`run_bench`'s result."""
    t, rt, q = r["throughput_msps"], r["realtime_factor_2p4"], r["ratio_vs_welch"]
    e, ex, bw = r["radiometer_efficiency"], r["radiometer_efficiency_expected"], r["enbw_bins"]
    return "\n".join([
        f"spinflip bench: {r['nchan']} channels, {r['seconds_of_data']:.2f} s of "
        f"{r['sample_rate'] / 1e6:g} MS/s 8-bit data, DSP on one core "
        f"({r['machine']}, Python {r['python']}, numpy {r['numpy']}, scipy {r['scipy']})",
        "  throughput (u8 conversion included on every side; ours adds sums of P and P^2):",
        f"    PFB chain ({r['taps']} taps): {t['pfb']:7.1f} MS/s = {rt['pfb']:5.1f} x real time "
        f"at 2.4 MS/s, {q['pfb']:.2f} x scipy.signal.welch",
        f"    Hann FFT chain    : {t['fft']:7.1f} MS/s = {rt['fft']:5.1f} x real time "
        f"at 2.4 MS/s, {q['fft']:.2f} x scipy.signal.welch",
        f"    scipy.signal.welch: {t['welch']:7.1f} MS/s (Hann, no overlap, two-sided)",
        f"    bare scipy.fft.fft: {t['bare_fft']:7.1f} MS/s (complex64 rows of N, workers=1): "
        f"PFB chain {r['fraction_of_bare_fft']['pfb']:.2f}, Hann FFT chain "
        f"{r['fraction_of_bare_fft']['fft']:.2f} of it",
        "  per stage, ns per sample (conversion, taps/window, DFT, power, sums):",
        *[f"    {name:8}: " + ", ".join(f"{k} {v:.2f}" for k, v in r["stage_ns_per_sample"][key].items())
          for key, name in (("pfb", "PFB"), ("fft", "Hann FFT"))],
        f"  share of one core at the configured {r['core_share_config']['sample_rate'] / 1e6:g} MS/s, "
        f"{r['core_share_config']['nchan']} channels ({r['core_share_config']['method']}):",
        *[f"    {k:20}: {v:6.3f}" for k, v in r["core_share"].items()],
        "  interference flagging (impulses, spectral kurtosis, carriers) in the spectrometer:",
        f"    without {r['spectrometer_msps']['plain']:7.1f} MS/s, with "
        f"{r['spectrometer_msps']['flagged']:7.1f} MS/s: flagging adds "
        f"{100 * r['flagging_cost_share']:.0f} % to the DSP chain",
        f"  simulator (default configuration, --fast): {r['simulator']['simulated_s_per_wall_s']:.1f} "
        "simulated s per wall s",
        "  radiometer efficiency (1.0 = ideal radiometer of bandwidth ENBW):",
        f"    PFB     : {e['pfb']:.3f} measured, {ex['pfb']:.3f} expected, "
        f"ENBW {bw['pfb']:.3f} channels",
        f"    Hann FFT: {e['fft']:.3f} measured, {ex['fft']:.3f} expected, "
        f"ENBW {bw['fft']:.3f} channels",
    ])
