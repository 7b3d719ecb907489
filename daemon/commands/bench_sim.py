"""How fast the simulated telescope makes samples, in simulated seconds per wall-clock second.

The simulator of the default configuration (``config.load(None)``) under ``--fast``, at a fixed
start time (2026-03-01 04:00 UTC, so the sky does not depend on the day of the run), the beam
held on the Galactic plane at l = 30 deg, b = 0: one block is made first (the first sky
spectrum and the caches), then :meth:`SimSource.read` in a loop for ``seconds`` of wall time.
The figure is the simulated time made over the wall time taken, each block counting
``block_samples / sample_rate`` seconds; it includes everything a block costs the simulator
(noise, sky model, interference if configured, the 8-bit quantisation), nothing downstream.
"""

from __future__ import annotations

import time

from spinflip.daemon import config
from spinflip.daemon.sky.pointing import Pointing
from spinflip.daemon.sources.sim import SimSource

_START = "2026-03-01T04:00:00"


def simulator_speed(seconds: float = 3.0) -> dict:
    """Simulated seconds per wall second of the default simulator under ``--fast``.

    Parameters
    ----------
    seconds : wall time to run for (at least one block is always made and timed)

    Returns
    -------
    dict : ``simulated_s_per_wall_s`` (float), ``block_samples`` (complex samples per block),
    ``sample_rate`` (Hz)
    """
    cfg = config.load(None)
    cfg["sim"]["start"] = _START
    src = SimSource(cfg, fast=True)
    src.set_pointing(Pointing.at("galactic", 30.0, 0.0, src.location))
    src.open()
    try:
        src.read()                      # the first sky spectrum, outside the timing
        blocks = 0
        t0 = time.perf_counter()
        while True:
            src.read()
            blocks += 1
            wall = time.perf_counter() - t0
            if wall >= seconds:
                break
    finally:
        src.close()
    simulated = blocks * src.block_samples / src.fs
    return {"simulated_s_per_wall_s": simulated / wall, "block_samples": int(src.block_samples),
            "sample_rate": float(src.fs)}
