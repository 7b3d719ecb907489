"""Complex Gaussian white noise, shaped per frequency bin, from one 64-bit draw per value.

The simulator needs n circularly-symmetric complex Gaussian values a_k + i b_k (a, b independent
N(0, 1)) times an amplitude per bin. The polar form of the Box-Muller transform gives each from
two independent uniforms:

    a + i b = r e^{i theta},   r = sqrt(-2 ln u),   u ~ U(0, 1],   theta ~ U[0, 2 pi)

(r is Rayleigh distributed, r^2 = -2 ln u is exponential with mean 2, and r e^{i theta} has
independent N(0, 1) real and imaginary parts). One raw 64-bit word of the generator supplies
both, with no rejection loop and no trigonometry:

- u = (k + 1) 2^-24 from the word's top 24 bits k, exact in float32, so ln u is finite; the
  largest r is sqrt(48 ln 2) = 5.77 (a 2^-24 tail left out);
- theta = 2 pi (j + 1/2) / 65536 from the low 16 bits j, looked up in a table of e^{i theta}.
  65536 equally spaced phases make E[e^{i m theta}] = 0 for every 0 < |m| < 65536 exactly, so
  the phase is as good as continuous for every moment the tests and the spectrometer see.

With the power per bin P = E|A (a + i b)|^2 = 2 A^2 folded in under the square root,
A r = sqrt(P (-ln u)), with -ln u = 24 ln 2 - ln(k + 1), this is about five
times faster than ``Generator.standard_normal`` for the two components, and stays seeded: the
values follow from the generator's state alone.
"""

from __future__ import annotations

import sys

import numpy as np

_PHASE_BITS = 16
_U_BITS = 24
#: e^{i theta} at 2^16 equally spaced phases, centred in their bins.
PHASES = np.exp(2j * np.pi * (np.arange(2 ** _PHASE_BITS) + 0.5) / 2 ** _PHASE_BITS
                ).astype(np.complex64)
_LN_2_U = np.float32(_U_BITS * np.log(2.0))     # -ln u = 24 ln 2 - ln(k + 1)
_LOW16 = 0 if sys.byteorder == "little" else 3   # the low 16 bits of each word, as uint16


def shaped_complex_normal(rng: np.random.Generator, power: np.ndarray,
                          rows: int = 1) -> np.ndarray:
    """``rows`` rows of ``A (a + i b)`` per bin, a, b independent N(0, 1), ``power = 2 A ** 2``.

    Parameters
    ----------
    rng : the generator whose bit stream is used (advanced by ``rows * power.size`` 64-bit
        words)
    power : float32, 1-D: E|value|^2 per bin, the same for every row
    rows : how many independent rows

    Returns
    -------
    complex64 array (rows, power.size), freshly allocated (fit for an in-place FFT).
    """
    n = power.size
    raw = rng.bit_generator.random_raw(rows * n)
    z = PHASES[raw.view(np.uint16)[_LOW16::4]]
    m = (raw >> np.uint64(64 - _U_BITS)).astype(np.float32)
    m += np.float32(1.0)
    np.log(m, out=m)
    np.subtract(_LN_2_U, m, out=m)                 # -ln u >= 0, u in (0, 1]
    m = m.reshape(rows, n)
    m *= power
    np.sqrt(m, out=m)
    z = z.reshape(rows, n)
    z *= m
    return z
