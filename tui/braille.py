"""A small line plotter for the terminal: Unicode braille dots, axes with tick labels.

Each character cell of a braille pattern holds 2 x 4 dots, so a canvas of W x H characters
has 2W x 4H dots. Dots are numbered by the Unicode standard (Braille Patterns block
U+2800..U+28FF; table quoted from memory): dots 1, 2, 3, 7 run down the left column and
4, 5, 6, 8 down the right one; dot n sets one bit of the pattern and the character is

    chr(0x2800 + bits),   bits = sum of the set dots' bits,

    left column  (x = 0): dot 1 = 0x01, dot 2 = 0x02, dot 3 = 0x04, dot 7 = 0x40
    right column (x = 1): dot 4 = 0x08, dot 5 = 0x10, dot 6 = 0x20, dot 8 = 0x80

(rows y = 0..3 from the top). Dot coordinates here count from the canvas's top-left corner:
x to the right, y downwards.

Lines between consecutive finite points are rasterised with Bresenham's algorithm, in its
closed form so that all segments of a series are drawn by one set of numpy operations: with
n = |d_major| steps along the longer axis, the k-th dot (k = 0..n) is offset along the
shorter axis by

    m_k = floor((2 k |d_minor| + n) / (2 n)),

the dot nearest the ideal line at that step (ties go away from the start point) -- the same
dots the incremental decision variable picks. Segments are first clipped to the canvas
(Liang-Barsky: the segment p0 + t (p1 - p0), 0 <= t <= 1, is cut to the t where all four
edge inequalities hold), so a point far off scale costs no more than one on it.

Tick values follow the 1-2-5 rule: the step is 1, 2 or 5 times a power of ten, the one
nearest (hi - lo) / n, and the ticks are its multiples from the last one at or below lo to
the first one at or above hi.

References
----------
The Unicode Standard, Braille Patterns block U+2800..U+28FF (dot numbering and bit values,
from memory; Python's ``unicodedata`` names each pattern after its dots).
Bresenham, J. E. 1965, IBM Systems Journal 4, 25 (line rasterisation; from memory).
Liang, Y.-D. & Barsky, B. A. 1984, ACM Transactions on Graphics 3, 1 (segment clipping; from
memory).
Heckbert, P. S. 1990, "Nice numbers for graph labels", Graphics Gems (1-2-5 tick steps; from
memory).
"""

from __future__ import annotations

import math
from collections.abc import Iterable
from dataclasses import dataclass

import numpy as np
import numpy.typing as npt
from rich.cells import cell_len, set_cell_size
from rich.text import Span, Text

#: First code point of the Unicode Braille Patterns block (the empty pattern).
BRAILLE_BASE = 0x2800

#: Bit of each dot, indexed [y_dot % 4, x_dot % 2] (Unicode Braille Patterns; from memory).
DOT_BITS = np.array([[0x01, 0x08],
                     [0x02, 0x10],
                     [0x04, 0x20],
                     [0x40, 0x80]], dtype=np.uint8)

#: Style of flagged (masked) points unless a series names its own.
FLAGGED_STYLE = "bold red"

#: Style of the axes, tick labels and axis labels.
AXIS_STYLE = "dim"

#: Smallest plot accepted by :func:`plot`, characters.
MIN_WIDTH_CHARS = 30
MIN_HEIGHT_CHARS = 6

# ASCII fallback: a cell's glyph from how many of its 4 dot rows are set (0..4).
_ASCII_BY_ROWS = np.array([ord(" "), ord("."), ord(":"), ord("|"), ord("|")], dtype=np.uint32)
_ASCII_FLAGGED = ord("x")


