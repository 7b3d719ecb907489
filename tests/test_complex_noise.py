"""The simulator's complex Gaussian noise (polar form from one 64-bit draw per value)."""

import numpy as np
from scipy import stats

from spinflip.daemon.dsp.samples import complex_to_u8
from spinflip.daemon.sources.complex_noise import PHASES, shaped_complex_normal

N = 1 << 20


def _noise(seed=7, rows=16):
    power = np.full(N // rows, 2.0, dtype=np.float32)     # A = 1: a, b ~ N(0, 1)
    return shaped_complex_normal(np.random.default_rng(seed), power, rows).reshape(-1)


def test_components_are_independent_standard_normals():
    z = _noise()
    a, b = z.real.astype(np.float64), z.imag.astype(np.float64)
    # moments of N(0, 1): mean 0, variance 1, skewness 0, excess kurtosis 0; standard errors
    # for 2^20 values are 1e-3 (mean), 1.4e-3 (variance), 2.4e-3 (skew), 4.8e-3 (kurtosis)
    for c in (a, b):
        assert abs(c.mean()) < 5e-3
        assert abs(c.var() - 1) < 7e-3
        assert abs(stats.skew(c)) < 1.2e-2
        assert abs(stats.kurtosis(c)) < 2.4e-2
        assert stats.kstest(c, "norm").pvalue > 1e-3
    assert abs(np.mean(a * b)) < 5e-3                     # uncorrelated
    assert abs(np.corrcoef(a ** 2, b ** 2)[0, 1]) < 5e-3  # and not only uncorrelated
    # |z|^2 of a circular complex Gaussian is exponential with mean 2
    assert stats.kstest(np.abs(z.astype(np.complex128)) ** 2 / 2, "expon").pvalue > 1e-3


def test_power_per_bin_shapes_the_spectrum_and_rows_are_independent():
    rng = np.random.default_rng(3)
    power = np.linspace(0.5, 8.0, 4096).astype(np.float32)
    z = shaped_complex_normal(rng, power, rows=2048)
    assert z.shape == (2048, 4096) and z.dtype == np.complex64
    measured = np.mean(np.abs(z) ** 2, axis=0)
    # 2048 exponential values per bin: relative standard error 1/sqrt(2048) = 2.2 %
    assert np.max(np.abs(measured / power - 1)) < 0.12
    assert abs(np.mean(measured / power) - 1) < 3e-3
    # neighbouring rows uncorrelated: the normalised cross product has standard error
    # 1/sqrt(4096) = 0.016 per pair; over 2047 pairs, 3.5e-4
    cross = np.mean(z[:-1] * np.conj(z[1:]) / power, axis=1)
    assert np.max(np.abs(cross)) < 0.09 and abs(np.mean(cross)) < 2e-3


def test_seeded_and_phase_table_is_balanced():
    assert np.array_equal(_noise(seed=11), _noise(seed=11))
    assert not np.array_equal(_noise(seed=11), _noise(seed=12))
    assert abs(np.sum(PHASES.astype(np.complex128))) < 1e-6
    assert abs(np.sum(PHASES.astype(np.complex128) ** 2)) < 1e-6


def test_quantiser_leaves_its_input_alone_unless_told():
    x = np.array([0.0, 1.0, -1.0, 2 - 3j, 0.5 + 0.25j, -0.004], dtype=np.complex64)
    keep = x.copy()
    codes = complex_to_u8(x)
    assert np.array_equal(x, keep)
    # 127.5 + 127.5 x rounded half to even, clipped to 0..255; I then Q
    assert codes.tolist() == [128, 128, 255, 128, 0, 128, 255, 0, 191, 159, 127, 128]
    assert np.array_equal(complex_to_u8(x, overwrite=True), codes)
