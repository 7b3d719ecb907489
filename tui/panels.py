"""The panels of the terminal UI and the whole screen: pure functions of a :class:`ViewState`.

Every function here returns a :class:`rich.text.Text` whose lines are exactly as wide as asked
(padded with spaces, long text cut with an ellipsis), so panels can be set side by side and
the screen never wraps. Nothing here reads the clock, the terminal or the network: the app
sets ``state.now_s`` and the size, and prints what :func:`screen` returns.

Layout of :func:`screen` (W x H cells, at least 80 x 24)::

    top bar: spinflip, station/object, daemon state, scan, link age
    [STALE banner, 3 lines, or the "waiting for data" line, when so]
    [POINT THE DISH prompt of the manual driver, when it waits for the observer]
    progress: integration bar, scan bar (percent, elapsed/total, ETA)
    [mount: driver, state, az/el reached and target, error, detail; with a driver]
    [plan: name, step, ETA, counts; now: target, phase, visit bar; next | skipped]
    +-------------------------------------------+----------------------+
    | spectrum: legend line, then the plot      | link (wide screens)  |
    | (latest integration and running average,  | Tsys now + history   |
    |  flagged channels marked 'x'; x axis LSRK | receiver             |
    |  velocity km/s or sky frequency MHz, y in | interference +       |
    |  K or counts)                             | waterfall            |
    +-------------------------------------------+----------------------+
    events (latest few)
    help line (keys) and the last control reply

The side column is about a third of the width (27 cells at 80, 46 at 160); the plot, the
Tsys history, the waterfall and the events list take whatever height is left.

Notes
-----
Colour comes only from styles; every piece of information is also in the characters, so a
console with ``no_color=True`` or ``color_system=None`` loses nothing: flagged channels and
flagged waterfall cells are drawn as 'x', waterfall levels as shades of block characters,
warnings as words ("STALE", "WARN", "ERROR"), states as words ("SLEWING", "WAITING",
"FAULT"). The plan, mount and prompt panels are :mod:`spinflip.tui.plan_panel`. The average and the latest integration share
the plot; without colour they differ by weight (average bold, integration dim) and both are
named in the legend.

Numbers carry their units: K, km/s, MHz, dB, MS/s (10^6 complex samples per second), s, %,
GB (10^9 bytes), deg.
"""

from __future__ import annotations

import math
from collections.abc import Iterable

import numpy as np
from rich.text import Text

from .braille import Series, plot
from .cells import (
    S_AVERAGE,
    S_FLAGGED,
    S_INTEGRATION,
    S_LABEL,
    S_RULE,
    S_SEVERITY,
    S_STALE,
    S_TITLE,
    S_VALUE,
    S_WAIT,
    SEVERITY_WORD,
    bar,
    block,
    elapsed_total,
    fit,
    format_age,
    format_duration,
    hms,
    kv,
    num,
    pack,
    rule,
    text_lines,
)
from .plan_panel import mount_height, mount_panel, plan_height, plan_panel, prompt_panel
from .state import ViewState

#: Waterfall shades from low to high, and the mark of a flagged cell.
SHADES = "·░▒▓█"
SHADES_ASCII = ".:-=#"
FLAG_MARK = "x"

#: Sparkline blocks, 0/8 .. 8/8 of a cell.
EIGHTHS = " ▁▂▃▄▅▆▇█"

#: Width of the side column (Tsys, receiver, interference) as a fraction of the screen.
SIDE_FRACTION = 0.29
SIDE_MIN_CHARS = 27
SIDE_MAX_CHARS = 56

#: The smallest screen everything is laid out for, cells.
MIN_WIDTH = 80
MIN_HEIGHT = 24

KEYS = (("g", "start"), ("x", "stop"), ("c", "calibrate"), ("n", "new scan"),
        ("a", "axis"), ("v", "survey"), ("q", "quit"))
KEYS_SHORT = (("g", "start"), ("x", "stop"), ("c", "cal"), ("n", "scan"), ("a", "axis"),
              ("v", "survey"), ("q", "quit"))
#: The key of the manual driver (shown only when the daemon has one), before "q".
KEY_POINTED = ("p", "pointed")

#: Style of the daemon's state in the top bar (the state is written out in capitals too).
STATE_STYLE = {"slewing": "bold cyan", "waiting": S_WAIT, "reconnecting": S_WAIT}


# ----------------------------------------------------------------------------------------------
# what the state says
# ----------------------------------------------------------------------------------------------
def _tsys_now_k(state: ViewState) -> float | None:
    """Latest system temperature, K: the status's, else the latest spectrum's."""
    for src in (state.status, state.spectrum):
        if src and src.get("tsys_k") is not None:
            return float(src["tsys_k"])
    return None


def _target(state: ViewState) -> str:
    """Station and object, as far as known: "station: object"."""
    obj, station = "", ""
    for src in (state.spectrum, state.average):
        if src:
            obj = obj or src.get("object", "")
            station = station or src.get("station", "")
    if state.status:
        obj = obj or state.status.get("pointing", {}).get("object", "")
        station = station or state.status.get("station", "")
    return ": ".join(p for p in (station, obj) if p)


