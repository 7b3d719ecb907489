"""Simulated scans shared by several test modules (computed once per session in conftest.py).

``run_l30_scan``: the daemon in this process on the simulator (seed 7, 2026-03-01T04:00 UTC,
Galactic l = 30 deg, b = 0, 5-s integrations, 40 s, no sockets), as ``spinflip run --fast``
would run it, with a spy on its interference step so that the per-phase carrier masks of
every integration can be looked at (test_rfi_sim.py). The scan without interference is also
test_run.py's simulated scan.
"""

from __future__ import annotations

from pathlib import Path

from astropy.io import fits

from spinflip.daemon import config
from spinflip.daemon.run import observation

DURATION_S = 40.0


def l30_config(out: Path, rfi: bool) -> dict:
    """The configuration of the scan (output in ``out``)."""
    cfg = config.load(None)
    config.merge(cfg, {
        "sim": {"start": "2026-03-01T04:00:00", "seed": 7, "rfi": rfi},
        "pointing": {"frame": "galactic", "lon": 30.0, "lat": 0.0},
        "spectrometer": {"integration_s": 5.0},
        "output": {"dir": str(out)},
        "publish": {"data": "", "control": ""},
    })
    return cfg


def run_l30_scan(out: Path, rfi: bool) -> dict:
    """Run the scan; its daemon, table rows and header, scan-average header, the spy's
    per-row record (carriers found, LOs, kurtosis m per phase, time), configuration, file."""
    cfg = l30_config(out, rfi)
    d = observation.Daemon(cfg, fast=True, duration_s=DURATION_S, log=lambda msg: None)
    seen = []                                   # per row: {phase: carrier mask}, and the LOs
    original = d.interference.assess

    def spy(integ, t_mid_unix_s, date_obs):
        verdict = original(integ, t_mid_unix_s, date_obs)
        bad = verdict.bad
        finder = d.interference.carriers
        found = {ph: finder.last_found.get(ph) if finder else None for ph in bad}
        seen.append({"found": found, "lo": {ph: integ.sums[ph].lo_hz for ph in bad},
                     "m": {ph: integ.sums[ph].m.copy() for ph in bad}, "t": t_mid_unix_s})
        return verdict

    d.interference.assess = spy
    result = d.run()
    (path,) = result.files
    with fits.open(path) as h:
        rows = h["SINGLE DISH"].data.copy()
        head = h["SINGLE DISH"].header
        prod = dict(h["SCAN AVERAGE"].header)
    return {"daemon": d, "rows": rows, "head": head, "prod": prod, "seen": seen, "cfg": cfg,
            "path": Path(path)}
