"""Impulse blanking, carrier finding and named channels on synthetic data."""

import numpy as np
import pytest

from spinflip.daemon import config
from spinflip.daemon.rfi.carriers import CarrierFinder, running_median
from spinflip.daemon.rfi.impulses import ImpulseBlanker
from spinflip.daemon.rfi.masks import named_channels

N, TAPS = 256, 4


def _noise(n, seed=0, scale=0.1):
    rng = np.random.default_rng(seed)
    return (scale * (rng.standard_normal(n) + 1j * rng.standard_normal(n))).astype(np.complex64)


def test_burst_blanks_exactly_the_spectra_whose_windows_reach_it():
    x = _noise(64 * N)
    a, b = 20 * N + 100, 20 * N + 300          # a 200-sample burst inside frame 20
    x[a:b] += _noise(b - a, seed=1, scale=1.0)
    blanker = ImpulseBlanker(6.0, N, TAPS)
    m = 64 - (TAPS - 1)                          # spectra of a stateless call
    blank, events = blanker.mask(x, 0, m)
    assert events == 1
    # spectrum j covers samples [j N, j N + taps N): frames j .. j + 3 -> j = 17 .. 20 reach
    # frame 20; the 512-sample chunk holding the burst is [20 N, 20 N + 512) (N = 256: frames
    # 20 and 21), so spectra 17 .. 21 are blanked
    assert set(np.flatnonzero(blank)) == {17, 18, 19, 20, 21}


def test_no_false_blanking_on_noise_and_carry_into_next_block():
    blanker = ImpulseBlanker(6.0, N, TAPS)
    for seed in range(20):
        blank, events = blanker.mask(_noise(64 * N, seed), 3 * N, 64)
        assert events == 0 and not blank.any()
    x = _noise(64 * N, 99)
    x[-100:] += _noise(100, 98, 1.0)             # burst in the last samples
    blank, events = blanker.mask(x, 3 * N, 64)
    assert events == 1 and blank[-1]
    # the channelizer keeps the last samples as history: the next block's first spectra see it
    nxt, ev2 = blanker.mask(_noise(64 * N, 97), 3 * N + 0, 64)
    assert ev2 == 0 and nxt[0] and not nxt[8:].any()
    blanker.mask(x, 3 * N, 64)                   # the burst at the end again ...
    blanker.reset()                              # ... but a retune drops history and carry
    assert not blanker.mask(_noise(64 * N, 96), 0, 61)[0].any()


def test_long_burst_blanks_the_whole_block():
    blanker = ImpulseBlanker(6.0, N, TAPS)
    blanker.mask(_noise(64 * N, 1), 0, 61, state="s")
    blank, events = blanker.mask(_noise(64 * N, 2, scale=0.2), 0, 61, state="s")  # 4x power
    assert blank.all() and events == 1


def test_running_median_follows_a_slope_exactly():
    p = np.linspace(1.0, 2.0, 200)
    np.testing.assert_allclose(running_median(p)[10:-10], p[10:-10], rtol=1e-12)


def _spectrum(m, seed, carriers=(), line=None, nchan=512):
    """Mean of m exponential powers per channel over a band-pass, plus extras."""
    rng = np.random.default_rng(seed)
    k = np.arange(nchan)
    bp = (1 + 0.03 * np.cos(2 * np.pi * k / 60)) / (1 + ((k - nchan / 2) / (0.45 * nchan)) ** 16)
    p = bp * rng.gamma(m, 1.0 / m, nchan)
    for c, excess in carriers:
        p[c] += bp[c] * excess
    if line is not None:
        p = p + bp * line
    return p


def test_carrier_finder_catches_weak_persistent_and_leaves_noise_and_line():
    m, nchan = 10000, 512
    sigma = 1 / np.sqrt(m)
    finder = CarrierFinder(nchan, 5.0, 3)
    counts = np.full(nchan, float(m))
    k = np.arange(nchan)
    # a strong, narrow HI line (3 km/s FWHM ~ 6 channels, 60 K on 75 K) in the protected range
    line = (60 / 75) * np.exp(-0.5 * ((k - 300) / 2.5) ** 2)
    protected = (k > 270) & (k < 330)
    found_any = []
    for it in range(6):
        p = _spectrum(m, it, carriers=((100, 20 * sigma), (150, 4.5 * sigma)), line=line,
                      nchan=nchan)
        found = finder.find(("sig", 0.0), p, counts, protected)
        found_any.append(found)
        assert found[100]                       # 20 sigma: every integration
        assert not found[protected].any()       # the line is never flagged
    # 4.5 sigma per integration: found once three integrations are in (running mean)
    assert all(f[150] for f in found_any[2:])
    # nothing else: on 400 clean channels x 6 integrations no false carrier
    clean = np.ones(nchan, bool)
    clean[[99, 100, 101, 149, 150, 151]] = False
    assert not np.array(found_any)[:, clean & finder.usable].any()


def test_named_channels():
    nchan, ch = 1024, 2343.75
    lo = 1420.4e6
    m = named_channels(lo, nchan, ch, True, [-100e3, 5e6], [[1420.5, 1420.51]])
    assert m[512]
    assert m[512 + round(-100e3 / ch)]
    first = 512 + int(np.floor((1420.5e6 - lo) / ch + 0.5))
    assert m[first] and m[512 + int(round((1420.51e6 - lo) / ch))]
    assert m.sum() == 1 + 1 + (round((1420.51e6 - lo) / ch) - round((1420.5e6 - lo) / ch) + 1)
    assert not named_channels(lo, nchan, ch, False).any()


@pytest.mark.parametrize("text, frag", [
    ("[rfi]\nspurs_hz = ['a']\n", "rfi.spurs_hz"),
    ("[rfi]\nmasks_mhz = [[1421, 1420]]\n", "rfi.masks_mhz"),
    ("[rfi]\nsk_pfa = 0.5\n", "rfi.sk_pfa"),
    ("[rfi]\nimpulse_sigma = 1\n", "rfi.impulse_sigma"),
])
def test_rfi_config_errors(tmp_path, text, frag):
    f = tmp_path / "c.toml"
    f.write_text(text)
    with pytest.raises(config.ConfigError, match=frag.replace(".", r"\.")):
        config.load(f)