def state_words(state: ViewState) -> str:
    """The daemon's state for people: "OBSERVING", ...; under a plan "SLEWING to OBJECT",
    and "WAITING" with what for when the plan or the driver says ("WAITING for you", "for
    a target to rise", "parked", "for the rotator")."""
    what = str((state.status or {}).get("state", "?"))
    words = what.upper()
    plan = state.plan or {}
    mount = state.mount or {}
    if what == "slewing" and plan.get("object"):
        words += f" to {plan['object']}"
    elif what == "waiting":
        if state.awaits_observer():
            words += " for you"
        elif plan.get("phase") == "deferred":
            words += ": nothing up yet"
        elif plan.get("phase") == "parked" or mount.get("state") == "parked":
            words += ": parked"
        elif mount.get("state") == "fault":
            words += " for the rotator"
    return words


# ----------------------------------------------------------------------------------------------
# top bar, link, help
# ----------------------------------------------------------------------------------------------
def top_bar(state: ViewState, width: int) -> Text:
    """One line: name, station/object, daemon state, scan (left); the link's state (right).

    Parameters
    ----------
    state : ViewState
    width : int
        Cells.

    Returns
    -------
    rich.text.Text
        Exactly one line of ``width`` cells.
    """
    left = Text("spinflip", style="bold reverse")
    target = _target(state)
    if target:
        left.append("  ")
        left.append(target, style=S_VALUE)
    if state.status:
        left.append("  ")
        left.append(state_words(state),
                    style=STATE_STYLE.get(state.status.get("state", ""), "bold"))
    scan = (state.progress or {}).get("scan") or (state.status or {}).get("scan")
    if scan:
        left.append("  scan ", style=S_LABEL)
        left.append(str(scan))
        if state.progress and state.progress.get("scan"):
            left.append(f" #{state.progress.get('integration', 0)}")
    age = state.age_s()
    if not state.has_data() or age is None:     # the same test: age is None before a message
        right = Text("WAITING", style=S_WAIT)
    elif state.is_stale():
        right = Text(f"STALE {format_age(age)}", style=S_STALE)
    else:
        right = Text("live ", style=S_LABEL)
        right.append(format_age(age), style=S_VALUE)
    gap = width - right.cell_len - 1
    line = fit(left, max(0, gap))
    line.append(" ")
    line.append_text(right)
    return fit(line, width)


