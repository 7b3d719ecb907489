"""The braille plotter: dot encoding, line drawing, gaps, layout, styles, ticks."""

import io
import unicodedata

import numpy as np
import pytest
from rich.cells import cell_len
from rich.console import Console

from spinflip.tui.braille import BrailleCanvas, Series, nice_ticks, plot, segment_pairs, tick_labels

# Unicode Braille Patterns: dot number at each (x, y) position of a cell; dots 1, 2, 3, 7 down
# the left column, 4, 5, 6, 8 down the right (the Unicode standard; from memory).
DOT_NUMBER = {(0, 0): 1, (0, 1): 2, (0, 2): 3, (0, 3): 7,
              (1, 0): 4, (1, 1): 5, (1, 2): 6, (1, 3): 8}
# ... and each dot's bit in U+2800 + bits (the Unicode standard; from memory).
DOT_BIT = {1: 0x01, 2: 0x02, 3: 0x04, 4: 0x08, 5: 0x10, 6: 0x20, 7: 0x40, 8: 0x80}


def char_styles(text):
    """Per line, the style string of every character (later spans win, as rich layers them)."""
    styles = [""] * len(text.plain)
    for span in text.spans:
        for i in range(span.start, span.end):
            styles[i] = str(span.style)
    out, start = [], 0
    for line in text.plain.split("\n"):
        out.append(styles[start:start + len(line)])
        start += len(line) + 1
    return out


def render(text, width, height):
    console = Console(record=True, width=width, height=height, color_system=None,
                      file=io.StringIO())
    console.print(text)
    return console.export_text(styles=False).rstrip("\n").split("\n")


def gutter_width(text):
    """Cells up to and including the y axis column."""
    first = text.plain.split("\n")[1]
    return max(first.find("\u2502"), first.find("\u2524"), first.find("|"), first.find("+")) + 1


@pytest.mark.parametrize("position", sorted(DOT_NUMBER))
def test_each_dot_is_the_unicode_pattern_of_that_dot(position):
    canvas = BrailleCanvas(1, 1)
    canvas.set(*position)
    char = canvas.rows()[0]
    dot = DOT_NUMBER[position]
    assert char == chr(0x2800 + DOT_BIT[dot])
    # Python's Unicode Character Database names each braille pattern after its raised dots
    assert unicodedata.name(char) == f"BRAILLE PATTERN DOTS-{dot}"


def test_all_eight_dots_and_a_second_cell():
    canvas = BrailleCanvas(2, 1)
    for x, y in DOT_NUMBER:
        canvas.set(x, y)
    canvas.set(2 + 1, 3)                       # dot 8 of the second cell
    row = canvas.rows()[0]
    assert unicodedata.name(row[0]) == "BRAILLE PATTERN DOTS-12345678"   # Unicode database
    assert unicodedata.name(row[1]) == "BRAILLE PATTERN DOTS-8"


def test_off_canvas_dots_are_dropped():
    canvas = BrailleCanvas(3, 2)
    canvas.set(np.array([-1, 6, 0, 2]), np.array([0, 0, 8, -5]))
    assert canvas.rows() == ["   ", "   "]


def test_horizontal_line_fills_its_row():
    canvas = BrailleCanvas(10, 3)
    canvas.line(0, 5, 19, 5)                   # dot row 5 = cell row 1, dot row 1 in the cell
    rows = canvas.rows()
    assert rows[1] == chr(0x2800 + DOT_BIT[2] + DOT_BIT[5]) * 10
    assert rows[0] == rows[2] == " " * 10


def test_diagonal_sets_both_corners_one_dot_per_step():
    canvas = BrailleCanvas(5, 3)               # 10 x 12 dots
    canvas.line(0, 0, 9, 11)
    rows = canvas.rows()
    assert ord(rows[0][0]) - 0x2800 & DOT_BIT[1]        # top-left dot: dot 1 of the first cell
    assert ord(rows[2][4]) - 0x2800 & DOT_BIT[8]        # bottom-right dot: dot 8 of the last
    ys, xs = np.nonzero(canvas.dots)
    # Bresenham (1965, from memory): one dot per step along the major axis (y here), each
    # next to the previous one
    assert sorted(ys.tolist()) == list(range(12))
    assert np.all(np.abs(np.diff(xs[np.argsort(ys)])) <= 1)


def test_lines_pick_the_dot_nearest_the_true_line():
    # Bresenham's defining property (Bresenham 1965, from memory): at every step k along the
    # major axis exactly one dot, at most half a dot from the ideal line, in every octant.
    rng = np.random.default_rng(7)
    for _ in range(200):
        x0, y0, x1, y1 = (int(v) for v in rng.integers(0, 24, 4))
        canvas = BrailleCanvas(12, 6)
        canvas.line(x0, y0, x1, y1)
        ys, xs = np.nonzero(canvas.dots)
        dx, dy = x1 - x0, y1 - y0
        n = max(abs(dx), abs(dy))
        assert xs.size == n + 1
        assert canvas.dots[y0, x0] and canvas.dots[y1, x1]
        if n == 0:
            continue
        if abs(dx) >= abs(dy):
            k = (xs - x0) * np.sign(dx)
            assert sorted(k.tolist()) == list(range(n + 1))
            assert np.all(np.abs(ys - (y0 + k * dy / n)) <= 0.5)
        else:
            k = (ys - y0) * np.sign(dy)
            assert sorted(k.tolist()) == list(range(n + 1))
            assert np.all(np.abs(xs - (x0 + k * dx / n)) <= 0.5)


