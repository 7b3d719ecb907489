"""Small tools of the terminal UI's text: the styles, lines of an exact width, rules, packed
items, bars, and numbers and durations for people.

Shared by :mod:`spinflip.tui.panels` and :mod:`spinflip.tui.plan_panel`. Every tool returns a
:class:`rich.text.Text` (or a str) and reads nothing but its arguments. Colour is decoration
only: every piece of information is also in the characters (see :mod:`spinflip.tui.panels`).
"""

from __future__ import annotations

import datetime as _dt
import math

from rich.text import Text

# ----------------------------------------------------------------------------------------------
# styles (colour is decoration only: see the Notes of spinflip.tui.panels)
# ----------------------------------------------------------------------------------------------
S_TITLE = "bold"
S_RULE = "dim"
S_LABEL = "dim"
S_VALUE = "bold"
S_AVERAGE = "bold green"
S_INTEGRATION = "dim cyan"
S_FLAGGED = "bold red"
S_BAR_DONE = "green"
S_BAR_TODO = "dim"
S_STALE = "bold reverse red"
S_WAIT = "bold yellow"
S_SEVERITY = {"info": "", "warning": "bold yellow", "error": "bold reverse red"}
SEVERITY_WORD = {"info": "info", "warning": "WARN", "error": "ERROR"}


# ----------------------------------------------------------------------------------------------
# small text tools
# ----------------------------------------------------------------------------------------------
def fit(text: Text | str, width: int) -> Text:
    """One line exactly ``width`` cells: cut with an ellipsis or padded with spaces."""
    t = Text(text) if isinstance(text, str) else text.copy()
    t.no_wrap = True
    t.truncate(max(0, width), overflow="ellipsis", pad=True)
    return t


def block(lines: list, width: int, height: int) -> Text:
    """Lines as one Text of exactly ``height`` lines of ``width`` cells (cut or padded)."""
    rows = [fit(line, width) for line in lines[:max(0, height)]]
    rows += [fit("", width) for _ in range(max(0, height) - len(rows))]
    out = Text("\n").join(rows)
    out.no_wrap = True
    out.overflow = "crop"
    out.end = "\n"
    return out


def text_lines(text: Text) -> list[Text]:
    """The lines of a Text (no trailing empty line)."""
    out = list(text.split("\n", allow_blank=True))
    if out and str(text).endswith("\n"):
        out.pop()
    return out


def rule(title: str | Text, width: int, fill: str = "─") -> Text:
    """A section title: "── title ──────" across ``width`` cells."""
    t = Text(fill * 2 + " ", style=S_RULE)
    t.append_text(Text(title, style=S_TITLE) if isinstance(title, str) else title)
    t.append(" ")
    if t.cell_len < width:
        t.append(fill * (width - t.cell_len), style=S_RULE)
    return fit(t, width)


def pack(items: list[Text], width: int, sep: str = "  ") -> list[Text]:
    """Items greedily packed into lines no wider than ``width`` (an item never split)."""
    lines, cur = [], None
    for item in items:
        if cur is None:
            cur = item.copy()
        elif cur.cell_len + len(sep) + item.cell_len <= width:
            cur.append(sep)
            cur.append_text(item)
        else:
            lines.append(cur)
            cur = item.copy()
    if cur is not None:
        lines.append(cur)
    return lines


def kv(label: str, value: str) -> Text:
    """"label value" with the label dim and the value bold."""
    t = Text(label + " ", style=S_LABEL) if label else Text()
    t.append(value, style=S_VALUE)
    return t


def format_duration(seconds: float | None) -> str:
    """A duration for people: "17 s", "9 min 05 s", "2 h 03 min"; "?" when not known."""
    if seconds is None or not math.isfinite(seconds):
        return "?"
    s = max(0.0, float(seconds))
    if s < 60.0:
        return f"{s:.0f} s"
    if s < 3600.0:
        m, r = divmod(int(round(s)), 60)
        return f"{m} min {r:02d} s"
    h, r = divmod(int(round(s)), 3600)
    return f"{h} h {r // 60:02d} min"


def format_age(seconds: float) -> str:
    """An age: one decimal below 10 s ("0.4 s"), whole seconds above ("17 s")."""
    return f"{seconds:.1f} s" if seconds < 10.0 else format_duration(seconds)


def hms(time_utc: str) -> str:
    """HH:MM:SS of a wire time (UTC), or the text itself if it is not one."""
    try:
        return _dt.datetime.fromisoformat(time_utc.replace("Z", "+00:00")).strftime("%H:%M:%S")
    except (ValueError, AttributeError):
        return str(time_utc)[:8]


def num(value: float | None, fmt: str, unit: str) -> str:
    """A number with its unit, or "— unit" when it is not known."""
    if value is None or (isinstance(value, float) and not math.isfinite(value)):
        return f"—{unit}" if unit == "°" else f"— {unit}".rstrip()
    return f"{value:{fmt}}{unit}" if unit == "°" else f"{value:{fmt}} {unit}".rstrip()


def bar(fraction: float, width: int, ascii: bool = False) -> Text:
    """A bar ``width`` cells long, ``fraction`` (0..1) of it filled."""
    done = int(round(min(1.0, max(0.0, fraction)) * width))
    full, empty = ("#", "-") if ascii else ("█", "░")
    t = Text(full * done, style=S_BAR_DONE)
    t.append(empty * (width - done), style=S_BAR_TODO)
    return t


def elapsed_total(elapsed_s: float, total_s: float) -> str:
    """"12.6/30.0 s", or in minutes above 1000 s."""
    if total_s >= 1000.0:
        return f"{elapsed_s / 60:.1f}/{total_s / 60:.1f} min"
    return f"{elapsed_s:.1f}/{total_s:.1f} s"