def link_panel(state: ViewState, width: int) -> Text:
    """The connection: endpoint and the last message's age; a loud warning when data stop.

    Parameters
    ----------
    state : ViewState
    width : int
        Cells.

    Returns
    -------
    rich.text.Text
        One line while waiting for the first message ("waiting for data from ENDPOINT") or
        while data flow (endpoint, age, drops reported by the daemon); three lines when
        stale: a line of "! STALE", the warning "STALE: no data for N s: daemon gone?
        reconnecting to ENDPOINT", a line of "! STALE", all in reversed colours.

    Notes
    -----
    Stale means no message of any topic for more than ``state.stale_after_s``; the daemon
    sends a status about once a second (common practice for a heartbeat), so a few seconds of
    silence means the daemon or the network is gone. ZeroMQ reconnects by itself meanwhile.
    """
    endpoint = state.endpoint or "the daemon"
    if not state.has_data():
        t = Text("… waiting for data from ", style=S_WAIT)
        t.append(endpoint, style="bold")
        return block([t], width, 1)
    age = state.age_s()
    assert age is not None          # has_data(): a message has arrived
    if state.is_stale():
        msg = f" STALE: no data for {age:.0f} s: daemon gone? reconnecting "
        full = msg + f"to {endpoint} "
        msg = full if len(full) + 8 <= width else msg
        pad = max(0, width - len(msg))
        middle = Text("!" * (pad // 2) + msg + "!" * (pad - pad // 2), style=S_STALE)
        border = Text(("! STALE " * (width // 8 + 1))[:width], style=S_STALE)
        return block([border, middle, border.copy()], width, 3)
    t = Text("link ", style=S_LABEL)
    t.append(endpoint)
    t.append("  last ", style=S_LABEL)
    t.append(format_age(age) + " ago", style=S_VALUE)
    drops = (state.status or {}).get("drops") or {}
    ndrop = sum(int(v) for v in drops.values())
    if ndrop:
        t.append(f"  dropped {ndrop}", style="yellow")
    if not state.connected:
        t.append("  (disconnected)", style="bold yellow")
    return block([t], width, 1)


def help_line(state: ViewState, width: int | None = None) -> Text:
    """The keys (g start, x stop, c calibrate, n new scan, a axis, v survey, [p pointed,]
    q quit) and the last reply; "p pointed" only when the daemon's pointing driver is manual;
    in the survey view "v" says "main" (the key goes back).

    Parameters
    ----------
    state : ViewState
    width : int, optional
        Cells; when given the line is fitted to it; below 100 cells short key names are used
        and the last reply comes first, so that it is never cut off.

    Returns
    -------
    rich.text.Text
        One line.
    """
    keys: tuple[tuple[str, str], ...] = KEYS_SHORT if width is not None and width < 100 \
        else KEYS
    if (state.mount or {}).get("driver") == "manual":
        keys = keys[:-1] + (KEY_POINTED,) + keys[-1:]
    other = "MHz" if state.axis == "velocity" else "km/s"
    t = Text()
    for i, (key, what) in enumerate(keys):
        if i:
            t.append("  ")
        t.append(f"[{key}]", style="bold reverse")
        if key == "v" and state.view == "survey":
            what = "main"
        t.append(f"{what}{'→' + other if key == 'a' else ''}", style=S_LABEL)
    if state.reply and width is not None and width < 100:
        # a narrow terminal: the newest reply first, the keys after it (cut at the edge)
        first = Text()
        first.append("» ", style=S_LABEL)
        first.append(state.reply, style=S_VALUE)
        first.append("  ")
        return fit(first + t, width)
    if state.reply:
        t.append("  » ", style=S_LABEL)
        t.append(state.reply, style=S_VALUE)
    return fit(t, width) if width is not None else t


# ----------------------------------------------------------------------------------------------
# spectrum
# ----------------------------------------------------------------------------------------------
def _axis_x(spec: dict, axis: str) -> np.ndarray:
    """x values of a spectrum: LSRK radio velocity in km/s, or sky frequency in MHz."""
    arrays = spec["arrays"]
    if axis == "frequency":
        return np.asarray(arrays["freq_hz"], dtype=float) / 1e6
    return np.asarray(arrays["v_lsrk_km_s"], dtype=float)


def _centred(text: Text, width: int, height: int) -> Text:
    """A Text in the middle of an otherwise empty width x height block."""
    pad = max(0, (width - text.cell_len) // 2)
    line = Text(" " * pad)
    line.append_text(text)
    rows = [Text("")] * (max(0, height - 1) // 2) + [line]
    return block(rows, width, height)


#: Characters of the plot's left axis (braille and ASCII plots), used to find its column.
AXIS_CHARS = "\u2502\u2524|+"


def _axis_column(rows: list[str]) -> int | None:
    """Column of the plot's y axis: the first column holding an axis character in every row."""
    if not rows:
        return None
    n = min(len(r) for r in rows)
    for c in range(n):
        if all(r[c] in AXIS_CHARS for r in rows):
            return c
    return None


def flag_strip(x: np.ndarray, flagged: np.ndarray, x_range: tuple[float, float],
               cells: int) -> np.ndarray:
    """Which of ``cells`` plot columns hold a flagged channel.

    Parameters
    ----------
    x : numpy.ndarray
        x value of each channel (km/s or MHz).
    flagged : numpy.ndarray of bool
        The channels' flags.
    x_range : (float, float)
        The plot's x range.
    cells : int
        Plot columns (2 braille dots each).

    Returns
    -------
    numpy.ndarray of bool
        True for the columns with a flagged channel, by the plot's own mapping
        x_dot = (x - x_lo) / (x_hi - x_lo) (2 cells - 1), column = floor(x_dot + 1/2) // 2
        (see :func:`spinflip.tui.braille.plot`).
    """
    out = np.zeros(max(0, cells), dtype=bool)
    x_lo, x_hi = x_range
    sel = np.asarray(flagged, dtype=bool) & np.isfinite(x)
    if cells <= 0 or not sel.any() or x_hi <= x_lo:
        return out
    x_dot = (np.asarray(x, dtype=float)[sel] - x_lo) / (x_hi - x_lo) * (2 * cells - 1)
    col = np.floor(x_dot + 0.5).astype(int) // 2
    col = col[(col >= 0) & (col < cells)]
    out[col] = True
    return out


def spectrum_panel(state: ViewState, width: int, height: int, ascii: bool = False) -> Text:
    """The spectrum: latest integration and running average on one plot, flags marked.

    Parameters
    ----------
    state : ViewState
    width, height : int
        Cells; the first line is the legend, then the plot, a strip marking flagged channels
        with 'x', and the x axis (needs width >= 30 and height >= 8 for a plot; smaller gives
        the legend only).
    ascii : bool
        Draw the plot with ASCII characters instead of braille (terminals without braille).

    Returns
    -------
    rich.text.Text
        Exactly ``height`` lines of ``width`` cells. Before any message: "waiting for data
        from ENDPOINT"; with messages but no spectrum yet: what the daemon is doing.

    Notes
    -----
    x is the LSRK radio velocity v = c (nu0 - nu) / nu0 + v_frame in km/s (as sent, wire
    field ``v_lsrk_km_s``) or the topocentric sky frequency nu in MHz (``freq_hz`` / 10^6),
    as ``state.axis`` says; y is the data in their unit, K or count. The plot's y range
    leaves flagged channels out (a strong carrier does not squash the line); they are drawn
    in the flagged style and clipped at the edge, and the strip under the plot marks their
    columns with 'x' so that flags do not depend on colour. Channels the fold does not cover
    (:meth:`ViewState.uncovered_channels`: no partner in the other switching phase) are not
    interference: they are left out of the plot and its x range, not marked 'x', and the
    legend counts them apart ("N ch not covered").
    """
    specs = [s for s in (state.average, state.spectrum) if s is not None]
    if not specs:
        if not state.has_data():
            msg = Text(f"waiting for data from {state.endpoint or 'the daemon'}", style=S_WAIT)
        else:
            what = (state.status or {}).get("state", "")
            msg = Text("no spectrum yet" + (f": daemon {what}" if what else ""), style=S_WAIT)
            if what == "idle":
                msg.append(" (g starts an observation)", style=S_LABEL)
            elif what in ("slewing", "waiting"):
                msg = Text("no spectrum yet: " + state_words(state), style=S_WAIT)
                msg.append(" (nothing is observed meanwhile)", style=S_LABEL)
        return _centred(msg, width, height)

    unit = specs[-1].get("unit", "K")
    x_label = "v LSRK km/s" if state.axis == "velocity" else "f sky MHz"
    legend = Text()
    series, xs, flags = [], [], []
    uncovered = 0
    for spec, style, name in ((state.average, S_AVERAGE, "average"),
                              (state.spectrum, S_INTEGRATION, "integration")):
        if spec is None:
            continue
        arrays = spec["arrays"]
        x = _axis_x(spec, state.axis)
        mask = np.asarray(arrays["flagged"], dtype=bool)
        y = np.asarray(arrays["data"], dtype=float)
        keep = ~state.uncovered_channels(spec)
        if keep.shape == x.shape:              # the fold's uncovered edge is left out
            uncovered = int(np.count_nonzero(~keep))
            x, y, mask = x[keep], y[keep], mask[keep]
        xs.append(x[np.isfinite(x)])
        flags.append((x, mask))
        series.append(Series(x=x, y=y, style=style, name=name, mask=mask))
        if legend.cell_len:
            legend.append("  ")
        if name == "average":
            legend.append(f"━ average {spec.get('row', 0) + 1} int", style=style)
        else:
            legend.append(f"· int #{spec.get('row', 0)} {spec.get('exposure_s', 0):.1f} s",
                          style=style)
    nflag = int(np.count_nonzero(flags[-1][1]))
    legend.append("  ")
    legend.append(FLAG_MARK, style=S_FLAGGED)
    legend.append(f" flagged {nflag} ch", style=S_LABEL)
    if uncovered:
        legend.append(f"  {uncovered} ch not covered", style=S_LABEL)
    what = (state.status or {}).get("state")
    if what in ("slewing", "waiting"):         # the plot is the last spectrum: none comes now
        legend.append(f"  {str(what).upper()}", style=STATE_STYLE[what])
    if state.is_stale():
        legend.append("  STALE", style=S_STALE)
    allx = np.concatenate(xs)
    x_range = (float(allx.min()), float(allx.max())) if allx.size else (0.0, 1.0)
    if x_range[1] <= x_range[0]:
        x_range = (x_range[0] - 0.5, x_range[0] + 0.5)
    if width < 30 or height < 8:
        return block([legend], width, height)
    body = text_lines(plot(series, width, height - 2, x_range=x_range, x_label=x_label,
                       y_label=unit, x_ticks=max(2, width // 16),
                       y_ticks=max(2, min(6, (height - 2) // 4)), ascii=ascii))
    axis_col = _axis_column([line.plain for line in body[:-1]])
    if axis_col is None:                       # not expected: keep the plot, mark nothing
        return block([legend] + body, width, height)
    cells = width - axis_col - 1
    marks = np.zeros(cells, dtype=bool)
    for x, mask in flags:
        marks |= flag_strip(x, mask, x_range, cells)
    strip = Text(("flag" if axis_col >= 4 else "").rjust(axis_col), style=S_LABEL)
    strip.append("|" if ascii else "\u2502", style=S_RULE)
    for m in marks:
        strip.append(FLAG_MARK if m else " ", style=S_FLAGGED if m else "")
    return block([legend] + body[:-1] + [strip, body[-1]], width, height)


# ----------------------------------------------------------------------------------------------
# Tsys
# ----------------------------------------------------------------------------------------------
def sparkline(values: Iterable[float], width: int, height: int = 1, lo: float | None = None,
              hi: float | None = None) -> list[Text]:
    """The last ``width`` values as columns of eighth-blocks, ``height`` rows tall.

    Parameters
    ----------
    values : sequence of float
    width, height : int
        Cells.
    lo, hi : float, optional
        The range mapped to empty .. full; the values' own range by default.

    Returns
    -------
    list of rich.text.Text
        ``height`` lines, top first, right-aligned (newest value at the right); a column
        is filled to 1 + round((v - lo) / (hi - lo) (8 height - 1)) eighths of a cell, so
        the lowest value still shows (half height when hi == lo).
    """
    v = np.asarray(list(values), dtype=float)[-max(1, width):]
    v = v[np.isfinite(v)]
    if v.size == 0:
        return [Text(" " * width) for _ in range(height)]
    lo = float(v.min()) if lo is None else lo
    hi = float(v.max()) if hi is None else hi
    if hi > lo:
        eighths = np.rint((v - lo) / (hi - lo) * (8 * height - 1)).astype(int) + 1
    else:
        eighths = np.full(v.size, 4 * height)
    rows = []
    for r in range(height):                         # r = 0 is the top row
        base = (height - 1 - r) * 8
        cells = "".join(EIGHTHS[min(8, max(0, e - base))] for e in eighths)
        rows.append(Text(cells.rjust(width), style="cyan"))
    return rows


def tsys_panel(state: ViewState, width: int, height: int) -> Text:
    """System temperature now (K, with where it comes from) and its history as a sparkline.

    Parameters
    ----------
    state : ViewState
    width, height : int
        Cells; line 1 is the title with the value, then ``height - 1`` rows of history (the
        last of them gives the range and time span when ``height >= 4``).

    Returns
    -------
    rich.text.Text
        Exactly ``height`` lines of ``width`` cells.
    """
    now = _tsys_now_k(state)
    title = Text("Tsys ", style=S_TITLE)
    title.append(num(now, ".1f", "K"), style="bold cyan")
    src = (state.status or {}).get("tsys_source")
    if src and width >= 40:
        title.append(f" ({src})", style=S_LABEL)
    lines = [rule(title, width)]
    hist = [t for _, t in state.tsys_history]
    rows = height - 1
    label = None
    if rows >= 3 and hist:
        rows -= 1
        span_s = state.tsys_history[-1][0] - state.tsys_history[0][0]
        label = Text(f"{min(hist):.1f}–{max(hist):.1f} K over {format_duration(span_s)}",
                     style=S_LABEL)
    if rows > 0:
        if hist:
            lines += sparkline(hist, width, rows)
        else:
            lines += [Text("no Tsys history yet", style=S_LABEL)] + [Text("")] * (rows - 1)
    if label is not None:
        lines.append(label)
    return block(lines, width, height)


# ----------------------------------------------------------------------------------------------
# progress
# ----------------------------------------------------------------------------------------------

def _progress_line(label: str, elapsed_s: float, total_s: float | None, eta_s: float | None,
                   width: int, ascii: bool) -> Text:
    head = Text(label, style=S_LABEL)
    if total_s is None or total_s <= 0:
        tail = Text(f" {format_duration(elapsed_s)} observed, no end set", style=S_VALUE)
        head.append_text(tail)
        return fit(head, width)
    frac = elapsed_s / total_s
    tail = Text(f" {100 * frac:3.0f} %", style=S_VALUE)
    tail.append(f"  {elapsed_total(elapsed_s, total_s)}")
    tail.append("  ETA ", style=S_LABEL)
    tail.append(format_duration(eta_s), style=S_VALUE)
    bar_w = width - head.cell_len - tail.cell_len - 1
    line = head
    line.append(" ")
    if bar_w >= 4:
        line.append_text(bar(frac, bar_w, ascii))
    line.append_text(tail)
    return fit(line, width)


def progress_panel(state: ViewState, width: int, ascii: bool = False) -> Text:
    """Two lines: the integration and the scan, each "bar  42 %  12.6/30.0 s  ETA 17 s".

    Parameters
    ----------
    state : ViewState
    width : int
        Cells.
    ascii : bool
        '#' and '-' instead of block characters.

    Returns
    -------
    rich.text.Text
        Exactly 2 lines of ``width`` cells.

    Notes
    -----
    Integration: fraction = elapsed / total, ETA = total - elapsed. Scan: fraction =
    scan_elapsed / scan_total, ETA = the daemon's ``eta_s`` (it knows about pauses and
    calibrations); an open-ended scan (``scan_total_s`` null) shows the time observed only.
    """
    p = state.progress
    if not p:
        what = (state.status or {}).get("state")
        msg = "no progress yet" + (f": daemon {what}" if what else "")
        return block([Text(msg, style=S_LABEL), Text("")], width, 2)
    label_w = max(len(f"int #{p.get('integration', 0)}"), 4) + 1
    int_e = float(p.get("integration_elapsed_s", 0.0))
    int_t = float(p.get("integration_total_s", 0.0))
    first = _progress_line(f"int #{p.get('integration', 0)}".ljust(label_w), int_e, int_t,
                           max(0.0, int_t - int_e), width, ascii)
    if p.get("scan") is None:
        second = Text("scan".ljust(label_w) + " none running (between scans)", style=S_LABEL)
    else:
        second = _progress_line("scan".ljust(label_w), float(p.get("scan_elapsed_s", 0.0)),
                                p.get("scan_total_s"), p.get("eta_s"), width, ascii)
    return block([first, second], width, 2)


# ----------------------------------------------------------------------------------------------
# interference
# ----------------------------------------------------------------------------------------------
def waterfall_rows(rows: Iterable[tuple[np.ndarray, np.ndarray]], width: int, height: int,
                   ascii: bool = False, keep: np.ndarray | None = None) -> list[Text]:
    """Recent integrations, newest on top: one line per integration, one cell per channel group.

    Parameters
    ----------
    rows : sequence of (numpy.ndarray, numpy.ndarray)
        (data, flagged) per integration, oldest first (``ViewState.waterfall``).
    width, height : int
        Cells: the channels of each row are cut into ``width`` consecutive groups (fewer if
        there are fewer channels); at most ``height`` rows, the newest.
    ascii : bool
        ASCII shades ".:-=#" instead of "·░▒▓█".
    keep : numpy.ndarray of bool, optional
        Channels to show (e.g. not those the fold does not cover); rows of another length
        are shown whole.

    Returns
    -------
    list of rich.text.Text
        Up to ``height`` lines. A cell with any flagged channel is 'x'; otherwise its level is
        the mean of its unflagged finite channels, shaded on a scale common to all rows shown,
        from their 2nd to their 98th percentile (so one hot cell does not wash out the rest).
    """
    shown = list(rows)[-height:][::-1] if height > 0 else []
    if not shown or width <= 0:
        return []
    shades = SHADES_ASCII if ascii else SHADES
    cells, flags = [], []
    for data, flagged in shown:
        data = np.asarray(data, dtype=float)
        flagged = np.asarray(flagged, dtype=bool)
        if keep is not None and keep.shape == data.shape == flagged.shape:
            data, flagged = data[keep], flagged[keep]
        groups = np.array_split(np.arange(data.size), min(width, max(1, data.size)))
        means, marks = [], []
        for g in groups:
            good = data[g][~flagged[g] & np.isfinite(data[g])]
            means.append(float(good.mean()) if good.size else math.nan)
            marks.append(bool(flagged[g].any()) or good.size == 0)
        cells.append(np.array(means))
        flags.append(np.array(marks))
    allv = np.concatenate(cells)
    allv = allv[np.isfinite(allv)]
    lo, hi = (np.percentile(allv, [2, 98]) if allv.size else (0.0, 1.0))
    styles = ("blue", "cyan", "green", "yellow", "bold white")
    out = []
    for row_means, row_marks in zip(cells, flags, strict=True):
        t = Text()
        for m, f in zip(row_means, row_marks, strict=True):
            if f or not math.isfinite(m):
                t.append(FLAG_MARK, style=S_FLAGGED)
                continue
            level = 0 if hi <= lo else int(np.clip((m - lo) / (hi - lo) * len(shades), 0,
                                                   len(shades) - 1))
            t.append(shades[level], style=styles[level])
        out.append(t)
    return out


def rfi_panel(state: ViewState, width: int, height: int, ascii: bool = False) -> Text:
    """Interference: flagged fraction now, impulses, carriers, and a waterfall of integrations.

    Parameters
    ----------
    state : ViewState
    width, height : int
        Cells. Title line, one or two readout lines, the rest waterfall rows.
    ascii : bool
        ASCII waterfall shades.

    Returns
    -------
    rich.text.Text
        Exactly ``height`` lines of ``width`` cells.

    Notes
    -----
    From the status, of the newest integration: the share of channels flagged for
    interference ("interference flagged", %) and, labelled as coverage, the share the fold
    does not cover ("coverage ... % uncovered": no partner in the other switching phase,
    flagged but not interference); from a daemon that does not send them, the
    integration's ``flagged_fraction`` (all flags, "flagged", %). From the latest integration:
    ``blanked_fraction`` (of samples blanked as impulses, %), ``nimpulse``, ``ncarrier``;
    from the status: the daemon's counters since start (impulses, carrier onsets, SK cells).
    The waterfall leaves the uncovered channels out.
    """
    lines = [rule("interference", width)]
    spec = state.spectrum
    items = []
    rfi_frac, uncovered = state.rfi_fractions()
    if spec:
        if rfi_frac is not None:
            items = [kv("interference flagged", f"{100 * rfi_frac:.1f} %")]
            if uncovered is not None:
                cov = kv("coverage", f"{100 * uncovered:.1f} %")
                cov.append(" uncovered", style=S_LABEL)
                items.append(cov)
        else:
            items = [kv("flagged", f"{100 * spec.get('flagged_fraction', 0.0):.1f} %")]
        items += [kv("imp", f"{spec.get('nimpulse', 0)}"),
                  kv("car", f"{spec.get('ncarrier', 0)}"),
                  kv("blanked", f"{100 * spec.get('blanked_fraction', 0.0):.2f} %")]
    else:
        items = [Text("flagged — % (no integration yet)", style=S_LABEL)]
    rfi = (state.status or {}).get("rfi")
    if rfi and height >= 8:
        items.append(kv("since start: imp", str(rfi.get("impulses", 0))))
        items.append(kv("carrier onsets", str(rfi.get("carrier_onsets", 0))))
        items.append(kv("SK cells", str(rfi.get("sk_cells", 0))))
    readout = pack(items, width)
    keep = max(1, min(len(readout), height - 3 if height >= 5 else height - 1))
    lines += readout[:keep]
    rows_left = height - len(lines)
    if rows_left >= 3 and state.waterfall and width >= 30:
        lines.append(Text(f"waterfall: newest on top, {FLAG_MARK} flagged", style=S_LABEL))
        rows_left -= 1
    shown = ~state.uncovered_channels(spec) if spec else None
    lines += waterfall_rows(state.waterfall, width, rows_left, ascii, shown)
    return block(lines, width, height)


# ----------------------------------------------------------------------------------------------
# receiver
# ----------------------------------------------------------------------------------------------
def receiver_panel(state: ViewState, width: int) -> Text:
    """Receiver and pointing: az/el, l/b, LO, gain, sample rate, lost samples, disk free.

    Parameters
    ----------
    state : ViewState
    width : int
        Cells; items are packed into as few lines as fit.

    Returns
    -------
    rich.text.Text
        A title line and the items; as many lines as needed (more on a narrow column).

    Notes
    -----
    az/el, l/b and RA/Dec come from the latest spectrum (its pointing at mid-integration); l/b
    falls back to the status's pointing when it is galactic. LO in MHz = lo_hz / 10^6, sample
    rate in MS/s = sample_rate_hz / 10^6, disk free in GB = bytes / 10^9, lost samples also
    as a percentage of the samples received.
    """
    st = state.status or {}
    spec = state.spectrum or state.average or {}
    glon, glat = spec.get("glon_deg"), spec.get("glat_deg")
    pointing = st.get("pointing") or {}
    if glon is None and pointing.get("frame") == "galactic":
        glon, glat = pointing.get("lon_deg"), pointing.get("lat_deg")
    items = [
        kv("az", num(spec.get("azimuth_deg"), ".1f", "°")) + kv(" el", num(
            spec.get("elevation_deg"), ".1f", "°")),
        kv("l", num(glon, ".2f", "°")) + kv(" b", num(glat, ".2f", "°")),
    ]
    if width >= 44 and spec.get("ra_deg") is not None:
        items.append(kv("RA", num(spec.get("ra_deg"), ".2f", "°"))
                     + kv(" Dec", num(spec.get("dec_deg"), ".2f", "°")))
    lo_hz, rate_hz = st.get("lo_hz"), st.get("sample_rate_hz")
    items.append(kv("LO", num(None if lo_hz is None else lo_hz / 1e6, ".3f", "MHz")))
    items.append(kv("gain", num(st.get("gain_db"), ".1f", "dB")))
    items.append(kv("", num(None if rate_hz is None else rate_hz / 1e6, ".2f", "MS/s")))
    lost, received = st.get("samples_lost"), st.get("samples_received")
    lost_text = ("—" if lost is None else f"{lost}") + " samples"
    if lost and received:
        lost_pct = 100.0 * lost / (lost + received)
        lost_text += f" ({lost_pct:.2f} %)" if lost_pct >= 0.01 else " (<0.01 %)"
    items.append(kv("lost", lost_text))
    disk = st.get("disk_free_bytes")
    items.append(kv("disk", num(None if disk is None else disk / 1e9, ".1f", "GB free")))
    if st.get("writing") == "holding":
        items.append(kv("WRITING HELD", f"{st.get('held_integrations', 0)} in memory"))
    elif st.get("writing") == "failed":
        items.append(kv("WRITING FAILED", "daemon stopping"))
    failures = st.get("worker_failures") or {}
    if failures:
        items.append(kv("THREAD FAILED", ", ".join(f"{name} ×{n}" for name, n in
                                                     sorted(failures.items()))))
    if width >= 44 and st:
        items.append(kv("source", str(st.get("source", "?"))))
        items.append(kv("queue", str(st.get("queue_depth", 0))))
        items.append(kv("up", format_duration(st.get("uptime_s"))))
    lines = [rule("receiver", width)] + pack(items, width)
    return block(lines, width, len(lines))


# ----------------------------------------------------------------------------------------------
# events
# ----------------------------------------------------------------------------------------------
def events_panel(state: ViewState, width: int, height: int) -> Text:
    """The latest events, newest at the bottom: "HH:MM:SS WARN text".

    Parameters
    ----------
    state : ViewState
    width, height : int
        Cells; a title line when ``height >= 3``, then the latest events that fit.

    Returns
    -------
    rich.text.Text
        Exactly ``height`` lines of ``width`` cells. Severity is a word as well as a style:
        "info", "WARN", "ERROR".
    """
    lines = []
    if height >= 3:
        lines.append(rule(f"events ({len(state.events)})", width))
    room = height - len(lines)
    shown = list(state.events)[-room:] if room > 0 else []
    for time_utc, severity, text in shown:
        t = Text(hms(time_utc) + " ", style=S_LABEL)
        t.append(f"{SEVERITY_WORD.get(severity, severity):5s}",
                 style=S_SEVERITY.get(severity, ""))
        t.append(" " + text)
        lines.append(t)
    if not shown and room > 0:
        lines.append(Text("no events yet", style=S_LABEL))
    return block(lines, width, height)


# ----------------------------------------------------------------------------------------------
# the whole screen
# ----------------------------------------------------------------------------------------------
def _side_by_side(left: list[Text], right: list[Text], gap: str = "│") -> list[Text]:
    out = []
    for a, b in zip(left, right, strict=False):   # the shorter column ends the pairing
        line = a.copy()
        line.append(gap, style=S_RULE)
        line.append_text(b)
        out.append(line)
    return out


def side_width(width: int) -> int:
    """Cells of the side column for a screen ``width`` cells wide."""
    return int(min(SIDE_MAX_CHARS, max(SIDE_MIN_CHARS, round(SIDE_FRACTION * width))))


def screen(state: ViewState, width: int, height: int, ascii: bool = False) -> Text:
    """The whole screen, exactly ``height`` lines of ``width`` cells.

    Parameters
    ----------
    state : ViewState
    width, height : int
        Terminal size in cells; below 80 x 24 the screen is still drawn at that size but
        panels lose lines (the plot first gives up rows, then the receiver).
    ascii : bool
        ASCII plot, bars and shades, for terminals without braille or block characters.

    Returns
    -------
    rich.text.Text
        No line wrap, no overflow: every line is exactly ``width`` cells.

    Notes
    -----
    In the survey view (``state.view == "survey"``, key ``v``) the screen is
    :func:`spinflip.tui.survey_panel.survey_screen` instead. Rows, top to bottom: top bar (1), link (3 lines when stale, 1 while waiting, 0 else),
    the manual driver's prompt (2 or 3 lines while it waits for the observer, else 0),
    progress (2), mount (1 or 2 lines with a pointing driver, else 0), plan (3 or more with a
    running plan, leaving the main area 12 rows where it can, else 0), main area, events (3
    at 24 rows, growing to 8 at 50 rows), help (1). The
    main area is the spectrum plot on the left and a side column (:func:`side_width`) with,
    on screens of 40 rows or more, the link line; Tsys; receiver; interference taking what
    is left (a waterfall row per integration).
    """
    if state.view == "survey":
        from .survey_panel import survey_screen  # it imports this module
        return survey_screen(state, width, height, ascii)
    width, height = max(1, int(width)), max(1, int(height))
    lines = [top_bar(state, width)]
    link_lines = text_lines(link_panel(state, width))
    big = height >= 40
    if state.is_stale() or not state.has_data():
        lines += link_lines
    if state.awaits_observer():
        lines += text_lines(prompt_panel(state, width))
    lines += text_lines(progress_panel(state, width, ascii))
    mount_h = mount_height(state, width, height)
    if mount_h:
        lines += text_lines(mount_panel(state, width, mount_h))
    n_events = int(min(8, max(3, 3 + (height - MIN_HEIGHT) // 5)))
    n_events = min(n_events, max(3, len(state.events) + 1))
    plan_h = plan_height(state, height - len(lines) - n_events - 1)
    if plan_h:
        lines += text_lines(plan_panel(state, width, plan_h, ascii))
    main_h = height - len(lines) - n_events - 1
    if main_h < 8:                                        # tiny terminal: events give way
        n_events = max(0, n_events - (8 - main_h))
        main_h = height - len(lines) - n_events - 1
    main_h = max(0, main_h)
    side_w = side_width(width)
    plot_w = width - side_w - 1
    side: list[Text] = []
    if big and not (state.is_stale() or not state.has_data()):
        side += text_lines(link_panel(state, side_w))
    tsys_h = 3 if main_h < 30 else 6
    receiver = text_lines(receiver_panel(state, side_w))
    rfi_min = 4
    room_receiver = max(0, main_h - len(side) - tsys_h - rfi_min)
    side += text_lines(tsys_panel(state, side_w, tsys_h))
    side += receiver[:room_receiver]
    side += text_lines(rfi_panel(state, side_w, max(0, main_h - len(side)), ascii))
    side = [fit(s, side_w) for s in side[:main_h]]
    side += [fit("", side_w) for _ in range(main_h - len(side))]
    left = text_lines(spectrum_panel(state, plot_w, main_h, ascii)) if main_h else []
    lines += _side_by_side(left, side)
    if n_events:
        lines += text_lines(events_panel(state, width, n_events))
    lines.append(help_line(state, width))
    return block(lines[:height], width, height)