class BrailleCanvas:
    """A grid of ``width_chars`` x ``height_chars`` braille cells, 2 x 4 dots each.

    Parameters
    ----------
    width_chars, height_chars : size in character cells (each >= 1)

    Notes
    -----
    ``dots`` is the bool[4 * height_chars, 2 * width_chars] grid of set dots (y down);
    ``owners`` the int[height_chars, width_chars] id of whatever drew last in each cell
    (-1: nothing). Every drawing call takes an ``owner`` id (default 0): the plotter uses it
    to give each cell the style of the last series drawing in it. Dots off the canvas are
    dropped (clipping), not an error.
    """

    def __init__(self, width_chars: int, height_chars: int):
        for name, value in (("width_chars", width_chars), ("height_chars", height_chars)):
            if isinstance(value, bool) or not isinstance(value, (int, np.integer)) or value < 1:
                raise ValueError(f"canvas {name} {value!r}: expected an integer >= 1")
        self.width_chars = int(width_chars)
        self.height_chars = int(height_chars)
        self.width_dots = 2 * self.width_chars
        self.height_dots = 4 * self.height_chars
        self.dots = np.zeros((self.height_dots, self.width_dots), dtype=bool)
        self.owners = np.full((self.height_chars, self.width_chars), -1, dtype=np.int32)

    def clear(self) -> None:
        """Remove every dot and owner."""
        self.dots[:] = False
        self.owners[:] = -1

    def set(self, x_dot: npt.ArrayLike, y_dot: npt.ArrayLike, owner: int = 0) -> None:
        """Set the dot(s) at integer dot coordinates (scalars or equal-length arrays).

        Parameters
        ----------
        x_dot, y_dot : dot column (0 = left) and dot row (0 = top); off-canvas dots are dropped
        owner : id stored for the cells drawn (later calls win)
        """
        x = np.atleast_1d(np.asarray(x_dot, dtype=np.int64))
        y = np.atleast_1d(np.asarray(y_dot, dtype=np.int64))
        if x.shape != y.shape:
            raise ValueError(f"dot coordinates of shapes {x.shape} and {y.shape}: expected equal")
        inside = (x >= 0) & (x < self.width_dots) & (y >= 0) & (y < self.height_dots)
        x, y = x[inside], y[inside]
        self.dots[y, x] = True
        self.owners[y // 4, x // 2] = owner

    def line(self, x0: int, y0: int, x1: int, y1: int, owner: int = 0) -> None:
        """Draw the Bresenham line from dot (x0, y0) to dot (x1, y1), both ends included."""
        self.segments(np.array([x0]), np.array([y0]), np.array([x1]), np.array([y1]), owner)

    def segments(self, x0: npt.ArrayLike, y0: npt.ArrayLike, x1: npt.ArrayLike,
                 y1: npt.ArrayLike, owner: int = 0) -> None:
        """Draw many line segments at once, from (x0[i], y0[i]) to (x1[i], y1[i]).

        Parameters
        ----------
        x0, y0, x1, y1 : float or integer dot coordinates of equal length, finite; ends are
            rounded to the nearest dot after clipping to the canvas
        owner : id stored for the cells drawn

        Notes
        -----
        Clipping (Liang-Barsky) to the box [-1/2, W - 1/2] x [-1/2, H - 1/2] of dot centres:
        each edge gives p t <= q with (p, q) = (-dx, x0 - xmin), (dx, xmax - x0),
        (-dy, y0 - ymin), (dy, ymax - y0); p < 0 bounds t from below by q / p, p > 0 from
        above, p = 0 with q < 0 means parallel and outside. Then Bresenham in closed form
        (module docstring): m_k = floor((2 k |d_minor| + n) / (2 n)), k = 0..n.
        """
        x0 = np.atleast_1d(np.asarray(x0, dtype=float))
        y0 = np.atleast_1d(np.asarray(y0, dtype=float))
        x1 = np.atleast_1d(np.asarray(x1, dtype=float))
        y1 = np.atleast_1d(np.asarray(y1, dtype=float))
        if not (x0.shape == y0.shape == x1.shape == y1.shape):
            raise ValueError("segment end arrays of different shapes: expected equal lengths")
        if x0.size == 0:
            return
        # --- clip each segment to the canvas (Liang-Barsky)
        dx, dy = x1 - x0, y1 - y0
        t_lo = np.zeros_like(x0)
        t_hi = np.ones_like(x0)
        outside = np.zeros(x0.shape, dtype=bool)
        x_min, x_max = -0.5, self.width_dots - 0.5
        y_min, y_max = -0.5, self.height_dots - 0.5
        with np.errstate(divide="ignore", invalid="ignore"):
            for p, q in ((-dx, x0 - x_min), (dx, x_max - x0), (-dy, y0 - y_min), (dy, y_max - y0)):
                outside |= (p == 0) & (q < 0)
                ratio = q / p
                t_lo = np.where(p < 0, np.maximum(t_lo, ratio), t_lo)
                t_hi = np.where(p > 0, np.minimum(t_hi, ratio), t_hi)
        keep = ~outside & (t_lo <= t_hi)
        if not keep.any():
            return
        t_lo, t_hi, dx, dy = t_lo[keep], t_hi[keep], dx[keep], dy[keep]
        ax = np.floor(x0[keep] + t_lo * dx + 0.5).astype(np.int64)
        ay = np.floor(y0[keep] + t_lo * dy + 0.5).astype(np.int64)
        bx = np.floor(x0[keep] + t_hi * dx + 0.5).astype(np.int64)
        by = np.floor(y0[keep] + t_hi * dy + 0.5).astype(np.int64)
        # --- Bresenham, all segments at once
        ddx, ddy = bx - ax, by - ay
        adx, ady = np.abs(ddx), np.abs(ddy)
        x_major = adx >= ady
        n_steps = np.maximum(adx, ady)                         # dots per segment = n + 1
        d_minor = np.where(x_major, ady, adx)
        counts = n_steps + 1
        seg = np.repeat(np.arange(counts.size), counts)
        first = np.cumsum(counts) - counts
        k = np.arange(seg.size, dtype=np.int64) - first[seg]   # step along the major axis
        n = np.maximum(n_steps[seg], 1)
        m = (2 * k * d_minor[seg] + n) // (2 * n)              # offset along the minor axis
        xm = x_major[seg]
        xs = ax[seg] + np.sign(ddx)[seg] * np.where(xm, k, m)
        ys = ay[seg] + np.sign(ddy)[seg] * np.where(xm, m, k)
        self.set(xs, ys, owner)

    def polyline(self, x_dot: npt.ArrayLike, y_dot: npt.ArrayLike, owner: int = 0) -> None:
        """Join consecutive finite points with lines; a non-finite coordinate leaves a gap.

        Parameters
        ----------
        x_dot, y_dot : float dot coordinates of equal length (NaN or inf: no point)
        owner : id stored for the cells drawn

        Notes
        -----
        A finite point with no finite neighbour is drawn as a single dot.
        """
        i, j = segment_pairs(x_dot, y_dot)
        x = np.asarray(x_dot, dtype=float)
        y = np.asarray(y_dot, dtype=float)
        self.segments(x[i], y[i], x[j], y[j], owner)

    def codes(self, ascii: bool = False) -> np.ndarray:
        """Code point of every cell, uint32[height_chars, width_chars].

        Braille: 0x2800 + the sum of the set dots' bits, a space where no dot is set.
        ASCII: '.' for dots in one of the cell's 4 dot rows, ':' for two, '|' for three or
        four, a space for none.
        """
        cells = self.dots.reshape(self.height_chars, 4, self.width_chars, 2)
        if ascii:
            rows_set = cells.any(axis=3).sum(axis=1)
            return _ASCII_BY_ROWS[rows_set]
        bits = (cells * DOT_BITS[None, :, None, :]).sum(axis=(1, 3), dtype=np.uint32)
        return np.where(bits > 0, BRAILLE_BASE + bits, ord(" ")).astype(np.uint32)

    def rows(self, ascii: bool = False) -> list[str]:
        """The canvas as ``height_chars`` strings of ``width_chars`` characters each."""
        return _decode_rows(self.codes(ascii))


def segment_pairs(x: npt.ArrayLike, y: npt.ArrayLike) -> tuple[np.ndarray, np.ndarray]:
    """Index pairs (i, j) of the segments joining consecutive finite points.

    Parameters
    ----------
    x, y : coordinates of equal length

    Returns
    -------
    i, j : int arrays; j = i + 1 for a segment, j = i for a finite point with no finite
        neighbour (drawn as a dot)
    """
    x = np.asarray(x, dtype=float).ravel()
    y = np.asarray(y, dtype=float).ravel()
    if x.shape != y.shape:
        raise ValueError(f"coordinates of lengths {x.size} and {y.size}: expected equal lengths")
    ok = np.isfinite(x) & np.isfinite(y)
    joined = ok[:-1] & ok[1:]
    has_neighbour = np.zeros_like(ok)
    has_neighbour[:-1] |= joined
    has_neighbour[1:] |= joined
    start = np.flatnonzero(joined)
    lone = np.flatnonzero(ok & ~has_neighbour)
    return np.concatenate([start, lone]), np.concatenate([start + 1, lone])


def _decode_rows(codes: np.ndarray) -> list[str]:
    """uint32[rows, cols] code points -> one str per row (UTF-32 decode, no loop per cell)."""
    codes = np.ascontiguousarray(codes, dtype="<u4")
    return [row.tobytes().decode("utf-32-le") for row in codes]


def _nice_step(lo: float, hi: float, n: int) -> float:
    """The 1-2-5 step nearest (hi - lo) / n: m 10^e with m in {1, 2, 5}.

    Notes
    -----
    With r = (hi - lo) / n = f 10^e, 1 <= f < 10: m = 1 for f < 1.5, 2 for f < 3, 5 for
    f < 7, else 10 (Heckbert 1990; thresholds from memory).
    """
    raw = (hi - lo) / n
    exponent = math.floor(math.log10(raw))
    fraction = raw / 10.0 ** exponent
    for limit, mantissa in ((1.5, 1), (3.0, 2), (7.0, 5)):
        if fraction < limit:
            return _decimal(mantissa, exponent)
    return _decimal(1, exponent + 1)


def _decimal(integer: int, exponent: int) -> float:
    """integer * 10^exponent as the float nearest the exact decimal."""
    return integer * 10.0 ** exponent if exponent >= 0 else integer / 10.0 ** -exponent


def nice_ticks(lo: float, hi: float, n: int) -> list[float]:
    """About ``n`` intervals of a 1-2-5 step, covering [lo, hi].

    Parameters
    ----------
    lo, hi : the range, finite, lo < hi
    n : wanted number of intervals (>= 1); the step is the 1-2-5 number nearest (hi - lo) / n

    Returns
    -------
    list of float : the multiples of the step from the largest one <= lo to the smallest one
        >= hi (so the first tick <= lo and the last >= hi); each tick is the float nearest its
        exact decimal value, and zero is never -0.0

    Notes
    -----
    Step s = m 10^e, m in {1, 2, 5} (see :func:`_nice_step`); ticks k s for
    k = floor(lo / s) .. ceil(hi / s) (Heckbert 1990, loose labelling; from memory).
    """
    if isinstance(n, bool) or not isinstance(n, (int, np.integer)) or n < 1:
        raise ValueError(f"tick count {n!r}: expected an integer >= 1")
    if not (math.isfinite(lo) and math.isfinite(hi) and lo < hi):
        raise ValueError(f"tick range ({lo!r}, {hi!r}): expected finite lo < hi")
    step = _nice_step(lo, hi, n)
    exponent = math.floor(math.log10(step) + 1e-9)
    mantissa = round(step / 10.0 ** exponent)
    k_lo = math.floor(lo / step + 1e-9)
    k_hi = math.ceil(hi / step - 1e-9)
    return [_decimal(k * mantissa, exponent) + 0.0 for k in range(k_lo, k_hi + 1)]


def tick_labels(ticks: Iterable[float], step: float | None = None) -> list[str]:
    """Short labels for tick values: as few decimals as show every tick exactly.

    Parameters
    ----------
    ticks : tick values
    step : their spacing (default: the smallest positive difference, else 1)

    Returns
    -------
    list of str : fixed point ("-100", "0", "100"; "1420.0", "1420.2"), ASCII only, never
        a negative zero; scientific ("1.4204e9") when a value reaches 10^7 or the step is
        below 10^-4
    """
    values = [float(t) + 0.0 for t in ticks]
    if not values:
        return []
    if step is None:
        diffs = np.diff(np.sort(values))
        diffs = diffs[diffs > 0]
        step = float(diffs.min()) if diffs.size else 1.0
    step = abs(float(step)) or 1.0
    biggest = max(abs(v) for v in values)
    tolerance = 1e-6 * step
    if biggest < 1e7 and step >= 1e-4:
        # fewest decimals (at least those of the step) that print every tick within tolerance
        decimals = max(0, -math.floor(math.log10(step) + 1e-9))
        while decimals < 12 and any(abs(round(v, decimals) - v) > tolerance for v in values):
            decimals += 1
        labels = [f"{round(v, decimals) + 0.0:.{decimals}f}" for v in values]
    else:
        digits = 1
        while digits < 12 and any(abs(float(f"{v:.{digits}g}") - v) > tolerance for v in values):
            digits += 1
        labels = [_compact_exponent(f"{v + 0.0:.{digits}g}") for v in values]
    return [label[1:] if label.startswith("-") and float(label) == 0.0 else label
            for label in labels]


def _compact_exponent(label: str) -> str:
    """'1.42e+09' -> '1.42e9', '5e-05' -> '5e-5'."""
    if "e" not in label:
        return label
    mantissa, exponent = label.split("e")
    return f"{mantissa}e{int(exponent)}"


@dataclass
class Series:
    """One curve of a plot.

    Parameters
    ----------
    x, y : values of equal length; a non-finite x or y leaves a gap
    style : rich style of the curve ("" for none)
    name : the curve's name, for the caller's legend
    mask : bool array of the same length; True points (and the segments touching them) are
        drawn in ``flagged_style`` and left out of the automatic y range
    flagged_style : rich style of flagged points
    """

    x: np.ndarray
    y: np.ndarray
    style: str = ""
    name: str = ""
    mask: np.ndarray | None = None
    flagged_style: str = FLAGGED_STYLE


def _checked_range(name: str, value: Iterable[float]) -> tuple[float, float]:
    try:
        lo, hi = (float(v) for v in value)
    except (TypeError, ValueError):
        raise ValueError(f"{name} {value!r}: expected a pair (lo, hi) of numbers") from None
    if not (math.isfinite(lo) and math.isfinite(hi) and lo < hi):
        raise ValueError(f"{name} {value!r}: expected finite lo < hi")
    return lo, hi


def _auto_range(values: list[np.ndarray], pad_fraction: float) -> tuple[float, float]:
    """Finite min..max of the values, widened by ``pad_fraction`` of the span each side.

    An empty set gives (0, 1); a single value v gives v -+ 10 % of |v| (-+ 1 for v = 0).
    """
    finite = [v[np.isfinite(v)] for v in values]
    finite = [v for v in finite if v.size]
    if not finite:
        return 0.0, 1.0
    lo = float(min(v.min() for v in finite))
    hi = float(max(v.max() for v in finite))
    if hi == lo:
        half = 0.1 * abs(lo) if lo != 0 else 1.0
        return lo - half, hi + half
    pad = pad_fraction * (hi - lo)
    return lo - pad, hi + pad


def _ticks_inside(lo: float, hi: float, n: int) -> tuple[list[float], list[str]]:
    """The 1-2-5 ticks that fall in [lo, hi], and their labels."""
    ticks = nice_ticks(lo, hi, n)
    step = ticks[1] - ticks[0]
    tolerance = 1e-9 * (hi - lo)
    inside = [t for t in ticks if lo - tolerance <= t <= hi + tolerance]
    return inside, tick_labels(inside, step)


def _one_line(label: object) -> str:
    return str(label).replace("\r", " ").replace("\n", " ")


def plot(series: Iterable[Series], width: int, height: int,
         x_range: Iterable[float] | None = None, y_range: Iterable[float] | None = None,
         x_label: str = "",
         y_label: str = "", x_ticks: int = 4, y_ticks: int = 3, ascii: bool = False) -> Text:
    """Draw curves on one canvas with axes: exactly ``height`` lines of ``width`` cells.

    Parameters
    ----------
    series : list of :class:`Series`, drawn in order (a cell takes the style of the last
        series drawing in it; within a series flagged segments are drawn after the others)
    width, height : size of the whole plot in terminal cells (width >= 30, height >= 6)
    x_range, y_range : (lo, hi) of the axes; default: the finite data's extent (y padded by
        5 % each side, flagged points left out when any other point is finite)
    x_label, y_label : axis names with units; y_label in the top line of the left gutter,
        x_label at the right end of the bottom line
    x_ticks, y_ticks : wanted number of tick intervals (1-2-5 steps, see :func:`nice_ticks`)
    ascii : ASCII glyphs instead of braille ('.', ':', '|' by how many of a cell's four dot
        rows are set; 'x' for cells whose last drawing was flagged), for terminals without
        braille fonts or colour

    Returns
    -------
    rich.text.Text : ``height`` lines joined by newlines, each ``width`` cells wide; rows
        0..height-2 are the gutter (tick labels, axis) and the plot, the last row the x tick
        labels; styles as spans (series, flagged, axes)

    Notes
    -----
    Data to dots: x_dot = (x - x_lo) / (x_hi - x_lo) (2 P - 1), y_dot = (y_hi - y) /
    (y_hi - y_lo) (4 R - 1) for a plot area of P x R cells, so the range ends fall on the
    centres of the outermost dots. Points off the ranges are clipped at the edges. User
    labels are written as given (also in ASCII mode).
    """
    for name, value, low in (("plot width", width, MIN_WIDTH_CHARS),
                             ("plot height", height, MIN_HEIGHT_CHARS),
                             ("x_ticks", x_ticks, 1), ("y_ticks", y_ticks, 1)):
        if isinstance(value, bool) or not isinstance(value, (int, np.integer)) or value < low:
            raise ValueError(f"{name} {value!r}: expected an integer >= {low}")
    prepared = []
    for number, s in enumerate(series):
        x = np.asarray(s.x, dtype=float).ravel()
        y = np.asarray(s.y, dtype=float).ravel()
        if x.size != y.size:
            raise ValueError(f"series {number} ({s.name!r}) has {x.size} x and {y.size} y values: "
                             "expected equal lengths")
        if s.mask is None:
            mask = np.zeros(x.size, dtype=bool)
        else:
            mask = np.asarray(s.mask, dtype=bool).ravel()
            if mask.size != x.size:
                raise ValueError(f"series {number} ({s.name!r}) mask has {mask.size} values for "
                                 f"{x.size} points: expected equal lengths")
        prepared.append((s, x, y, mask))

    if x_range is None:
        x_lo, x_hi = _auto_range([x for _, x, _, _ in prepared], 0.0)
    else:
        x_lo, x_hi = _checked_range("x_range", x_range)
    if y_range is None:
        good = [y[~m & np.isfinite(x)] for _, x, y, m in prepared]
        if not any(np.isfinite(g).any() for g in good):
            good = [y[np.isfinite(x)] for _, x, y, _ in prepared]
        y_lo, y_hi = _auto_range(good, 0.05)
    else:
        y_lo, y_hi = _checked_range("y_range", y_range)

    rows_n = height - 1
    y_tick_values, y_tick_text = _ticks_inside(y_lo, y_hi, y_ticks)
    x_label, y_label = _one_line(x_label), _one_line(y_label)
    label_cells = max([cell_len(t) for t in y_tick_text] or [1])
    label_cells = max(label_cells, min(cell_len(y_label), width // 3 - 1))
    gutter = label_cells + 1
    plot_cells = width - gutter

    # --- the curves
    canvas = BrailleCanvas(plot_cells, rows_n)
    styles: list[str] = []
    for s, x, y, mask in prepared:
        owner = len(styles)
        styles += [s.style, s.flagged_style]
        x_dot = (x - x_lo) / (x_hi - x_lo) * (canvas.width_dots - 1)
        y_dot = (y_hi - y) / (y_hi - y_lo) * (canvas.height_dots - 1)
        i, j = segment_pairs(x_dot, y_dot)
        flagged = mask[i] | mask[j]
        for part, part_owner in ((~flagged, owner), (flagged, owner + 1)):
            ii, jj = i[part], j[part]
            canvas.segments(x_dot[ii], y_dot[ii], x_dot[jj], y_dot[jj], part_owner)
    codes = canvas.codes(ascii)
    owners = canvas.owners
    if ascii:
        codes = np.where((owners >= 0) & (owners % 2 == 1), _ASCII_FLAGGED, codes)
    plot_rows = _decode_rows(codes)

    # --- left gutter: y tick labels against the axis, y_label on top
    rule, tick_mark = ("|", "+") if ascii else ("\u2502", "\u2524")
    gutter_text = [" " * label_cells] * rows_n
    gutter_mark = [rule] * rows_n
    for tick, text in zip(y_tick_values, y_tick_text, strict=True):
        tick_dot = (y_hi - tick) / (y_hi - y_lo) * (canvas.height_dots - 1)
        row = min(max(int(math.floor(tick_dot + 0.5)) // 4, 0), rows_n - 1)
        if gutter_mark[row] == tick_mark:
            continue
        gutter_mark[row] = tick_mark
        if not (y_label and row == 0):
            gutter_text[row] = set_cell_size(text.rjust(label_cells), label_cells)
    if y_label:
        gutter_text[0] = set_cell_size(y_label, label_cells)

    # --- bottom line: x tick labels centred under their columns, x_label at the right end
    x_label = set_cell_size(x_label, min(cell_len(x_label), plot_cells)) if x_label else ""
    limit = plot_cells - cell_len(x_label) - (1 if x_label else 0)
    bottom = [" "] * plot_cells
    free_from = 0
    x_tick_values, x_tick_text = _ticks_inside(x_lo, x_hi, x_ticks)
    for tick, text in zip(x_tick_values, x_tick_text, strict=True):
        tick_dot = (tick - x_lo) / (x_hi - x_lo) * (canvas.width_dots - 1)
        column = int(math.floor(tick_dot + 0.5)) // 2
        size = len(text)
        start = min(max(column - size // 2, 0), plot_cells - size)
        if start < free_from or start + size > limit:
            continue
        bottom[start:start + size] = list(text)
        free_from = start + size + 1
    bottom_line = " " * gutter + "".join(bottom)
    if x_label:
        bottom_line = bottom_line[:width - cell_len(x_label)] + x_label

    # --- assemble the Text: plain lines plus style spans
    lines: list[str] = []
    spans: list[Span] = []
    offset = 0
    for row in range(rows_n):
        lines.append(gutter_text[row] + gutter_mark[row] + plot_rows[row])
        gutter_chars = len(gutter_text[row]) + 1          # wide label characters: chars != cells
        spans.append(Span(offset, offset + gutter_chars, AXIS_STYLE))
        row_owners = owners[row]
        edges = np.flatnonzero(np.diff(row_owners)) + 1
        starts = np.concatenate([[0], edges])
        ends = np.concatenate([edges, [plot_cells]])
        for a, b in zip(starts.tolist(), ends.tolist(), strict=True):
            who = int(row_owners[a])
            if who >= 0 and styles[who]:
                spans.append(Span(offset + gutter_chars + a, offset + gutter_chars + b,
                                  styles[who]))
        offset += len(lines[-1]) + 1
    lines.append(bottom_line)
    spans.append(Span(offset, offset + len(bottom_line), AXIS_STYLE))
    return Text("\n".join(lines), spans=spans, no_wrap=True, overflow="crop")
