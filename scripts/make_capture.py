"""Make a ``.cu8`` capture for ``spinflip soak --source replay:FILE``: complex Gaussian noise at
a dongle's usual input level, a steady carrier and short impulsive bursts (so the interference
flagging has work), quantised to interleaved unsigned 8-bit I/Q like the dongle's samples.

    .venv/bin/python scripts/make_capture.py FILE [--seconds 10] [--sample-rate 2.4e6]
"""

from __future__ import annotations

import argparse
import sys
from pathlib import Path

import numpy as np

from spinflip.daemon.dsp.samples import complex_to_u8


def main(argv: list[str] | None = None) -> int:
    p = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    p.add_argument("path", type=Path)
    p.add_argument("--seconds", type=float, default=10.0)
    p.add_argument("--sample-rate", type=float, default=2.4e6)
    p.add_argument("--seed", type=int, default=1)
    a = p.parse_args(argv)
    rng = np.random.default_rng(a.seed)
    n = int(a.seconds * a.sample_rate)
    chunk = 1 << 20
    with open(a.path, "wb") as fh:
        for start in range(0, n, chunk):
            m = min(chunk, n - start)
            x = 0.16 * (rng.standard_normal(m) + 1j * rng.standard_normal(m))
            t = (start + np.arange(m)) / a.sample_rate
            x += 0.03 * np.exp(2j * np.pi * 312.5e3 * t)                 # a steady carrier
            on = (t % 0.1) < 1e-3                                        # 1 ms burst each 0.1 s
            x[on] += 0.5 * (rng.standard_normal(on.sum()) + 1j * rng.standard_normal(on.sum()))
            fh.write(complex_to_u8(x.astype(np.complex64)).tobytes())
    print(f"wrote {n} samples ({a.seconds:g} s at {a.sample_rate / 1e6:g} MS/s) to {a.path}")
    return 0


if __name__ == "__main__":
    sys.exit(main())
