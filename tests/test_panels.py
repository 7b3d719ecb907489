"""The terminal UI's state and panels (tui/state.py, tui/panels.py), rendered to plain text.

Messages are made with the wire format's own ``encode`` and read back with ``decode``
(daemon/live/schema/), as a subscriber would see them. Panels and the screen are printed on
``rich.console.Console(record=True, width=W, height=H, color_system=None)`` and read back
with ``export_text``.

Outside references used below:
- astropy's ``u.doppler_radio`` equivalency (radio convention, FITS WCS paper III, Greisen et
  al. 2006) builds the velocity axis of the synthetic spectra independently of spinflip.
- The HI rest frequency 1420.405751768 MHz (Hellwig et al. 1970, from memory).
- ECMA-48 / ISO 6429 SGR parameters (30-37, 38, 39, 40-47, 48, 49, 90-97, 100-107 select
  colours; 1 bold, 2 dim, 7 reverse do not), from memory, for the NO_COLOR check.
"""

from __future__ import annotations

import io
import re

import numpy as np
import pytest
from astropy import units as u
from rich.cells import cell_len
from rich.console import Console
from wire_examples import status_header

from spinflip.daemon.live import schema
from spinflip.tui import panels
from spinflip.tui.state import ViewState

REST_HZ = 1_420_405_751.768           # HI rest frequency (Hellwig et al. 1970, from memory)
VFRAME_M_S = -12_000.0
NCHAN = 1024
CHANNEL_HZ = 2_343.75                 # 2.4 MHz over 1024 channels
LINE_V_KM_S = 0.0                     # the Gaussian line's centre, LSRK
LINE_SIGMA_KM_S = 10.0
LINE_PEAK_K = 40.0
ENDPOINT = "tcp://127.0.0.1:5621"
SIZES = [(80, 24), (160, 50)]


def axes():
    """Sky frequency (Hz) and LSRK radio velocity (km/s) of the channels, via astropy."""
    freq_hz = REST_HZ + (np.arange(NCHAN) - NCHAN / 2) * CHANNEL_HZ
    v_topo = (freq_hz * u.Hz).to(u.km / u.s, equivalencies=u.doppler_radio(REST_HZ * u.Hz))
    return freq_hz, v_topo.value + VFRAME_M_S / 1e3


def spectrum_frames(kind="integration", row=3, flag_idx=(100, 101, 700), noise_k=0.0,
                    time_utc="2025-03-01T21:04:05.250000Z"):
    """Frames of a spectrum message: a Gaussian line, a few flagged channels."""
    freq_hz, v_km_s = axes()
    data = LINE_PEAK_K * np.exp(-0.5 * ((v_km_s - LINE_V_KM_S) / LINE_SIGMA_KM_S) ** 2)
    data += np.random.default_rng(row).normal(0.0, noise_k, NCHAN) if noise_k else 0.0
    flagged = np.zeros(NCHAN, bool)
    flagged[list(flag_idx)] = True
    header = {
        "time_utc": time_utc, "kind": kind, "scan": "scan-0007", "row": row,
        "exposure_s": 10.0, "tsys_k": 74.2, "unit": "K", "restfreq_hz": REST_HZ,
        "vframe_m_s": VFRAME_M_S, "glon_deg": 120.0, "glat_deg": 0.5,
        "azimuth_deg": 181.25, "elevation_deg": 42.0, "ra_deg": 3.5, "dec_deg": 62.75,
        "object": "G120.0+0.5", "folded": True, "flagged_fraction": float(flagged.mean()),
        "blanked_fraction": 0.01, "nimpulse": 3, "ncarrier": 2,
    }
    arrays = {
        "freq_hz": (freq_hz, "Hz"), "v_lsrk_km_s": (v_km_s, "km/s"),
        "data": (data.astype(np.float32), "K"), "flagged": (flagged, ""),
        "exposure_s": (np.where(flagged, 0.0, 10.0).astype(np.float32), "s"),
    }
    return schema.encode("spectrum", header, arrays)


