"""Make a simulated season of scans for timing ``spinflip reduce``: N scan files from the scans
of one simulated survey night, each a copy of one of them with fresh radiometer noise added to
its spectra (sigma = TSYS / sqrt(B t), the radiometer equation) and its own name and DATE-OBS
offset by whole days, so the season looks like the same survey repeated night after night.

    .venv/bin/python scripts/season_archive.py NIGHT_DIR OUT_DIR [--scans 2000] [--seed 1]

Then: ``/usr/bin/time -v .venv/bin/spinflip reduce OUT_DIR --out OUT_DIR/reduced``.
"""

from __future__ import annotations

import argparse
import datetime as dt
import sys
from pathlib import Path

import numpy as np
from astropy.io import fits


def main(argv: list[str] | None = None) -> int:
    p = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    p.add_argument("night", type=Path)
    p.add_argument("out", type=Path)
    p.add_argument("--scans", type=int, default=2000)
    p.add_argument("--seed", type=int, default=1)
    a = p.parse_args(argv)
    bases = sorted(a.night.glob("scan-*.fits"))
    if not bases:
        print(f"{a.night}: no scan-*.fits", file=sys.stderr)
        return 2
    a.out.mkdir(parents=True, exist_ok=True)
    rng = np.random.default_rng(a.seed)
    for k in range(a.scans):
        base = bases[k % len(bases)]
        night = k // len(bases)
        with fits.open(base) as hdul:
            table = hdul["SINGLE DISH"]
            data = table.data
            chan_hz = np.abs(data["CDELT1"]).astype(float)
            t = np.asarray(data["CHANEXP"] if "CHANEXP" in data.columns.names
                           else data["EXPOSURE"][:, None], dtype=float)
            sigma = data["TSYS"][:, None] / np.sqrt(chan_hz[:, None] * np.maximum(t, 1e-3))
            data["DATA"] = data["DATA"] + rng.normal(0.0, 1.0, data["DATA"].shape) * sigma
            dates = []
            for d in data["DATE-OBS"]:
                when = dt.datetime.fromisoformat(d) + dt.timedelta(days=night)
                dates.append(when.isoformat())
            data["DATE-OBS"] = dates
            name = f"{base.stem}-n{night:03d}.fits"
            hdul.writeto(a.out / name, overwrite=True)
    print(f"wrote {a.scans} scans to {a.out} from {len(bases)} scans of {a.night}")
    return 0


if __name__ == "__main__":
    sys.exit(main())
