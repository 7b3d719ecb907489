"""The UI tells interference apart from the channels the fold does not cover.

A folded frequency-switched spectrum (1024 channels, reference LO 341 channels below the
signal LO) has no partner for its top 341 channels: they are flagged in the file but are no
interference. The state below is decoded from wire messages as a subscriber sees them and
rendered to plain text (``rich`` console without colour), as in tests/test_panels.py.
"""

from __future__ import annotations

import io
import re

import numpy as np
from rich.console import Console
from wire_examples import status_header

from spinflip.daemon.live import schema
from spinflip.tui import panels
from spinflip.tui.state import ViewState

REST_HZ = 1_420_405_751.768           # HI rest frequency (Hellwig et al. 1970, from memory)
NCHAN = 1024
CHANNEL_HZ = 2_343.75                 # 2.4 MHz over 1024 channels
SHIFT = -341                          # reference LO minus signal LO, channels (-0.8 MHz)
UNCOVERED = np.arange(NCHAN + SHIFT, NCHAN)      # k - SHIFT beyond the band: no partner
CARRIER = 300                         # one channel flagged for interference
DC = (NCHAN // 2, NCHAN // 2 + SHIFT)            # the DC channel and its fold partner


def freq_hz():
    return REST_HZ + (np.arange(NCHAN) - NCHAN // 2) * CHANNEL_HZ


def spectrum_frames(row=0):
    f = freq_hz()
    v = 299_792.458 * (REST_HZ - f) / REST_HZ        # radio convention, km/s
    data = 40.0 * np.exp(-0.5 * (v / 10.0) ** 2)
    flagged = np.zeros(NCHAN, bool)
    flagged[UNCOVERED] = True
    flagged[list(DC)] = True
    flagged[CARRIER] = True
    data[UNCOVERED] = 0.0
    header = {
        "time_utc": f"2025-03-01T21:04:0{row}.0Z", "kind": "integration", "scan": "scan-1",
        "row": row, "exposure_s": 2.0, "tsys_k": 72.0, "unit": "K", "restfreq_hz": REST_HZ,
        "vframe_m_s": 0.0, "glon_deg": 80.0, "glat_deg": 0.0, "azimuth_deg": 64.0,
        "elevation_deg": 33.5, "ra_deg": 300.0, "dec_deg": 40.0, "object": "G080.0+00.0",
        "folded": True, "flagged_fraction": float(flagged.mean()), "blanked_fraction": 0.0,
        "nimpulse": 0, "ncarrier": 1,
    }
    arrays = {"freq_hz": (f, "Hz"), "v_lsrk_km_s": (v, "km/s"),
              "data": (data.astype(np.float32), "K"), "flagged": (flagged, ""),
              "exposure_s": (np.where(np.isin(np.arange(NCHAN), UNCOVERED), 0.0, 2.0)
                             .astype(np.float32), "s")}
    return schema.encode("spectrum", header, arrays)


def status_frames(new_fields=True):
    rfi = {"impulses": 0, "carrier_onsets": 1, "sk_cells": 40, "blanked_spectra": 0}
    if new_fields:
        f = freq_hz()
        rfi.update({"flagged_rfi_fraction": 2 / NCHAN,          # the carrier, folded: 2 ch
                    "uncovered_fraction": len(UNCOVERED) / NCHAN,
                    "uncovered_hz": [float(f[UNCOVERED[0]]), float(f[UNCOVERED[-1]])]})
    return schema.encode("status", status_header(
        lo_hz=REST_HZ, tsys_k=72.0, samples_received=1, samples_lost=0, queue_depth=0,
        disk_free_bytes=10**10, uptime_s=10.0, scan="scan-1", drops={}, rfi=rfi,
        pointing={"frame": "galactic", "lon_deg": 80.0, "lat_deg": 0.0, "object": "G080"}))


def make_state(new_fields=True, rows=3) -> ViewState:
    state = ViewState(endpoint="tcp://127.0.0.1:1")
    for i in range(rows):
        state.apply(schema.decode(spectrum_frames(i)), 10.0 + i)
    state.apply(schema.decode(status_frames(new_fields)), 10.0 + rows)
    state.now_s = 10.0 + rows
    return state


def render(renderable, width, height) -> str:
    console = Console(record=True, width=width, height=height, file=io.StringIO(),
                      color_system=None)
    console.print(renderable)
    return console.export_text()


def test_state_knows_the_uncovered_channels_from_the_status():
    state = make_state()
    mask = state.uncovered_channels(state.spectrum)
    assert np.array_equal(np.flatnonzero(mask), UNCOVERED)
    assert state.rfi_fractions() == (2 / NCHAN, len(UNCOVERED) / NCHAN)
    old = make_state(new_fields=False)
    assert not old.uncovered_channels(old.spectrum).any()
    assert old.rfi_fractions() == (None, None)


def test_interference_panel_labels_interference_and_coverage_apart():
    state = make_state()
    total = 100 * state.spectrum["flagged_fraction"]          # 33.6 %: every flag
    text = render(panels.rfi_panel(state, 30, 10), 30, 10)
    assert "interference flagged 0.2 %" in text, text         # 2 / 1024
    assert "coverage 33.3 % uncovered" in text, text          # 341 / 1024
    assert f"{total:.1f} %" not in text, text                 # the mixed share is gone
    # the waterfall shows the covered channels only: 3 flagged cells per row (DC partner at
    # 171, carrier at 300, DC at 512), none for the uncovered edge
    body = text.split("newest on top")[1].splitlines()[1:4]
    assert all(line.count("x") == 3 for line in body), body


def test_interference_panel_of_an_older_daemon_shows_all_flags():
    state = make_state(new_fields=False)
    text = render(panels.rfi_panel(state, 30, 10), 30, 10)
    assert f"flagged {100 * state.spectrum['flagged_fraction']:.1f} %" in text
    assert "coverage" not in text


def _max_tick_mhz(text: str) -> float:
    return max(float(v) for v in re.findall(r"\b14\d\d\.\d+\b", text))


def test_spectrum_leaves_the_uncovered_edge_out():
    state = make_state()
    state.toggle_axis()                                       # sky frequency, MHz
    text = render(panels.spectrum_panel(state, 100, 20), 100, 20)
    assert "flagged 3 ch" in text and "341 ch not covered" in text, text
    # the x range ends at the last covered channel (683), not at the band's top
    top_covered_mhz = freq_hz()[UNCOVERED[0] - 1] / 1e6
    assert _max_tick_mhz(text) <= top_covered_mhz + 1e-3, text
    old = make_state(new_fields=False)
    old.toggle_axis()
    old_text = render(panels.spectrum_panel(old, 100, 20), 100, 20)
    assert "flagged 344 ch" in old_text
    assert _max_tick_mhz(old_text) > top_covered_mhz + 0.15


def test_screen_at_the_smallest_size_shows_both_numbers():
    state = make_state()
    text = render(panels.screen(state, 80, 24), 80, 24)
    assert "interference flagged 0.2 %" in text and "33.3 % uncovered" in text, text
