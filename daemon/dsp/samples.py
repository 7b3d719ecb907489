"""Conversion of raw 8-bit IQ samples (``.cu8``: interleaved unsigned I, Q) to complex64.

The RTL2832U delivers each component as an unsigned byte with 127.5 as zero; a 65536-entry
look-up table maps each (I, Q) byte pair, read as one little-endian uint16, to its complex
value in a single gather, which is much faster than two float conversions.
"""

import numpy as np

_ZERO = 127.5
_SCALE = 1.0 / 127.5


def _build_lut() -> np.ndarray:
    code = np.arange(65536, dtype=np.uint32)
    i = (code & 0xFF).astype(np.float32)
    q = (code >> 8).astype(np.float32)
    return ((i - _ZERO) * _SCALE + 1j * (q - _ZERO) * _SCALE).astype(np.complex64)


#: LUT[q_byte << 8 | i_byte] -> complex64 in [-1, 1].
IQ_LUT = _build_lut()


def u8_to_complex(raw: np.ndarray) -> np.ndarray:
    """Interleaved uint8 I/Q (even length) to complex64 samples in [-1, 1]."""
    raw = np.ascontiguousarray(raw, dtype=np.uint8)
    if raw.size % 2:
        raise ValueError("interleaved IQ needs an even number of bytes")
    return IQ_LUT[raw.view("<u2")]


def complex_to_u8(x: np.ndarray, rng: np.random.Generator | None = None,
                  overwrite: bool = False) -> np.ndarray:
    """Quantise complex samples (full scale +-1) to interleaved uint8, clipping at the rails.

    Rounding to the nearest code after mapping x -> 127.5 + 127.5 x, as the dongle's ADC does;
    values beyond full scale clip to 0 or 255. The work is done on the interleaved float view
    of the samples (I, Q, I, Q, ...), which is already the output's order: scale, offset,
    round and clip in place, then one cast to uint8.

    Parameters
    ----------
    x : complex samples (complex64 stays in float32, other types in float64)
    rng : unused (kept for callers that pass one)
    overwrite : ``x`` (C-contiguous complex64 or complex128) may be used as the work space
        and is left holding the codes as floats
    """
    dtype = np.result_type(np.asarray(x).dtype, np.complex64)
    z = np.ascontiguousarray(x, dtype=dtype).reshape(-1)
    f = z.view(z.real.dtype)                     # interleaved I, Q
    if not (overwrite and np.shares_memory(z, x)):
        f = f.copy()
    f *= 127.5
    f += _ZERO
    np.rint(f, out=f)
    np.clip(f, 0, 255, out=f)
    return f.astype(np.uint8)