def status_frames(tsys_k=74.2, writing="writing", held=0, failures=None):
    """Status frames (tests/wire_examples.py: Tsys 74.2 K, 123 456 789 samples, 1000 lost,
    9.88 GB free, up 61.5 s, scan-0007 at G120, rfi 4 impulses / 1 carrier / 17 SK cells)."""
    return schema.encode("status", status_header(tsys_k=tsys_k, writing=writing,
                                                 held_integrations=held,
                                                 worker_failures=failures or {}))


def progress_frames(scan_total_s=300.0, eta_s=137.4):
    return schema.encode("progress", {
        "scan": "scan-0007", "integration": 5, "integration_elapsed_s": 12.6,
        "integration_total_s": 30.0, "scan_elapsed_s": 162.6, "scan_total_s": scan_total_s,
        "eta_s": eta_s})


def event_frames(text="carrier at 1420.1 MHz", severity="warning"):
    return schema.encode("event", {"severity": severity, "text": text})


def full_state(now_s=100.0) -> ViewState:
    """A state that has seen every topic, as decoded from the wire."""
    state = ViewState(endpoint=ENDPOINT)
    for i in range(5):
        t = now_s - 5 + i
        state.apply(schema.decode(spectrum_frames(row=i, noise_k=0.5,
                                                time_utc=f"2025-03-01T21:04:0{i}.0Z")), t)
        state.apply(schema.decode(spectrum_frames("average", row=i)), t)
        state.apply(schema.decode(status_frames(74.2 + 0.1 * i)), t)
    state.apply(schema.decode(status_frames(74.2)), now_s)
    state.apply(schema.decode(progress_frames()), now_s)
    state.apply(schema.decode(event_frames()), now_s)
    state.now_s = now_s + 0.4
    return state


def render(renderable, width, height, **console_args) -> str:
    args = {"color_system": None} | console_args
    console = Console(record=True, width=width, height=height, file=io.StringIO(), **args)
    console.print(renderable)
    return console.export_text()


def assert_fits(text: str, width: int, height: int) -> None:
    lines = text.splitlines()
    assert len(lines) <= height, f"{len(lines)} lines for a {height}-line screen"
    widest = max(cell_len(line) for line in lines)
    assert widest <= width, f"a line of {widest} cells on a {width}-cell screen"


# ----------------------------------------------------------------------------------------------
# ViewState
# ----------------------------------------------------------------------------------------------
def test_apply_routes_each_topic():
    state = ViewState(endpoint=ENDPOINT)
    assert not state.connected and state.last_message_s is None and not state.is_stale()
    state.apply(schema.decode(spectrum_frames("integration", row=3)), 10.0)
    assert state.spectrum["row"] == 3 and state.spectrum["unit"] == "K"
    assert state.spectrum["arrays"]["data"].shape == (NCHAN,)
    assert state.spectrum["units"]["v_lsrk_km_s"] == "km/s"
    assert state.average is None
    assert len(state.waterfall) == 1
    row, flags = state.waterfall[0]
    assert flags.dtype == bool and list(np.flatnonzero(flags)) == [100, 101, 700]
    np.testing.assert_allclose(row, state.spectrum["arrays"]["data"])
    state.apply(schema.decode(spectrum_frames("average", row=3)), 11.0)
    assert state.average["kind"] == "average" and len(state.waterfall) == 1
    state.apply(schema.decode(status_frames(74.2)), 12.0)
    assert list(state.tsys_history) == [(12.0, 74.2)]
    state.apply(schema.decode(status_frames(None)), 12.5)          # null Tsys: no history point
    assert len(state.tsys_history) == 1 and state.status["tsys_k"] is None
    state.apply(schema.decode(progress_frames()), 13.0)
    assert state.progress["integration_elapsed_s"] == 12.6
    state.apply(schema.decode(event_frames("hello", "info")), 14.0)
    assert state.events[-1][1:] == ("info", "hello")
    assert state.connected and state.last_message_s == 14.0 and state.now_s == 14.0


