"""The survey view of ``spinflip watch`` (key ``v``): the l-v diagram filling in as each
target's scan runs, the terminal velocities so far and the rotation curve so far.

Pure functions of a :class:`~spinflip.tui.state.ViewState` like the other panels, but for one
thing: :func:`survey_screen` first calls ``state.survey.refresh(state.now_s)``, which reduces
the averages that changed (throttled: :mod:`spinflip.tui.survey`); that only updates derived
values the view caches.

Layout (W x H cells, from 80 x 24)::

    top bar (as on the main screen)
    ── survey: N targets, M tangent points, constants ──
    +--------------------------------------+---------------------------+
    | l-v diagram: legend line,            | terminal velocities: a    |
    | velocity (km/s) down the gutter,     | table l, v_t, R, Theta    |
    | l (deg) decreasing to the right,     |---------------------------|
    | T_B as shades, '*' terminal velocity | rotation curve: Theta(R)  |
    +--------------------------------------+---------------------------+
    help line (keys) and the last control reply

The l-v map is a character-cell heat map: one column per longitude interval (each target
fills the columns nearer to it than to its neighbours, up to half the survey's usual spacing,
so gaps in the survey stay blank), one row per velocity interval, the cell the mean T_B of the
survey grid's 1 km/s cells in it, shaded from 0 K to the 99th percentile of the map in five
steps ("·░▒▓█", ASCII ".:-=#"); a blank cell has no data. A target's terminal velocity is
'*' in its column. Colour is decoration only, as on the main screen.
"""

from __future__ import annotations

import math
import textwrap

import numpy as np
from rich.text import Text

from .braille import MIN_HEIGHT_CHARS, MIN_WIDTH_CHARS, Series, nice_ticks, plot, tick_labels
from .cells import S_LABEL, S_VALUE, block, fit, rule, text_lines
from .state import ViewState
from .survey import NOT_AVAILABLE, SurveyEntry, SurveyState

#: T_B shades from low to high (blank: no data), and the mark of a terminal velocity.
SHADES = "·░▒▓█"
SHADES_ASCII = ".:-=#"
SHADE_STYLES = ("blue", "cyan", "green", "yellow", "bold white")
TERMINAL_MARK = "*"
S_TERMINAL = "bold magenta"
#: Side column (table and rotation curve) as a share of the width, cells.
SIDE_FRACTION = 0.4
SIDE_MIN_CHARS = 32
SIDE_MAX_CHARS = 64
#: Velocity margin around the emission seen so far, km/s, and the range before any.
V_MARGIN_KM_S = 20.0
V_DEFAULT_KM_S = (-150.0, 150.0)


def _wrap(glon_deg: float) -> float:
    lon = math.fmod(float(glon_deg), 360.0) % 360.0
    return lon - 360.0 if lon > 180.0 else lon


def _velocity_range(entries: list[SurveyEntry], grid: np.ndarray) -> tuple[float, float]:
    """Where emission is (T_B above 3 sigma anywhere), widened by the margin, to 10 km/s."""
    lo, hi = math.inf, -math.inf
    for e in entries:
        assert e.tb_k is not None
        level = 3.0 * e.sigma_k if math.isfinite(e.sigma_k) else 0.0
        with np.errstate(invalid="ignore"):
            seen = np.flatnonzero(e.tb_k > max(level, 0.0))
        if seen.size:
            lo, hi = min(lo, float(grid[seen[0]])), max(hi, float(grid[seen[-1]]))
    if not math.isfinite(lo):
        return V_DEFAULT_KM_S
    lo = max(float(grid[0]), math.floor((lo - V_MARGIN_KM_S) / 10.0) * 10.0)
    hi = min(float(grid[-1]), math.ceil((hi + V_MARGIN_KM_S) / 10.0) * 10.0)
    return (lo, hi) if hi > lo else V_DEFAULT_KM_S


