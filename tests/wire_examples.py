"""Valid status and progress headers, and the optional mount and plan objects, for the tests
that need them (panels, plan panels, interference panel, abuse server).

One place lists every field a ``status`` message carries (daemon/live/schema.py), so a new
field is added once; each test states only the values it looks at.
"""

from __future__ import annotations

from spinflip.daemon.live import schema


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


def mount_object(**fields) -> dict:
    """A ``status.mount`` object valid for ``schema.encode``: a rotator tracking a target a
    third of a degree away, with ``fields`` replaced (checked against the schema here)."""
    mount = {"driver": "rotator", "state": "tracking", "az_deg": 181.2, "el_deg": 42.0,
             "target_az_deg": 181.5, "target_el_deg": 42.2, "error_deg": 0.31,
             "detail": "rotator at tcp://127.0.0.1:4533"}
    mount.update(fields)
    schema.encode("status", status_header(mount=mount))
    return mount


def plan_object(**fields) -> dict:
    """A ``progress.plan`` object valid for ``schema.encode``: step 3 of 8 of a night at
    Heron Ridge, observing G120.0+0.5, two visits to come and two skipped, with ``fields``
    replaced (checked against the schema here)."""
    plan = {"name": "heron-ridge-plane", "step": 3, "steps": 8, "object": "G120.0+0.5",
            "phase": "observing", "visit_elapsed_s": 360.0, "visit_total_s": 900.0,
            "eta_s": 7380.0, "done": 2, "abandoned": 1,
            "upcoming": [{"object": "G130.0+0.0", "start_utc": "2025-03-01T21:40:00Z"},
                         {"object": "G140.0+0.0", "start_utc": "2025-03-01T22:00:30Z"}],
            "skipped": [{"object": "G010.0+0.0", "reason": "below 15 deg elevation all night"},
                        {"object": "G030.0+0.0", "reason": "within 20 deg of the Sun"}]}
    plan.update(fields)
    schema.encode("progress", progress_header(plan=plan))
    return plan


def progress_header(**fields) -> dict:
    """A progress header valid for ``schema.encode("progress", ...)``, with ``fields``
    replaced: integration 5 of a 300 s scan."""
    header = {"scan": "scan-0007", "integration": 5, "integration_elapsed_s": 12.6,
              "integration_total_s": 30.0, "scan_elapsed_s": 162.6, "scan_total_s": 300.0,
              "eta_s": 137.4}
    header.update(fields)
    return header