def test_resent_messages_are_not_doubled():
    # the wire docstring: a subscriber that (re)joins gets the latest message of each topic
    # again; the waterfall and the events must not grow from that
    state = ViewState()
    frames = spectrum_frames(row=7)
    state.apply(schema.decode(frames), 1.0)
    state.apply(schema.decode(frames), 2.0)
    state.apply(schema.decode(spectrum_frames(row=8, time_utc="2025-03-01T21:05:00Z")), 3.0)
    assert len(state.waterfall) == 2
    ev = event_frames()
    state.apply(schema.decode(ev), 4.0)
    state.apply(schema.decode(ev), 5.0)
    assert len(state.events) == 1


def test_history_lengths_are_bounded():
    state = ViewState()
    assert (state.events.maxlen, state.tsys_history.maxlen, state.waterfall.maxlen) == \
        (50, 300, 60)


def test_stale_after_the_limit_and_toggle_axis():
    state = ViewState(stale_after_s=3.0)
    state.apply(schema.decode(status_frames()), 50.0)
    state.now_s = 53.0
    assert not state.is_stale()
    state.now_s = 53.01
    assert state.is_stale()
    assert state.axis == "velocity"
    state.toggle_axis()
    assert state.axis == "frequency"
    state.toggle_axis()
    assert state.axis == "velocity"


# ----------------------------------------------------------------------------------------------
# panels one by one
# ----------------------------------------------------------------------------------------------
@pytest.mark.parametrize("width,height", SIZES)
def test_each_panel_fits_and_says_its_values(width, height):
    state = full_state()
    spec = render(panels.spectrum_panel(state, width - 30, height - 8), width, height)
    assert "km/s" in spec and "K" in spec and "flagged 3 ch" in spec
    assert_fits(spec, width - 30, height - 8)

    tsys = render(panels.tsys_panel(state, 30, 4), width, height)
    assert "74.2 K" in tsys and "Tsys" in tsys
    assert_fits(tsys, 30, 4)

    prog = render(panels.progress_panel(state, width), width, height)
    assert "42 %" in prog                           # 12.6 / 30 s
    assert "12.6/30.0 s" in prog and "ETA 17 s" in prog        # 30 - 12.6 = 17.4 s
    assert "54 %" in prog and "ETA 2 min 17 s" in prog         # 162.6 / 300 s; eta 137.4 s
    assert_fits(prog, width, 2)

    rfi = render(panels.rfi_panel(state, 30, 10), width, height)
    assert re.search(r"flagged \d+\.\d %", rfi) and "0.3 %" in rfi       # 3 / 1024
    assert "imp 3" in rfi and "car 2" in rfi
    assert_fits(rfi, 30, 10)

    rx = render(panels.receiver_panel(state, 30), width, height)
    for text in ("az 181.2°", "el 42.0°", "l 120.00°", "b 0.50°", "LO 1420.000 MHz",
                 "gain 40.2 dB", "2.40 MS/s", "lost 1000 samples", "disk 9.9 GB free"):
        assert text in rx, text
    assert_fits(rx, 30, height)

    ev = render(panels.events_panel(state, width, 3), width, height)
    assert "WARN" in ev and "carrier at 1420.1 MHz" in ev
    assert_fits(ev, width, 3)

    link = render(panels.link_panel(state, width), width, height)
    assert ENDPOINT in link and "0.4 s ago" in link

    keys = render(panels.help_line(state, width), width, height)
    for key in ("[g]", "[x]", "[c]", "[n]", "[a]", "[q]"):
        assert key in keys


