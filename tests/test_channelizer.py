"""Channelizers against scipy.signal and the published window figures."""

import numpy as np
import pytest
import scipy.signal

from spinflip.daemon.bench import run_bench
from spinflip.daemon.channelizer import make_channelizer

N = 256


def _noise(n, seed=0, sigma=0.2):
    rng = np.random.default_rng(seed)
    return (sigma * (rng.standard_normal(n) + 1j * rng.standard_normal(n))).astype(np.complex64)


@pytest.mark.parametrize("method", ["pfb", "fft"])
def test_white_noise_level_matches_scipy_welch(method):
    # scipy.signal.welch (two-sided, 'spectrum' scaling / ENBW gives power per channel) on the
    # same samples as reference; same level within 1 %.
    x = _noise(N * 4000, seed=1)
    ours = make_channelizer(method, N, taps=4).power(x).mean()
    f, pxx = scipy.signal.welch(x, fs=1.0, window="hann", nperseg=N, noverlap=0,
                                return_onesided=False, detrend=False, scaling="density")
    # our channel power is normalised to the input variance: the density times fs (here 1)
    welch_per_channel = pxx.mean() * 1.0
    assert ours == pytest.approx(welch_per_channel, rel=0.01)
    assert ours == pytest.approx(2 * 0.2 ** 2, rel=0.01)   # the variance put in


@pytest.mark.parametrize("method", ["pfb", "fft"])
def test_tone_lands_in_its_channel(method):
    k0 = 37
    n = np.arange(N * 64)
    x = np.exp(2j * np.pi * (k0 / N) * n).astype(np.complex64)
    p = make_channelizer(method, N, taps=4).power(x).mean(axis=0)
    # fftshift order: channel i has frequency (i - N/2) fs / N
    assert np.argmax(p) == N // 2 + k0


def _tone_response(method, offset_bins):
    n = np.arange(N * 64)
    x = np.exp(2j * np.pi * ((10 + offset_bins) / N) * n).astype(np.complex64)
    return make_channelizer(method, N, taps=4).power(x).mean(axis=0)


def test_hann_fft_scalloping_and_enbw():
    # Harris 1978, Proc. IEEE 66, 51, table 1: Hann window scalloping loss 1.42 dB, ENBW 1.50 bins
    p0 = _tone_response("fft", 0.0)
    p_half = _tone_response("fft", 0.5)
    loss_db = 10 * np.log10(p0.max() / p_half.max())
    assert loss_db == pytest.approx(1.42, abs=0.02)
    assert make_channelizer("fft", N).enbw_bins == pytest.approx(1.50, abs=0.01)


def test_pfb_response_matches_prototype_filter_frequency_response():
    # The PFB channel response is the prototype filter's |H(f)|^2 (Crochiere & Rabiner 1983);
    # computed independently with scipy.signal.freqz from the same coefficients.
    ch = make_channelizer("pfb", N, taps=4)
    h = ch.coeffs.reshape(-1).astype(np.float64)
    for off in (0.25, 0.5):
        p = _tone_response("pfb", off)
        centre = N // 2 + 10
        _, H = scipy.signal.freqz(h, worN=[0.0, 2 * np.pi * off / N, 2 * np.pi * (off - 1) / N,
                                           2 * np.pi * (off - 2) / N])
        H2 = np.abs(H) ** 2 / np.abs(H[0]) ** 2
        meas = p / _tone_response("pfb", 0.0).max()
        assert 10 * np.log10(meas[centre]) == pytest.approx(10 * np.log10(H2[1]), abs=0.1)
        assert 10 * np.log10(meas[centre + 1]) == pytest.approx(10 * np.log10(H2[2]), abs=0.1)
        # two channels away the leakage is far down (a 4-tap Hann-windowed sinc)
        assert meas[centre + 2] < 1e-4 and meas[centre - 2] < 1e-4
    # channel-edge response of the widened prototype
    half = 10 * np.log10(_tone_response("pfb", 0.0).max() / _tone_response("pfb", 0.5).max())
    assert 2.9 < half < 3.5     # about -3 dB crossover by the prototype's design (width 1.2)


@pytest.mark.parametrize("method", ["pfb", "fft"])
def test_streaming_in_chunks_equals_one_call(method):
    x = _noise(N * 50, seed=3)
    whole = make_channelizer(method, N, taps=4).power(x)
    ch = make_channelizer(method, N, taps=4)
    parts = [ch.power(x[a:b]) for a, b in ((0, 1000), (1000, 5000), (5000, 5001), (5001, x.size))]
    np.testing.assert_allclose(np.concatenate(parts), whole, rtol=1e-5, atol=1e-9)
    ch.reset()
    assert ch.power(x[:N]).shape[0] == (1 if method == "fft" else 0)


@pytest.mark.parametrize("method", ["pfb", "fft"])
def test_sums_match_power(method):
    x = _noise(N * 700, seed=4)
    p = make_channelizer(method, N, taps=4).power(x)
    s1, s2, m = make_channelizer(method, N, taps=4).sums(x)
    assert m == p.shape[0]
    np.testing.assert_allclose(s1, p.sum(axis=0, dtype=np.float64), rtol=1e-5)
    np.testing.assert_allclose(s2, (p.astype(np.float64) ** 2).sum(axis=0), rtol=1e-5)


def test_radiometer_equation_on_channel_noise():
    # Radiometer equation dT/T = 1/sqrt(B tau) (Wilson, Rohlfs & Huttemeister, Tools of Radio
    # Astronomy). For independent Hann-FFT spectra of white noise the relative std of an
    # M-spectrum average is 1/sqrt(M), i.e. 1/sqrt(B tau) with B = 1 bin; chi-square with
    # 2 degrees of freedom gives relative std 1 for one spectrum.
    x = _noise(N * 4096, seed=5)
    p = make_channelizer("fft", N).power(x)
    keep = np.r_[4:N // 2 - 2, N // 2 + 3:N - 4]
    single = p[:, keep]
    assert single.std() / single.mean() == pytest.approx(1.0, rel=0.03)
    g = p[:, keep].reshape(16, 256, -1).mean(axis=1)
    rel = np.sqrt(np.mean(g.var(axis=0, ddof=1))) / g.mean()
    assert rel == pytest.approx(1 / np.sqrt(256), rel=0.03)


def test_bench_reports_every_figure():
    r = run_bench(seconds=0.2)
    for group in ("throughput_msps", "realtime_factor_2p4", "ratio_vs_welch", "radiometer_efficiency"):
        for v in r[group].values():
            assert np.isfinite(v) and v > 0
    # ideal radiometer with B = ENBW: Hann FFT without overlap gives 1/sqrt(1.5) = 0.816
    # (Harris 1978 ENBW); the PFB channel is close to rectangular
    assert r["radiometer_efficiency"]["fft"] == pytest.approx(1 / np.sqrt(1.5), rel=0.03)
    assert r["radiometer_efficiency"]["pfb"] > 0.95