def _columns(lons: np.ndarray, n_cols: int) -> tuple[np.ndarray, np.ndarray, float, float]:
    """Which target each map column shows (-1: none), and each column's centre longitude.

    Columns run from l_left (largest) to l_right (smallest); each shows the target nearest
    its centre when that is within max(half the median spacing, half a column) of it.
    """
    spacing = np.diff(lons)
    step = float(np.median(spacing[spacing > 0])) if (spacing > 0).any() else 2.0
    left, right = float(lons[-1]) + step / 2, float(lons[0]) - step / 2
    width = (left - right) / n_cols
    centres = left - (np.arange(n_cols) + 0.5) * width
    j = np.clip(np.searchsorted(lons, centres), 1, max(1, lons.size - 1)) if lons.size > 1 \
        else np.zeros(n_cols, dtype=int)
    if lons.size > 1:
        nearer_left = np.abs(centres - lons[j - 1]) <= np.abs(centres - lons[j])
        j = np.where(nearer_left, j - 1, j)
    reach = max(step / 2, width / 2) + 1e-9
    show = np.where(np.abs(centres - lons[j]) <= reach, j, -1)
    return show, centres, left, right


def lv_map(survey: SurveyState, width: int, height: int, ascii: bool = False) -> Text:
    """The l-v diagram so far (see the module), exactly ``height`` lines of ``width`` cells."""
    entries = survey.reduced()
    title = Text("l–v diagram ", style="bold")
    if not entries:
        lines = [title, Text("no scan averages yet: the diagram fills in as each target's "
                             "scan runs", style=S_LABEL)]
        return block(lines, width, height)
    grid = survey.grid_km_s
    v_lo, v_hi = _velocity_range(entries, grid)
    rows_n = max(1, height - 2)
    tick_vals = [t for t in nice_ticks(v_lo, v_hi, max(1, min(6, rows_n // 3)))
                 if v_lo <= t <= v_hi]
    tick_text = tick_labels(tick_vals)
    gutter = max(4, max(len(t) for t in tick_text)) if tick_text else 4
    n_cols = max(1, width - gutter - 1)
    lons = np.array([_wrap(e.glon_deg) for e in entries])
    show, centres, left, right = _columns(lons, n_cols)
    # rows: velocity intervals from v_hi (top) down to v_lo
    dv_row = (v_hi - v_lo) / rows_n
    row_of = np.floor((v_hi - grid) / dv_row).astype(np.int64)
    in_map = (grid >= v_lo) & (grid <= v_hi)
    row_of = np.clip(row_of, 0, rows_n - 1)
    cells = np.full((lons.size, rows_n), np.nan)
    for i, e in enumerate(entries):
        assert e.tb_k is not None
        tb = e.tb_k.astype(float)
        ok = in_map & np.isfinite(tb)
        n = np.bincount(row_of[ok], minlength=rows_n)
        s = np.bincount(row_of[ok], weights=tb[ok], minlength=rows_n)
        cells[i] = np.where(n > 0, s / np.maximum(n, 1), np.nan)
    shown = cells[np.unique(show[show >= 0])] if (show >= 0).any() else cells
    finite = shown[np.isfinite(shown)]
    top = float(np.percentile(finite, 99)) if finite.size else 1.0
    top = top if top > 0 else 1.0
    shades = SHADES_ASCII if ascii else SHADES
    marks: dict[tuple[int, int], bool] = {}
    for i, e in enumerate(entries):
        p = e.point
        if p is None or not math.isfinite(p.v_terminal_km_s):
            continue
        cols = np.flatnonzero(show == i)
        if not cols.size or not v_lo <= p.v_terminal_km_s <= v_hi:
            continue
        r = min(rows_n - 1, max(0, int((v_hi - p.v_terminal_km_s) // dv_row)))
        marks[(r, int(cols[cols.size // 2]))] = True
    title.append(f"T_B 0–{top:.0f} K ", style=S_LABEL)
    title.append(shades, style=S_VALUE)
    title.append(f"  {TERMINAL_MARK}", style=S_TERMINAL)
    title.append(" terminal v", style=S_LABEL)
    lines = [title]
    tick_rows: dict[int, str] = {}
    for tv, text in zip(tick_vals, tick_text, strict=True):
        tick_rows.setdefault(min(rows_n - 1, max(0, int((v_hi - tv) // dv_row))), text)
    top_label = "" if 0 in tick_rows else "km/s"      # the gutter's unit, where free
    axis, tick_mark = ("|", "+") if ascii else ("│", "┤")
    for r in range(rows_n):
        label = tick_rows.get(r, "")
        if r == 0 and top_label:
            line = Text(top_label.rjust(gutter), style=S_LABEL)
            line.append(axis, style=S_LABEL)
        else:
            line = Text(label.rjust(gutter), style=S_LABEL)
            line.append(tick_mark if label else axis, style=S_LABEL)
        for c in range(n_cols):
            i = int(show[c])
            if (r, c) in marks:
                line.append(TERMINAL_MARK, style=S_TERMINAL)
            elif i < 0 or not math.isfinite(cells[i, r]):
                line.append(" ")
            else:
                level = int(np.clip(cells[i, r] / top * len(shades), 0, len(shades) - 1))
                line.append(shades[level], style=SHADE_STYLES[level])
        lines.append(line)
    # bottom: longitude ticks under their columns, "l°" at the right end
    bottom = [" "] * n_cols
    col_deg = (left - right) / n_cols
    free_from = 0
    lticks = [t for t in nice_ticks(right, left, max(1, min(8, n_cols // 8)))
              if right <= t <= left]
    for lt, ltext in reversed(list(zip(lticks, tick_labels(lticks), strict=True))):
        c = int((left - lt) / col_deg)   # largest l first: left to right
        start = min(max(c - len(ltext) // 2, 0), n_cols - len(ltext))
        if start < free_from or start + len(ltext) > n_cols - 3:
            continue
        bottom[start:start + len(ltext)] = list(ltext)
        free_from = start + len(ltext) + 1
    bottom[-2:] = list("l°") if not ascii else list(" l")
    lines.append(Text(" " * (gutter + 1) + "".join(bottom), style=S_LABEL))
    return block(lines, width, height)


def terminal_table(survey: SurveyState, width: int, height: int) -> Text:
    """The terminal velocities so far, by longitude: l, v_t, R, Theta +- error."""
    lines = [rule(f"terminal velocities ({len(survey.points())})", width)]
    if survey.available is False:
        lines += [Text(t, style="bold yellow") for t in textwrap.wrap(NOT_AVAILABLE, width)]
        return block(lines, width, height)
    pts = sorted(survey.points(), key=lambda p: _wrap(p.glon_deg))
    if not pts:
        lines.append(Text("none yet (inner Galaxy only: 0<l<90, 270<l<360)", style=S_LABEL))
        return block(lines, width, height)
    lines.append(Text("     l°  v_t km/s  R kpc  Θ km/s", style=S_LABEL))
    room = height - len(lines)
    shown = pts if len(pts) <= room else pts[:max(0, room - 1)]
    for p in shown:
        t = Text(f"{p.glon_deg:7.1f} {p.v_terminal_km_s:+8.1f} {p.r_kpc:6.2f} ")
        t.append(f"{p.theta_km_s:4.0f}", style=S_VALUE)
        err = p.theta_err_km_s
        t.append(f"±{err:.0f}" if math.isfinite(err) else "±?", style=S_LABEL)
        lines.append(t)
    if len(shown) < len(pts):
        lines.append(Text(f"… {len(pts) - len(shown)} more", style=S_LABEL))
    return block(lines, width, height)


def rotation_plot(survey: SurveyState, width: int, height: int, ascii: bool = False) -> Text:
    """Theta (km/s) against R (kpc) so far: the points joined by R, error bars, Theta0 dotted."""
    lines = [rule("rotation curve", width)]
    consts = survey.consts
    pts = [p for p in survey.points() if math.isfinite(p.r_kpc) and math.isfinite(p.theta_km_s)]
    if survey.available is False:
        lines += [Text(t, style="bold yellow") for t in textwrap.wrap(NOT_AVAILABLE, width)]
        return block(lines, width, height)
    if not pts:
        lines.append(Text("no tangent points yet", style=S_LABEL))
        return block(lines, width, height)
    if width < MIN_WIDTH_CHARS or height - 1 < MIN_HEIGHT_CHARS:
        lines.append(Text(f"{len(pts)} points, R {pts[0].r_kpc:.1f}–{pts[-1].r_kpc:.1f} kpc",
                          style=S_LABEL))
        return block(lines, width, height)
    r = np.array([p.r_kpc for p in pts])
    th = np.array([p.theta_km_s for p in pts])
    err = np.array([p.theta_err_km_s for p in pts], dtype=float)
    err = np.where(np.isfinite(err), err, 0.0)
    bars_x = np.column_stack([r, r, np.full(r.size, np.nan)]).ravel()
    bars_y = np.column_stack([th - err, th + err, np.full(r.size, np.nan)]).ravel()
    y_lo = min(float(np.min(th - err)), consts.theta0_km_s) - 10.0
    y_hi = max(float(np.max(th + err)), consts.theta0_km_s) + 10.0
    x_hi = max(consts.r0_kpc, float(r[-1]))
    series = [Series(np.array([0.0, x_hi]), np.full(2, consts.theta0_km_s), style="dim",
                     name="Theta0"),
              Series(bars_x, bars_y, style="cyan", name="error"),
              Series(r, th, style="bold green", name="Theta")]
    lines += text_lines(plot(series, width, height - 1, x_range=(0.0, x_hi),
                             y_range=(y_lo, y_hi), x_label="R kpc", y_label="Θ km/s",
                             y_ticks=2, ascii=ascii))
    return block(lines, width, height)


def survey_title(state: ViewState, width: int) -> Text:
    """The view's title rule: targets, tangent points, the constants."""
    s = state.survey
    c = s.consts
    text = f"survey: {len(s.reduced())} targets, {len(s.points())} tangent points, " \
        f"{c.name} R0 {c.r0_kpc:g} kpc Θ0 {c.theta0_km_s:g} km/s"
    if s.left_out():
        text += f", {s.left_out()} left out"
    return rule(text, width)


def survey_screen(state: ViewState, width: int, height: int, ascii: bool = False) -> Text:
    """The whole survey view, exactly ``height`` lines of ``width`` cells (see the module).

    Calls ``state.survey.refresh(state.now_s)`` first (throttled reduction).
    """
    from .panels import help_line, top_bar  # panels dispatches here: import when drawn

    width, height = max(1, int(width)), max(1, int(height))
    state.survey.refresh(state.now_s)
    lines = [top_bar(state, width), survey_title(state, width)]
    main_h = max(0, height - len(lines) - 1)
    side_w = int(min(SIDE_MAX_CHARS, max(SIDE_MIN_CHARS, round(SIDE_FRACTION * width))))
    side_w = min(side_w, max(0, width - 12))
    map_w = max(1, width - side_w - 1)
    plot_h = min(main_h, max(MIN_HEIGHT_CHARS + 2, main_h // 2))
    table_h = main_h - plot_h
    side = (text_lines(terminal_table(state.survey, side_w, table_h)) if table_h else []) \
        + (text_lines(rotation_plot(state.survey, side_w, plot_h, ascii)) if plot_h else [])
    left = text_lines(lv_map(state.survey, map_w, main_h, ascii)) if main_h else []
    for a, b in zip(left, side, strict=False):
        line = a.copy()
        line.append("│" if not ascii else "|", style="dim")
        line.append_text(fit(b, side_w))
        lines.append(line)
    lines.append(help_line(state, width))
    return block(lines[:height], width, height)