def test_receiver_panel_says_when_writing_is_held():
    state = full_state()
    rx = render(panels.receiver_panel(state, 44), 44, 12)
    assert "HELD" not in rx
    state.apply(schema.decode(status_frames(writing="holding", held=7)), 101.0)
    rx = render(panels.receiver_panel(state, 44), 44, 12)
    assert "WRITING HELD" in rx and "7 in memory" in rx


def test_receiver_panel_says_when_a_thread_failed():
    """Issue 12: a worker thread's failure is visible in the UI, not only in the log."""
    state = full_state()
    rx = render(panels.receiver_panel(state, 44), 44, 12)
    assert "FAILED" not in rx
    state.apply(schema.decode(status_frames(writing="failed", failures={"writer": 2})), 101.0)
    rx = render(panels.receiver_panel(state, 44), 44, 12)
    assert "THREAD FAILED" in rx and "writer ×2" in rx and "WRITING FAILED" in rx


def test_open_ended_scan_shows_time_observed():
    state = ViewState()
    state.apply(schema.decode(progress_frames(scan_total_s=None, eta_s=None)), 1.0)
    text = render(panels.progress_panel(state, 80), 80, 24)
    assert "no end set" in text and "42 %" in text


def test_flag_strip_and_line_sit_under_their_tick_labels():
    # one integration, no noise: the line's peak is at 0 km/s LSRK and the only flagged
    # channel is the one nearest -200 km/s (axis built with astropy's doppler_radio)
    _, v_km_s = axes()
    flag = int(np.argmin(np.abs(v_km_s + 200.0)))
    state = ViewState(endpoint=ENDPOINT)
    state.apply(schema.decode(spectrum_frames(flag_idx=(flag,))), 1.0)
    lines = render(panels.spectrum_panel(state, 80, 20), 80, 20).splitlines()
    bottom, strip = lines[-1], lines[-2]
    ticks = {m.group(): m.start() + len(m.group()) // 2
             for m in re.finditer(r"-?\d+", bottom)}
    assert "-200" in ticks and "0" in ticks, bottom
    assert strip.count("x") == 1
    assert abs(strip.index("x") - ticks["-200"]) <= 1
    axis_col = re.search("[│┤]", lines[1]).start()
    top = next(line for line in lines[1:-2] if line[axis_col + 1:].strip())
    peak_cols = [i for i, ch in enumerate(top) if i > axis_col and ch != " "]
    assert abs(np.mean(peak_cols) - ticks["0"]) <= 1


def test_waterfall_marks_flags_and_levels():
    data = np.zeros(100)
    data[90:] = 10.0                                   # the last tenth is hot
    flagged = np.zeros(100, bool)
    flagged[5] = True
    rows = panels.waterfall_rows([(data, flagged)] * 3, 10, 2)
    assert len(rows) == 2                              # the newest 2 of 3
    cells = rows[0].plain
    assert cells[0] == panels.FLAG_MARK and cells.count(panels.FLAG_MARK) == 1
    assert cells[-1] == panels.SHADES[-1] and cells[1] == panels.SHADES[0]


def test_sparkline_rises_with_the_values():
    # filled eighths 1 + round((v - 1) / 3 * 7): 1, 1 + round(2.33), 1 + round(4.67), 8
    (line,) = panels.sparkline([1.0, 2.0, 3.0, 4.0], 6)
    assert line.plain == "  " + "".join(panels.EIGHTHS[e] for e in (1, 3, 6, 8))


def test_durations_read_well():
    assert panels.format_duration(17.4) == "17 s"
    assert panels.format_duration(437.4) == "7 min 17 s"
    assert panels.format_duration(7_380.0) == "2 h 03 min"
    assert panels.format_duration(None) == "?"


