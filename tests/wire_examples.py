"""A valid status header for the tests that need one (panels, interference panel, abuse server).

One place lists every field a ``status`` message carries (daemon/live/schema.py), so a new
field is added once; each test states only the values it looks at.
"""

from __future__ import annotations


def status_header(**fields) -> dict:
    """A status header valid for ``schema.encode("status", ...)``, with ``fields`` replaced.

    Parameters
    ----------
    **fields
        Top-level fields to set (a nested one, e.g. ``pointing`` or ``rfi``, is replaced whole).
    """
    header = {
        "state": "observing", "source": "sim", "lo_hz": 1_420_000_000.0, "gain_db": 40.2,
        "sample_rate_hz": 2_400_000.0, "tsys_k": 74.2, "tsys_source": "noise_source",
        "samples_received": 123_456_789, "samples_lost": 1_000, "queue_depth": 1,
        "disk_free_bytes": 9_876_543_210, "uptime_s": 61.5, "version": "0.1.0",
        "writing": "writing", "held_integrations": 0, "dropped_integrations": 0,
        "worker_failures": {},
        "scan": "scan-0007",
        "pointing": {"frame": "galactic", "lon_deg": 120.0, "lat_deg": 0.5, "object": "G120"},
        "drops": {"spectrum": 0}, "rfi": {"impulses": 4, "carrier_onsets": 1, "sk_cells": 17,
                                          "blanked_spectra": 0},
    }
    header.update(fields)
    return header