def test_segments_far_off_scale_are_clipped_at_the_edge():
    canvas = BrailleCanvas(10, 2)              # 20 x 8 dots
    canvas.segments([0.0], [4.0], [19.0], [4.0 - 1e12])      # climbs out of the top at once
    assert canvas.dots[:, 0].any() and not canvas.dots[:, 1:].any()
    canvas.clear()
    canvas.segments([-1e9], [3.0], [1e9], [3.0])              # both ends far outside
    assert canvas.dots[3].all() and canvas.dots.sum() == 20


def test_nan_leaves_a_gap_and_a_lone_point_stays():
    canvas = BrailleCanvas(10, 1)              # 20 x 4 dots
    x = np.arange(20.0)
    y = np.full(20, 1.0)
    y[8:12] = np.nan                           # dots 8..11 = cells 4 and 5
    y[14] = np.nan
    y[16] = np.nan                             # point 15 has no finite neighbour
    canvas.polyline(x, y)
    row = canvas.rows()[0]
    assert row[4] == row[5] == " "
    assert all(row[c] != " " for c in (0, 1, 2, 3, 6, 7, 8, 9))
    assert canvas.dots[1, 15] and not canvas.dots[1, 14] and not canvas.dots[1, 16]
    i, j = segment_pairs(x, y)
    assert (7, 8) not in zip(i.tolist(), j.tolist(), strict=True) and (15, 15) in zip(i.tolist(), j.tolist(), strict=True)


def spectrum_series():
    v = np.linspace(-300.0, 300.0, 1024)
    t = 40.0 * np.exp(-0.5 * (v / 30.0) ** 2) + np.sin(v / 7.0)
    t[500:505] = np.nan
    mask = np.zeros(v.size, dtype=bool)
    mask[700] = True
    return [Series(v, t, "green", "average", mask), Series(v, 0.5 * t, "cyan", "latest")]


@pytest.mark.parametrize("ascii", [False, True])
@pytest.mark.parametrize("size", [(30, 6), (31, 7), (80, 24), (120, 33), (160, 50)])
def test_exact_size_in_cells(size, ascii):
    width, height = size
    text = plot(spectrum_series(), width, height, x_label="v (km/s)", y_label="T (K)",
                ascii=ascii)
    lines = text.plain.split("\n")
    assert len(lines) == height
    assert [cell_len(line) for line in lines] == [width] * height
    rendered = render(text, width, height)
    assert len(rendered) == height
    assert [cell_len(line.ljust(width)) for line in rendered] == [width] * height


def test_empty_and_degenerate_inputs_still_fill_the_frame():
    for series in ([], [Series(np.array([]), np.array([]))],
                   [Series(np.array([5.0]), np.array([2.0]))],
                   [Series(np.arange(4.0), np.full(4, np.nan))]):
        lines = plot(series, 30, 6).plain.split("\n")
        assert len(lines) == 6 and all(cell_len(line) == 30 for line in lines)


def test_axes_carry_tick_labels_and_axis_names():
    lines = plot(spectrum_series(), 100, 20, x_range=(-300, 300), y_range=(-5, 45),
                 x_label="v (km/s)", y_label="T (K)").plain.split("\n")
    assert lines[0].startswith("T (K)")
    assert lines[-1].endswith("v (km/s)")
    assert lines[-1].split()[:3] == ["-200", "0", "200"]
    gutter = [line.split("\u2524")[0].strip() for line in lines[:-1] if "\u2524" in line]
    assert "0" in gutter and "20" in gutter and "40" in gutter


def test_later_series_style_wins_in_shared_cells():
    x = np.arange(100.0)
    early = Series(x, np.ones(100), "green", "all")
    late_y = np.where(x < 50, 1.0, np.nan)
    late = Series(x, late_y, "blue", "left half")
    text = plot([early, late], 60, 8, x_range=(0, 99), y_range=(0, 2))
    styles = char_styles(text)
    g = gutter_width(text)
    plot_cells = 60 - g
    row = next(r for r, line in enumerate(text.plain.split("\n")) if line[g:].strip())
    cells = styles[row][g:]
    boundary = int(np.floor(49 / 99 * (2 * plot_cells - 1) + 0.5)) // 2   # cell of x = 49
    assert cells[:boundary] == ["blue"] * boundary
    assert cells[boundary + 1:] == ["green"] * (plot_cells - boundary - 1)
    # the other order: green everywhere
    styles = char_styles(plot([late, early], 60, 8, x_range=(0, 99), y_range=(0, 2)))
    assert styles[row][g:] == ["green"] * plot_cells


