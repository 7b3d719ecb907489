"""The schedule of a plan on the terminal: a table of the visits and a chart of the night.

Pure renderables of a list of :class:`spinflip.daemon.run.scheduler.Entry` (rich), used by
``spinflip plan``: the table gives start, end, object, l/b, az/el at start and end, the Sun's
distance, the status and the reason for a skip; the chart draws each scheduled visit's
elevation against hours from the first start with the braille plotter; the reasons for skips follow the table.
"""

from __future__ import annotations

import numpy as np
from astropy.coordinates import EarthLocation
from astropy.time import Time, TimeDelta
from rich import box
from rich.table import Table
from rich.text import Text

from spinflip.daemon.run.scheduler import Entry, Limits, azel

from .braille import Series, plot

_STYLES = ("cyan", "green", "yellow", "magenta", "blue", "red")


def _num(x: float, fmt: str) -> str:
    return "—" if not np.isfinite(x) else format(x, fmt)


def plan_table(entries: list[Entry], title: str) -> Table:
    """One row per visit, scheduled ones first in time, then the skipped ones (times UTC,
    HH:MM; az and el at the start and the end of the visit, deg)."""
    table = Table(title=title, title_justify="left", box=box.SIMPLE_HEAD, pad_edge=False,
                  padding=(0, 0))
    for name in ("start", "end", "object", "l/lon", "b/lat", "az°", "el°", "Sun°", "status"):
        table.add_column(name, no_wrap=True, min_width=9 if name == "status" else None)
    for e in entries:
        t = e.target
        scheduled = e.status == "scheduled"
        status = Text("scheduled", style="green") if scheduled else Text("skipped",
                                                                          style="yellow")
        table.add_row(e.start_utc[11:16] or "—", e.end_utc[11:16] or "—",
                      t.object + (f" #{e.visit}" if t.repeat > 1 else ""),
                      f"{t.lon_deg:.1f}", f"{t.lat_deg:+.1f}",
                      f"{_num(e.az_start_deg, '.0f')}→{_num(e.az_end_deg, '.0f')}",
                      f"{_num(e.el_start_deg, '.0f')}→{_num(e.el_end_deg, '.0f')}",
                      _num(e.sun_distance_deg, ".0f"), status)
    return table


def skip_reasons(entries: list[Entry]) -> Text:
    """One line per skipped visit: the object and why (the table has no room for it)."""
    out = Text()
    for e in entries:
        if e.status != "scheduled":
            out.append(f"skipped {e.target.object}", style="yellow")
            out.append(f": {e.reason}\n")
    return out


def plan_chart(entries: list[Entry], location: EarthLocation, limits: Limits,
               width: int = 76, height: int = 12, ascii: bool = False) -> Text:
    """Elevation (deg) of each scheduled visit over its on-source time, against hours from
    the first start; the elevation limit as a dotted line."""
    done = [e for e in entries if e.status == "scheduled"]
    if not done:
        return Text("nothing scheduled")
    t0 = Time(done[0].start_utc.rstrip("Z"), scale="utc")
    t1 = Time(done[-1].end_utc.rstrip("Z"), scale="utc")
    span_h = max((t1 - t0).to_value("hour"), 0.1)
    series = []
    for k, e in enumerate(done):
        a = Time(e.start_utc.rstrip("Z"), scale="utc")
        b = Time(e.end_utc.rstrip("Z"), scale="utc")
        times = a + TimeDelta(np.linspace(0.0, (b - a).to_value("sec"), 8), format="sec")
        _, el = azel([e.target], location, times)
        series.append(Series(x=(times - t0).to_value("hour"), y=el[0],
                             style=_STYLES[k % len(_STYLES)], name=e.target.object))
    series.append(Series(x=np.array([0.0, span_h]), y=np.full(2, limits.min_elevation_deg),
                         style="dim", name="limit"))
    return plot(series, width, height, x_range=(0.0, span_h), y_range=(0.0, 90.0),
                x_label=f"h after {done[0].start_utc[11:16]} UTC", y_label="el °",
                ascii=ascii)
