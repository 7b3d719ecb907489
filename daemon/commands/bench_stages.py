"""Where ``spinflip bench``'s time goes: per-stage profile, share of one core, scaling with N.

Per-stage profile
    One chain (:class:`Channelizer` fed from bytes, as the spectrometer does) run pass by pass
    with a ``time.perf_counter`` around each stage: conversion (:meth:`Channelizer.load_u8`),
    taps (weighted overlap-add; for the Hann FFT the window product), DFT
    (``scipy.fft.fft(workers=1, overwrite_x=True)``), power (|X|^2 from the float view) and
    sums (S1, S2). Given in ns per sample; the timers cost about 0.1 ns per sample.

Share of one core
    For the configured sample rate fs and channel count N, t_stage / T where t_stage is the
    time a stage takes for T seconds of data at fs (measured on T = ``seconds`` of synthetic
    8-bit noise): conversion, channelizer (taps and DFT), power and accumulation, flagging
    (impulse search, spectral kurtosis), and calibration with the fold (once per
    ``spectrometer.integration_s``). 1.0 means the stage alone needs the whole core.

Scaling
    Throughput of both chains and the peak of memory allocated through Python during a run
    (``tracemalloc``: numpy's arrays are counted, the interpreter's own memory is not) over
    channel counts 256 .. 16384. The growth of the cost is reported as the slope
    d(ns per sample) / d(log2 N), fitted by least squares: an FFT costs about N log2 N per
    spectrum, so per sample its time grows linearly in log2 N; the conversion, the taps and
    the power are flat per sample. The fitted exponent of the throughput, b in
    msps ~ N^b, is given too.
"""

from __future__ import annotations

import time
import tracemalloc

import numpy as np
import scipy.fft

from spinflip.daemon.calibration.kelvin import calibrate
from spinflip.daemon.dsp.block import REF, SIG
from spinflip.daemon.dsp.channelizer import Channelizer, make_channelizer
from spinflip.daemon.dsp.spectrometer import Integration, PhaseSums
from spinflip.daemon.rfi.impulses import ImpulseBlanker
from spinflip.daemon.rfi.spectral_kurtosis import sk_flags

#: Channel counts of ``spinflip bench --scaling``.
SCALING_CHANNELS = (256, 512, 1024, 2048, 4096, 8192, 16384)
#: Stages of the per-stage profile, in order.
PROFILE_STAGES = ("conversion", "taps", "dft", "power", "sums")
#: Stages of the core share, in order.
CORE_STAGES = ("conversion", "channelizer", "power_accumulation", "flagging_impulses",
               "flagging_sk", "calibration_fold")


def _blocks(raw: np.ndarray, block_samples: int) -> list[np.ndarray]:
    step = 2 * block_samples
    return [raw[i:i + step] for i in range(0, raw.size, step)]


def _profile_block(ch: Channelizer, raw: np.ndarray, t: dict) -> tuple[np.ndarray, np.ndarray]:
    """One block through the channelizer's own steps, each timed into ``t`` (seconds)."""
    t0 = time.perf_counter()
    x = ch.load_u8(raw)
    t1 = time.perf_counter()
    t["conversion"] += t1 - t0
    stream, u8 = ch._stream(x)
    m = ch.n_spectra(stream.size)
    s1, s2 = np.zeros(ch.nchan), np.zeros(ch.nchan)
    if m:
        rows = ch._rows(stream, m)
        h = ch._coeffs_iq_u8 if u8 else ch._coeffs_iq
        for j in range(0, m, ch.chunk_spectra):
            k = min(m, j + ch.chunk_spectra)
            c = k - j
            y, p = ch._work(c)
            a = time.perf_counter()
            if ch.taps == 1:
                np.multiply(rows[j:k], h[0], out=y)
            else:
                s0, s1_ = rows.strides
                v = np.lib.stride_tricks.as_strided(rows[j:], shape=(ch.taps, c, y.shape[1]),
                                                    strides=(s0, s0, s1_), writeable=False)
                np.einsum("tjn,tn->jn", v, h, out=y)
            b = time.perf_counter()
            spec = scipy.fft.fft(y.view(np.complex64), axis=1, workers=1, overwrite_x=True)
            c_ = time.perf_counter()
            f = spec.view(np.float32)
            np.square(f, out=f)
            np.add(f[:, 0::2], f[:, 1::2], out=p)
            d = time.perf_counter()
            s1 += p.sum(axis=0)
            np.square(p, out=p)
            s2 += p.sum(axis=0)
            e = time.perf_counter()
            t["taps"] += b - a
            t["dft"] += c_ - b
            t["power"] += d - c_
            t["sums"] += e - d
    ch._keep(stream, m, u8)
    return s1, s2


