"""Channelizers against scipy.signal, the published window figures and the radiometer equation."""

import numpy as np
import pytest
import scipy.signal

from spinflip.daemon.commands.bench import radiometer_efficiency, run_bench
from spinflip.daemon.dsp.channelizer import (
    Channelizer,
    StreamingChannelizer,
    make_channelizer,
    power_sums,
)

N = 256
FS = 2.4e6


def _noise(n, seed=0, sigma=0.2):
    """Complex Gaussian noise, ``sigma`` per component: E|x|^2 = 2 sigma^2."""
    rng = np.random.default_rng(seed)
    return (sigma * (rng.standard_normal(n) + 1j * rng.standard_normal(n))).astype(np.complex64)


def _tone(freq_bins, n_frames=64, amplitude=1.0):
    n = np.arange(N * n_frames)
    return (amplitude * np.exp(2j * np.pi * (freq_bins / N) * n)).astype(np.complex64)


def _tone_response(method, offset_bins, window="hann", centre=10):
    return make_channelizer(method, N, taps=4, window=window).power(
        _tone(centre + offset_bins)).mean(axis=0)


# ------------------------------------------------------------------------- level
@pytest.mark.parametrize("method", ["pfb", "fft"])
def test_white_noise_level_matches_scipy_welch(method):
    # Reference: scipy.signal.welch on the same samples (Hann, nperseg N, no overlap,
    # two-sided). Our channel power is normalised to the input variance: welch 'density'
    # times fs, or welch 'spectrum' times N / ENBW_bins. Same level within 1 %.
    sigma = 0.2
    x = _noise(N * 4000, seed=1, sigma=sigma)
    ch = make_channelizer(method, N, taps=4)
    ours = ch.power(x).mean()
    kw = dict(fs=FS, window="hann", nperseg=N, noverlap=0, return_onesided=False, detrend=False)
    _, dens = scipy.signal.welch(x, scaling="density", **kw)
    _, spec = scipy.signal.welch(x, scaling="spectrum", **kw)
    assert ours == pytest.approx(dens.mean() * FS, rel=0.01)
    assert ours == pytest.approx(spec.mean() * N / make_channelizer("fft", N).enbw_bins, rel=0.01)
    assert ours == pytest.approx(2 * sigma ** 2, rel=0.01)   # the variance put in