# ----------------------------------------------------------------------------------------------
# the whole screen
# ----------------------------------------------------------------------------------------------
@pytest.mark.parametrize("width,height", SIZES)
def test_screen_shows_everything_and_fits(width, height):
    state = full_state()
    text = render(panels.screen(state, width, height), width, height)
    assert_fits(text, width, height)
    for needle in ("km/s", "74.2 K", "42 %", "ETA 17 s", "MHz", "dB", "MS/s", "GB",
                   "G120.0+0.5", "OBSERVING", "carrier at 1420.1 MHz", "[q]"):
        assert needle in text, needle
    assert re.search(r"flagged \d+\.\d %", text)
    assert "STALE" not in text and "waiting for data" not in text


def test_screen_uses_a_bigger_terminal():
    state = full_state()
    small = render(panels.screen(state, 80, 24), 80, 24)
    big = render(panels.screen(state, 160, 50), 160, 50)
    braille = re.compile("[\u2801-\u28ff]")
    assert len(braille.findall(big)) > 2 * len(braille.findall(small))
    assert "RA 3.50°" in big                           # extra receiver lines on a wide screen


@pytest.mark.parametrize("width,height", SIZES)
def test_stale_warning_cannot_be_missed(width, height):
    state = full_state(now_s=100.0)
    state.now_s = 107.0                                # 7 s without a message, limit 3 s
    text = render(panels.screen(state, width, height), width, height)
    assert_fits(text, width, height)
    assert "no data for 7 s: daemon gone? reconnecting" in text
    assert text.count("STALE") >= 10                   # a banner of words, not a colour
    assert "74.2 K" in text                            # the last data stay on screen


@pytest.mark.parametrize("width,height", SIZES)
def test_waiting_before_any_data(width, height):
    state = ViewState(endpoint=ENDPOINT)
    text = render(panels.screen(state, width, height), width, height)
    assert_fits(text, width, height)
    assert f"waiting for data from {ENDPOINT}" in text
    assert "STALE" not in text


@pytest.mark.parametrize("width,height", SIZES)
def test_frequency_axis_after_toggle(width, height):
    state = full_state()
    state.toggle_axis()
    text = render(panels.screen(state, width, height), width, height)
    assert_fits(text, width, height)
    assert "f sky MHz" in text and "v LSRK km/s" not in text
    # the tick labels are sky frequencies in MHz: the band is 1419.2 .. 1421.6 MHz
    axis_line = next(line for line in text.splitlines() if "f sky MHz" in line)
    ticks = [float(t) for t in re.findall(r"\b\d{4}(?:\.\d+)?\b", axis_line)]
    assert len(ticks) >= 2 and all(1419.2 <= t <= 1421.6 for t in ticks), axis_line


def test_ascii_screen_has_no_braille_and_marks_flags():
    state = full_state()
    text = render(panels.screen(state, 80, 24, ascii=True), 80, 24)
    assert_fits(text, 80, 24)
    assert not re.search("[\u2800-\u28ff]", text)
    assert "x flagged 3 ch" in text and "km/s" in text


# ----------------------------------------------------------------------------------------------
# NO_COLOR
# ----------------------------------------------------------------------------------------------
COLOUR_SGR = set(range(30, 50)) | set(range(90, 98)) | set(range(100, 108))


@pytest.mark.parametrize("width,height", SIZES)
def test_no_color_keeps_the_content(width, height):
    for state_now in (100.4, 107.0):                   # fresh and stale
        state = full_state()
        state.now_s = state_now
        plain = render(panels.screen(state, width, height), width, height)
        console = Console(record=True, width=width, height=height, file=io.StringIO(),
                          force_terminal=True, color_system="truecolor", no_color=True)
        console.print(panels.screen(state, width, height))
        styled = console.file.getvalue()                   # what the terminal receives
        assert console.export_text() == plain
        params = {int(p) for seq in re.findall(r"\x1b\[([0-9;]*)m", styled)
                  for p in seq.split(";") if p}
        assert not params & COLOUR_SGR                 # ECMA-48 colour parameters
        if state.is_stale():
            assert 7 in params                         # the STALE banner in reversed colours