def stage_profile(blocks: list[np.ndarray], ch: Channelizer, repeats: int = 3) -> dict:
    """Per-stage time of one chain in ns per sample (best of ``repeats`` per stage)."""
    n = sum(b.size // 2 for b in blocks)
    best = {k: np.inf for k in PROFILE_STAGES}
    for _ in range(repeats):
        ch.reset()
        t = {k: 0.0 for k in PROFILE_STAGES}
        for b in blocks:
            _profile_block(ch, b, t)
        best = {k: min(best[k], t[k]) for k in PROFILE_STAGES}
    out = {k: best[k] / n * 1e9 for k in PROFILE_STAGES}
    out["total"] = sum(out[k] for k in PROFILE_STAGES)
    return out


def bare_fft_ns(xs: list[np.ndarray], nchan: int) -> float:
    """ns per sample of ``scipy.fft.fft(workers=1)`` on rows of N complex64 samples, one call
    per block (the block's whole rows), output allocated: the bare-DFT reference."""
    n = 0
    t0 = time.perf_counter()
    for x in xs:
        rows = x[: x.size // nchan * nchan].reshape(-1, nchan)
        scipy.fft.fft(rows, axis=1, workers=1)
        n += rows.size
    return (time.perf_counter() - t0) / max(n, 1) * 1e9


def core_share(cfg: dict, raw: np.ndarray, seconds: float, repeats: int = 3) -> dict:
    """Share of one core each stage needs at the configured sample rate and channel count.

    Parameters
    ----------
    cfg : configuration (:func:`spinflip.daemon.config.load`)
    raw : interleaved 8-bit IQ, ``seconds`` of data at ``source.sample_rate``
    seconds : seconds of data in ``raw``
    repeats : best of this many runs per stage

    Returns
    -------
    dict
        {stage: share of one core} for :data:`CORE_STAGES` and ``"total"``; plus
        ``"sample_rate"``, ``"nchan"``, ``"method"``, ``"taps"`` of the configuration.
    """
    src, sp, rfi, sw = cfg["source"], cfg["spectrometer"], cfg["rfi"], cfg["switching"]
    fs, nchan = float(src["sample_rate"]), int(sp["channels"])
    ch = make_channelizer(sp["method"], nchan, taps=sp["taps"])
    blocks = _blocks(raw, int(src["block_samples"]))
    prof = stage_profile(blocks, ch, repeats)
    ns = {"conversion": prof["conversion"], "channelizer": prof["taps"] + prof["dft"],
          "power_accumulation": prof["power"] + prof["sums"],
          "flagging_impulses": 0.0, "flagging_sk": 0.0, "calibration_fold": 0.0}
    n = raw.size // 2
    xs = [ch.load_u8(b).copy() for b in blocks]
    if rfi["impulses"]:
        best = np.inf
        for _ in range(repeats):
            bl = ImpulseBlanker(rfi["impulse_sigma"], nchan, ch.taps)
            t0 = time.perf_counter()
            for x in xs:
                bl.mask(x, ch.history_samples, ch.n_spectra(x.size), ("sig", 0.0))
            best = min(best, time.perf_counter() - t0)
        ns["flagging_impulses"] = best / n * 1e9
    if rfi["sk"]:
        s1 = np.full(nchan, 100.0)
        s2 = np.full(nchan, 100.0 ** 2 / 50 * 2)
        m = max(16, int(src["block_samples"]) // nchan)
        best = np.inf
        for _ in range(repeats):
            t0 = time.perf_counter()
            for _x in xs:
                sk_flags(s1, s2, m, rfi["sk_pfa"])
            best = min(best, time.perf_counter() - t0)
        ns["flagging_sk"] = best / n * 1e9
    # calibration and fold: once per integration, scaled to the time per second of data
    integ = Integration(sums={SIG: PhaseSums(nchan), REF: PhaseSums(nchan)})
    rng = np.random.default_rng(0)
    for ph in integ.sums.values():
        ph.s1[:] = 100.0 + rng.random(nchan)
        ph.m[:] = 100.0
        ph.spectra, ph.exposure_s = 100, 1.0
    switched = sw["mode"] == "frequency"
    shift = round(sw["offset_hz"] / (fs / nchan)) if switched else 0
    best = np.inf
    for _ in range(max(repeats, 5)):
        t0 = time.perf_counter()
        calibrate(integ, nchan, shift, switched, 100.0)
        best = min(best, time.perf_counter() - t0)
    ns["calibration_fold"] = best / (sp["integration_s"] * fs) * 1e9
    share = {k: ns[k] * 1e-9 * fs for k in CORE_STAGES}      # s of CPU per s of data
    share["total"] = sum(share[k] for k in CORE_STAGES)
    return {"share": share, "sample_rate": fs, "nchan": nchan, "method": sp["method"],
            "taps": ch.taps, "seconds_of_data": seconds}


def _chain_msps(blocks: list[np.ndarray], ch: Channelizer, repeats: int) -> float:
    n = sum(b.size // 2 for b in blocks)
    best = np.inf
    for _ in range(repeats):
        ch.reset()
        t0 = time.perf_counter()
        for b in blocks:
            ch.sums(ch.load_u8(b))
        best = min(best, time.perf_counter() - t0)
    return n / best / 1e6


def _peak_bytes(blocks: list[np.ndarray], method: str, nchan: int, taps: int) -> int:
    """Peak memory allocated while a fresh channelizer processes the blocks (tracemalloc)."""
    started = not tracemalloc.is_tracing()
    if started:
        tracemalloc.start()
    tracemalloc.reset_peak()
    base = tracemalloc.get_traced_memory()[0]
    ch = make_channelizer(method, nchan, taps=taps)
    for b in blocks:
        ch.sums(ch.load_u8(b))
    peak = tracemalloc.get_traced_memory()[1] - base
    if started:
        tracemalloc.stop()
    return int(peak)


def run_scaling(raw: np.ndarray, block_samples: int, taps: int = 4,
                channels: tuple[int, ...] = SCALING_CHANNELS, repeats: int = 3) -> dict:
    """Throughput and peak memory of both chains over channel counts; fitted growth.

    Returns
    -------
    dict
        ``channels`` [N...]; ``msps`` {pfb: [...], fft: [...]}; ``ns_per_sample``
        {pfb: [...], fft: [...]}; ``peak_mb`` {pfb: [...], fft: [...]} (tracemalloc);
        ``ns_per_sample_per_log2n`` {pfb, fft} (least-squares slope of ns per sample against
        log2 N) and ``throughput_exponent`` {pfb, fft} (b in msps ~ N^b, least squares in
        log-log).
    """
    blocks = _blocks(raw, block_samples)
    out: dict = {"channels": list(channels), "msps": {}, "ns_per_sample": {}, "peak_mb": {},
                 "ns_per_sample_per_log2n": {}, "throughput_exponent": {},
                 "block_samples": block_samples, "taps": taps}
    lg = np.log2(np.asarray(channels, dtype=float))
    for method in ("pfb", "fft"):
        msps = [_chain_msps(blocks, make_channelizer(method, n, taps=taps), repeats)
                for n in channels]
        nsps = [1e3 / v for v in msps]
        out["msps"][method] = msps
        out["ns_per_sample"][method] = nsps
        out["peak_mb"][method] = [_peak_bytes(blocks, method, n, taps) / 1e6 for n in channels]
        if len(channels) >= 2:
            out["ns_per_sample_per_log2n"][method] = float(np.polyfit(lg, nsps, 1)[0])
            out["throughput_exponent"][method] = float(np.polyfit(np.log(channels),
                                                                  np.log(msps), 1)[0])
        else:
            out["ns_per_sample_per_log2n"][method] = float("nan")
            out["throughput_exponent"][method] = float("nan")
    return out


def format_scaling(r: dict) -> str:
    """Text table of :func:`run_scaling`'s result."""
    lines = ["spinflip bench --scaling: both chains from 8-bit samples (conversion included), "
             f"blocks of {r['block_samples']} samples, PFB {r['taps']} taps; peak memory "
             "allocated by the run (tracemalloc)",
             f"  {'channels':>8}  {'PFB MS/s':>9} {'ns/sample':>9} {'peak MB':>8}   "
             f"{'FFT MS/s':>9} {'ns/sample':>9} {'peak MB':>8}"]
    for i, n in enumerate(r["channels"]):
        lines.append(f"  {n:>8}  {r['msps']['pfb'][i]:9.1f} {r['ns_per_sample']['pfb'][i]:9.2f} "
                     f"{r['peak_mb']['pfb'][i]:8.1f}   {r['msps']['fft'][i]:9.1f} "
                     f"{r['ns_per_sample']['fft'][i]:9.2f} {r['peak_mb']['fft'][i]:8.1f}")
    g, b = r["ns_per_sample_per_log2n"], r["throughput_exponent"]
    lines.append(f"  cost growth (least squares): PFB {g['pfb']:+.3f} ns per sample per doubling "
                 f"of N (throughput ~ N^{b['pfb']:+.3f}); Hann FFT {g['fft']:+.3f} ns per "
                 f"sample per doubling (~ N^{b['fft']:+.3f})")
    return "\n".join(lines)