def test_masked_points_take_the_flagged_style_and_glyph():
    x = np.arange(101.0)
    mask = x == 50
    series = [Series(x, np.ones(101), "green", "data", mask, flagged_style="magenta")]
    for ascii in (False, True):
        text = plot(series, 60, 8, x_range=(0, 100), y_range=(0, 2), ascii=ascii)
        g = gutter_width(text)
        lines = text.plain.split("\n")
        row = next(r for r, line in enumerate(lines) if line[g:].strip())
        cell = int(np.floor(50 / 100 * (2 * (60 - g) - 1) + 0.5)) // 2
        styles = char_styles(text)[row][g:]
        assert styles[cell] == "magenta"
        assert styles.count("magenta") <= 2 and styles[0] == styles[-1] == "green"
        if ascii:
            assert lines[row][g + cell] == "x" and lines[row].count("x") == styles.count("magenta")


def test_masked_points_stay_out_of_the_automatic_range():
    x = np.arange(50.0)
    y = np.ones(50)
    y[20] = 1.0e6
    lines = plot([Series(x, y, mask=y > 10)], 40, 10).plain.split("\n")
    labels = [line.split("\u2524")[0].strip() for line in lines[:-1] if "\u2524" in line]
    assert labels and all(abs(float(v)) < 10 for v in labels if v)


def test_ascii_fallback_is_plain_ascii():
    text = plot(spectrum_series()[::-1], 80, 20, x_label="v (km/s)", y_label="T (K)",
                ascii=True)
    assert all(ord(c) < 0x80 for c in text.plain)
    body = "".join(line[6:] for line in text.plain.split("\n")[:-1])
    assert set(body) & {".", ":", "|"}
    assert "x" in body                         # the flagged point of the series drawn last


@pytest.mark.parametrize("lo, hi, n, expected", [
    (0.0, 1.0, 5, [0.0, 0.2, 0.4, 0.6, 0.8, 1.0]),
    (-300.0, 300.0, 3, [-400.0, -200.0, 0.0, 200.0, 400.0]),
    (1419.9, 1420.9, 4, [1419.8, 1420.0, 1420.2, 1420.4, 1420.6, 1420.8, 1421.0]),
    (3.0, 97.0, 2, [0.0, 50.0, 100.0]),
    (-0.013, 0.004, 3, [-0.015, -0.01, -0.005, 0.0, 0.005]),
])
def test_nice_ticks_examples(lo, hi, n, expected):
    # 1-2-5 steps nearest (hi - lo) / n, covering the range (Heckbert 1990, from memory)
    assert nice_ticks(lo, hi, n) == expected


@pytest.mark.parametrize("lo, hi", [(0.0, 1.0), (-7.3, 123.4), (1e-6, 3e-6), (85.0, 85.5),
                                    (1.4190e9, 1.4215e9), (-250.0, 250.0)])
@pytest.mark.parametrize("n", [1, 3, 4, 8])
def test_nice_ticks_follow_the_one_two_five_rule(lo, hi, n):
    ticks = nice_ticks(lo, hi, n)
    steps = np.diff(ticks)
    step = steps[0]
    assert np.allclose(steps, step, rtol=1e-9)
    mantissa = step / 10.0 ** np.floor(np.log10(step) + 1e-9)
    assert min(abs(mantissa - m) for m in (1, 2, 5)) < 1e-6          # common practice: 1-2-5
    assert ticks[0] <= lo and ticks[-1] >= hi                       # covers the range
    assert ticks[1] > lo and ticks[-2] < hi                         # ... and no more
    assert 0.5 * n <= (hi - lo) / step <= 1.5 * n


def test_tick_labels_are_compact():
    assert tick_labels([-100.0, 0.0, 100.0]) == ["-100", "0", "100"]
    assert tick_labels([1420.0, 1420.2, 1420.4]) == ["1420.0", "1420.2", "1420.4"]
    assert tick_labels([-0.01, -0.005, 0.0]) == ["-0.010", "-0.005", "0.000"]
    assert tick_labels([1.42e9, 1.421e9]) == ["1.42e9", "1.421e9"]
    assert tick_labels([-1e-17, 0.5], step=0.5) == ["0.0", "0.5"]     # no negative zero


@pytest.mark.parametrize("call, word", [
    (lambda: plot([], 29, 10), "width"),
    (lambda: plot([], 40, 5), "height"),
    (lambda: plot([], 40, 10, x_range=(1, 1)), "x_range"),
    (lambda: plot([], 40, 10, y_range=(0, float("nan"))), "y_range"),
    (lambda: plot([Series(np.arange(3.0), np.arange(4.0))], 40, 10), "equal lengths"),
    (lambda: plot([Series(np.arange(3.0), np.arange(3.0), mask=np.ones(2, bool))], 40, 10),
     "mask"),
    (lambda: nice_ticks(2.0, 1.0, 3), "lo < hi"),
    (lambda: nice_ticks(0.0, 1.0, 0), "tick count"),
    (lambda: BrailleCanvas(0, 3), "width_chars"),
])
def test_user_errors_name_the_problem(call, word):
    with pytest.raises(ValueError, match=word):
        call()