def test_hann_fft_equals_welch_channel_by_channel():
    # With the same segments and window our FFT spectrum is welch's density * fs, fftshifted.
    x = _noise(N * 300, seed=2)
    ours = make_channelizer("fft", N).power(x).mean(axis=0, dtype=np.float64)
    f, dens = scipy.signal.welch(x, fs=FS, window="hann", nperseg=N, noverlap=0,
                                 return_onesided=False, detrend=False)
    np.testing.assert_allclose(ours, np.fft.fftshift(dens) * FS, rtol=2e-4)
    # and welch's frequency axis, shifted, is ours: channel k at (k - N // 2) fs / N
    np.testing.assert_allclose(np.fft.fftshift(f), (np.arange(N) - N // 2) * FS / N)


# ------------------------------------------------------------------- tone, order
@pytest.mark.parametrize("method", ["pfb", "fft"])
@pytest.mark.parametrize("k0", [37, -50, 0])
def test_tone_lands_in_its_channel(method, k0):
    # fftshift order: channel k has frequency (k - N // 2) fs / N, lowest first
    freq_hz = k0 * FS / N
    p = make_channelizer(method, N, taps=4).power(_tone(k0)).mean(axis=0)
    k = int(np.argmax(p))
    assert (k - N // 2) * FS / N == pytest.approx(freq_hz)
    assert k == N // 2 + k0


@pytest.mark.parametrize("method", ["pfb", "fft"])
def test_tone_peak_is_coherent_gain_over_enbw(method):
    # A tone of amplitude A gives |X|^2 = A^2 (sum h)^2; over sum h^2 that is A^2 N / ENBW_bins
    # (Harris 1978, Proc. IEEE 66, 51: ENBW = N sum w^2 / (sum w)^2).
    ch = make_channelizer(method, N, taps=4)
    p = ch.power(_tone(5, amplitude=0.3)).mean(axis=0)
    assert p.max() == pytest.approx(0.09 * N / ch.enbw_bins, rel=1e-4)


# --------------------------------------------------------------- Hann FFT figures
def test_hann_fft_scalloping_enbw_and_neighbours():
    # Harris 1978, Proc. IEEE 66, 51, table 1: Hann window scalloping loss 1.42 dB, ENBW 1.50
    # bins. The periodic Hann DFT is (-1/4, 1/2, -1/4): a bin-centred tone shows -6.02 dB in the
    # two neighbouring channels and nothing further out.
    p0 = _tone_response("fft", 0.0)
    p_half = _tone_response("fft", 0.5)
    assert 10 * np.log10(p0.max() / p_half.max()) == pytest.approx(1.42, abs=0.02)
    assert make_channelizer("fft", N).enbw_bins == pytest.approx(1.50, abs=1e-6)
    c = N // 2 + 10
    assert 10 * np.log10(p0[c + 1] / p0[c]) == pytest.approx(-6.02, abs=0.01)
    assert 10 * np.log10(p0[c - 1] / p0[c]) == pytest.approx(-6.02, abs=0.01)
    assert p0[c + 2] / p0[c] < 1e-8


# ---------------------------------------------------------------- PFB response
@pytest.mark.parametrize("window", ["hann", "hamming", "kaiser"])
def test_pfb_response_matches_prototype_filter_frequency_response(window):
    # The PFB channel response is the prototype's |H(f)|^2 moved to the channel centre
    # (Crochiere & Rabiner 1983); reference: scipy.signal.freqz of the same coefficients.
    ch = make_channelizer("pfb", N, taps=4, window=window)
    h = ch.coeffs.reshape(-1).astype(np.float64)
    c = N // 2 + 10
    peak = _tone_response("pfb", 0.0, window).max()

    def freqz_db(offsets_bins):
        _, H = scipy.signal.freqz(h, worN=2 * np.pi * np.r_[0.0, offsets_bins] / N)
        return 10 * np.log10(np.abs(H[1:]) ** 2 / np.abs(H[0]) ** 2)

    for off in (0.25, 0.5):                      # scalloping: the tone off the channel centre
        meas = 10 * np.log10(_tone_response("pfb", off, window) / peak)
        ref = freqz_db([off, off - 1])            # seen by channel k and by channel k + 1
        assert meas[c] == pytest.approx(ref[0], abs=0.1)
        assert meas[c + 1] == pytest.approx(ref[1], abs=0.1)
        assert meas[c + 2] < -40 and meas[c - 2] < -40       # leakage two channels away
    # bin-centred tone: adjacent-channel leakage as the prototype 1 channel off its centre
    meas0 = 10 * np.log10(_tone_response("pfb", 0.0, window) / peak)
    assert meas0[c + 1] == pytest.approx(freqz_db([-1.0])[0], abs=0.1)
    assert meas0[c + 1] < -25 and meas0[c + 2] < -40


def test_pfb_hann_crossover_and_enbw_from_freqz():
    # The width-1.2 sinc with a Hann taper crosses its neighbour near -3 dB (our design choice,
    # common practice); ENBW = integral |H|^2 / |H(0)|^2 over frequency, integrated here with
    # scipy.signal.freqz on a dense grid as an independent reference.
    ch = make_channelizer("pfb", N, taps=4)
    half = 10 * np.log10(_tone_response("pfb", 0.0).max() / _tone_response("pfb", 0.5).max())
    assert 2.9 < half < 3.5
    h = ch.coeffs.reshape(-1).astype(np.float64)
    w, H = scipy.signal.freqz(h, worN=1 << 16, whole=True)
    enbw = np.sum(np.abs(H) ** 2) * (w[1] - w[0]) / (2 * np.pi) * N / np.abs(H[0]) ** 2
    assert ch.enbw_bins == pytest.approx(enbw, rel=1e-6)
    assert 0.9 < ch.enbw_bins < 1.1                    # near-rectangular channel
    assert ch.enbw_hz(FS) == pytest.approx(ch.enbw_bins * FS / N)


# --------------------------------------------------------------- streaming
@pytest.mark.parametrize("method", ["pfb", "fft"])
def test_streaming_in_chunks_equals_one_call(method):
    x = _noise(N * 50, seed=3)
    whole = make_channelizer(method, N, taps=4, streaming=False).power(x)
    ch = make_channelizer(method, N, taps=4)
    assert isinstance(ch, StreamingChannelizer)
    parts = [ch.power(x[a:b]) for a, b in ((0, 1000), (1000, 5000), (5000, 5001), (5001, x.size))]
    np.testing.assert_allclose(np.concatenate(parts), whole, rtol=1e-5, atol=1e-9)
    ch.reset()
    assert ch.pending_samples == 0
    assert ch.power(x[:N]).shape[0] == (1 if method == "fft" else 0)


@pytest.mark.parametrize("method,taps", [("pfb", 4), ("pfb", 2), ("fft", 4)])
@pytest.mark.parametrize("n", [0, 100, 4 * N - 1, 4 * N, 7 * N + 3])
def test_stateless_spectrum_count(method, taps, n):
    # stateless: floor((n - (taps - 1) N) / N) spectra, none below taps * N samples
    ch = make_channelizer(method, N, taps=taps, streaming=False)
    t = 1 if method == "fft" else taps
    expect = max(0, (n - (t - 1) * N) // N)
    assert ch.power(_noise(n)).shape == (expect, N)
    assert ch.power(_noise(n)).shape == (expect, N)     # same again: no state carried
    assert ch.n_spectra(n) == expect


# ----------------------------------------------------------------- sums
@pytest.mark.parametrize("method", ["pfb", "fft"])
def test_sums_match_power_and_power_sums(method):
    x = _noise(N * 700, seed=4)
    p = make_channelizer(method, N, taps=4).power(x)
    s1, s2, m = make_channelizer(method, N, taps=4).sums(x)
    r1, r2, rm = power_sums(p)
    assert m == rm == p.shape[0]
    assert r1.dtype == np.float64 and r2.dtype == np.float64
    np.testing.assert_allclose(r1, p.sum(axis=0, dtype=np.float64), rtol=1e-12)
    np.testing.assert_allclose(r2, (p.astype(np.float64) ** 2).sum(axis=0), rtol=1e-12)
    np.testing.assert_allclose(s1, r1, rtol=1e-5)
    np.testing.assert_allclose(s2, r2, rtol=1e-5)
    # Spectral kurtosis from the sums is 1 for Gaussian noise with variance 4/M
    # (Nita & Gary 2010, MNRAS 406, L60): check the mean over channels to 5 sigma.
    sk = (m + 1) / (m - 1) * (m * s2 / s1 ** 2 - 1)
    assert abs(sk.mean() - 1) < 5 * np.sqrt(4 / m / N)


def test_invalid_arguments():
    with pytest.raises(ValueError):
        make_channelizer("dft", N)
    with pytest.raises(ValueError):
        make_channelizer("pfb", N, window="rectangle")
    with pytest.raises(ValueError):
        make_channelizer("pfb", N, taps=0)
    with pytest.raises(ValueError):
        Channelizer(N, np.ones(3 * N), 4)
    with pytest.raises(ValueError):
        power_sums(np.ones(5))


# -------------------------------------------------------------- radiometer
@pytest.mark.parametrize("method", ["pfb", "fft"])
def test_radiometer_equation_on_channel_noise(method):
    # One spectrum of Gaussian noise: each channel's power is chi-square with 2 degrees of
    # freedom (exponential), std / mean = 1. Averaging M spectra: std / mean =
    # 1 / sqrt(B tau) (Wilson, Rohlfs & Huttemeister, Tools of Radio Astronomy) with B tau = M
    # for one independent sample per channel and spectrum. Non-overlapping Hann FFT segments
    # are independent; successive PFB spectra share 3 of 4 frames but correlate only weakly
    # (sum of rho_l^2 = 1.0003 for this prototype), so both give 1/sqrt(M) within 3 %.
    x = _noise(N * 4096, seed=5)
    ch = make_channelizer(method, N, taps=4, streaming=False)
    p = ch.power(x)
    single = p[:, 4:-4]
    assert single.std() / single.mean() == pytest.approx(1.0, rel=0.03)
    M = 255
    g = p[: 16 * M].reshape(16, M, N).mean(axis=1)
    rel = np.sqrt(np.mean(g.var(axis=0, ddof=1))) / g.mean()
    rho = ch.frame_correlation()
    assert rel == pytest.approx(np.sqrt((1 + 2 * np.sum(rho[1:] ** 2)) / M), rel=0.03)
    assert rel == pytest.approx(1 / np.sqrt(M), rel=0.03)


def test_radiometer_efficiency_with_enbw_bandwidth():
    # With B = ENBW in the radiometer equation, the Hann FFT without overlap reaches
    # 1 / sqrt(1.5) = 0.816 (ENBW 1.5 bins, Harris 1978); the PFB channel is near-rectangular
    # and reaches about 1. The expected values follow from the coefficients alone.
    for method, expect in (("fft", 1 / np.sqrt(1.5)), ("pfb", 1.0)):
        ch = make_channelizer(method, 512, taps=4)
        assert ch.expected_radiometer_efficiency == pytest.approx(expect, rel=0.02)
        eta = radiometer_efficiency(method, nchan=512, seed=7)
        assert eta == pytest.approx(ch.expected_radiometer_efficiency, rel=0.03)


# ------------------------------------------------------------------- bench
def test_bench_reports_every_figure():
    r = run_bench(seconds=0.2)
    for group, names in (("throughput_msps", {"pfb", "fft", "bare_fft", "welch"}),
                         ("realtime_factor_2p4", {"pfb", "fft"}),
                         ("ratio_vs_welch", {"pfb", "fft"}),
                         ("radiometer_efficiency", {"pfb", "fft"}),
                         ("spectrometer_msps", {"plain", "flagged"})):
        assert set(r[group]) == names
        for v in r[group].values():
            assert np.isfinite(v) and v > 0
    assert np.isfinite(r["flagging_cost_share"]) and r["flagging_cost_share"] > -1
    for key in ("nchan", "taps", "seconds_of_data"):
        assert np.isfinite(r[key]) and r[key] > 0
    assert r["nchan"] == 1024 and r["seconds_of_data"] == pytest.approx(0.2, rel=0.01)
    for key in ("machine", "python", "numpy"):
        assert isinstance(r[key], str) and r[key]
    # the real-time factor is the throughput over 2.4 MS/s (a consistency check, not a timing one)
    assert r["realtime_factor_2p4"]["pfb"] == pytest.approx(r["throughput_msps"]["pfb"] / 2.4)
    assert r["radiometer_efficiency"]["pfb"] > 0.95
    assert r["radiometer_efficiency"]["fft"] == pytest.approx(1 / np.sqrt(1.5), rel=0.03)
