"""The panels of a running plan and of the pointing driver: pure functions of a ViewState.

Three pieces, each drawn only when the daemon sends what it needs (wire docstring:
``progress.plan``, ``status.mount``); a daemon without a plan or a driver, or older than
them, gets none of them and the screen is as before:

=================  ===============================================================
:func:`plan_panel`  full width: the plan's name, "step i of N", its ETA and the visits
                    done and abandoned (title line); the current target and its phase,
                    with the visit's on-source time as a bar while observing; then two
                    halves side by side, the next targets with their start times (UTC,
                    HH:MM) and the skipped ones with their reasons (cut to fit)
:func:`mount_panel` full width, one or two lines: driver, state, where the dish is and
                    where it should be (az/el, deg), the angle between them, the detail
                    (the rotator's endpoint or the fault); a fault in the error style
:func:`prompt_panel` full width, reversed: the manual driver waits for the observer to
                    point the dish: where to (the driver's ``detail``) and "press p when
                    the dish is there"
=================  ===============================================================

Like :mod:`spinflip.tui.panels`, every function returns lines exactly as wide as asked, and
every state is said in words as well as colour (SLEWING, WAITING, FAULT, ...), so nothing is
lost on a console without colour.
"""

from __future__ import annotations

import datetime as _dt
import math
import textwrap

from rich.text import Text

from .cells import (
    S_LABEL,
    S_SEVERITY,
    S_TITLE,
    S_VALUE,
    S_WAIT,
    bar,
    block,
    elapsed_total,
    fit,
    format_duration,
    kv,
    num,
    pack,
    rule,
)
from .state import ViewState

#: Style of each plan phase (the phase is also written out in capitals).
PHASE_STYLE = {"slewing": "bold cyan", "waiting": S_WAIT, "observing": "bold green",
               "deferred": S_WAIT, "paused": S_WAIT, "parked": S_WAIT, "finished": S_VALUE}
#: What each phase means, after its name on the "now" line.
PHASE_NOTE = {"slewing": "the dish is moving; nothing is kept",
              "waiting": "for the dish, the target to rise or the rotator",
              "deferred": "nothing is up yet",
              "paused": "resume goes on",
              "parked": "the dish is parked; resume goes on",
              "finished": "every visit made or given up"}
#: Style of each mount state (the state is also written out in capitals).
MOUNT_STYLE = {"idle": S_LABEL, "slewing": "bold cyan", "tracking": "bold green",
               "waiting": S_WAIT, "parking": S_WAIT, "parked": S_WAIT,
               "fault": S_SEVERITY["error"]}
#: The prompt's style: reversed, like the STALE banner, but in the waiting colour.
S_PROMPT = "bold reverse yellow"
#: The prompt's second line.
PROMPT_KEY_LINE = "press p when the dish is there"
#: Rows the plan panel leaves the spectrum and side column at least, when it can.
MAIN_ROWS_KEPT = 12
#: Cells of the labels "next" and "skipped" in front of the two lists.
LIST_LABEL_CHARS = 8


def _hhmm(time_utc: str) -> str:
    """HH:MM of a wire time (UTC), or its characters 11..16 if it is not one."""
    try:
        return _dt.datetime.fromisoformat(str(time_utc).replace("Z", "+00:00")).strftime("%H:%M")
    except ValueError:
        return str(time_utc)[11:16] or "?"


def _finite(value: object) -> float | None:
    """A JSON number as float, None when it is null or not finite."""
    if isinstance(value, (int, float)) and not isinstance(value, bool) and math.isfinite(value):
        return float(value)
    return None


# ----------------------------------------------------------------------------------------------
# the plan
# ----------------------------------------------------------------------------------------------
def plan_height(state: ViewState, room: int) -> int:
    """Rows the plan panel takes when ``room`` rows are left for it and the main area.

    0 without a plan; otherwise the title, the "now" line and one row per listed visit (the
    longer of the two lists), but at least 3 and leaving :data:`MAIN_ROWS_KEPT` rows to the
    main area where the screen allows it.
    """
    plan = state.plan
    if not plan or room <= 0:
        return 0
    listed = max(len(plan.get("upcoming") or ()), len(plan.get("skipped") or ()), 1)
    return int(min(room, max(3, min(2 + listed, room - MAIN_ROWS_KEPT))))


def _title(plan: dict, width: int) -> Text:
    """The title line: plan NAME  step i of N  ETA ...  done d  abandoned a."""
    title = Text("plan ", style=S_TITLE)
    title.append(str(plan.get("name", "?")), style=S_VALUE)
    step, steps = plan.get("step", 0), plan.get("steps", 0)
    title.append("  step ", style=S_LABEL)
    title.append(f"{step} of {steps}" if step else f"0 of {steps} (not begun)", style=S_VALUE)
    title.append("  ETA ", style=S_LABEL)
    title.append(format_duration(_finite(plan.get("eta_s"))), style=S_VALUE)
    title.append("  done ", style=S_LABEL)
    title.append(str(plan.get("done", 0)), style=S_VALUE)
    title.append("  abandoned ", style=S_LABEL)
    title.append(str(plan.get("abandoned", 0)),
                 style="bold yellow" if plan.get("abandoned") else S_VALUE)
    return rule(title, width)


def _now_line(state: ViewState, plan: dict, width: int, ascii: bool) -> Text:
    """The current target and its phase; while observing (or paused) the visit as a bar."""
    phase = str(plan.get("phase", "?"))
    line = Text("now ", style=S_LABEL)
    line.append(str(plan.get("object") or "—"), style=S_VALUE)
    line.append("  ")
    line.append(phase.upper(), style=PHASE_STYLE.get(phase, S_VALUE))
    elapsed = _finite(plan.get("visit_elapsed_s")) or 0.0
    total = _finite(plan.get("visit_total_s"))
    if phase in ("observing", "paused") and total and total > 0:
        tail = Text(f" {100 * min(1.0, elapsed / total):3.0f} %", style=S_VALUE)
        tail.append(f"  {elapsed_total(elapsed, total)} on source")
        bar_w = width - line.cell_len - tail.cell_len - 1
        line.append(" ")
        if bar_w >= 4:
            line.append_text(bar(elapsed / total, min(bar_w, 40), ascii))
        line.append_text(tail)
    elif phase in ("observing", "paused"):
        line.append(f"  {format_duration(elapsed)} on source")
    note = PHASE_NOTE.get(phase)
    if phase == "waiting" and state.awaits_observer():
        note = "for you to point the dish: press p when it is there"
    if note and phase != "observing":
        line.append("  " + note, style=S_LABEL)
    return fit(line, width)


def _list_rows(label: str, items: list[Text], width: int, rows: int) -> list[Text]:
    """``items`` under ``label`` in at most ``rows`` lines of ``width`` cells: one a line
    when they fit; else the last line holds the rest side by side and "+N" for those that
    do not fit."""
    pad = " " * LIST_LABEL_CHARS
    head = Text(label.ljust(LIST_LABEL_CHARS), style=S_LABEL)
    room = width - LIST_LABEL_CHARS
    if not items:
        return [fit(head + Text("none", style=S_LABEL), width)]
    out: list[Text] = []
    if len(items) <= rows:
        for i, item in enumerate(items):
            out.append(fit((head if i == 0 else Text(pad)) + fit(item, room), width))
        return out
    for i, item in enumerate(items[:rows - 1]):
        out.append(fit((head if i == 0 else Text(pad)) + fit(item, room), width))
    rest = items[rows - 1:]
    line = Text()
    shown = 0
    for item in rest:
        left_after = len(rest) - shown - 1
        need = (2 if shown else 0) + item.cell_len + (len(f" +{left_after}") if left_after else 0)
        if line.cell_len + need > room:
            break
        if shown:
            line.append("  ")
        line.append_text(item)
        shown += 1
    if shown == 0:                    # not even the first fits whole: cut it
        line = fit(rest[0], max(0, room - len(f" +{len(rest) - 1}")))
        line.rstrip()
        shown = 1
    if shown < len(rest):
        line.append(f" +{len(rest) - shown}", style=S_LABEL)
    out.append(fit((head if rows == 1 else Text(pad)) + line, width))
    return out


def plan_panel(state: ViewState, width: int, height: int, ascii: bool = False) -> Text:
    """Where the running plan is: title, the current target, the next and the skipped visits.

    Parameters
    ----------
    state : ViewState
        ``state.plan`` is drawn; without one the panel is ``height`` empty lines.
    width, height : int
        Cells; :func:`plan_height` says how many rows the screen gives it.
    ascii : bool
        '#' and '-' for the visit's bar instead of block characters.

    Returns
    -------
    rich.text.Text
        Exactly ``height`` lines of ``width`` cells: the title (name, "step i of N", ETA,
        done, abandoned), the "now" line (the current target, its phase in capitals and what
        it means; while observing the visit's on-source time as a bar, percent and
        elapsed/total), then the next visits ("HH:MM object", UTC start) on the left half and
        the skipped ones ("object: reason", cut with an ellipsis) on the right half, one a
        line while they fit, the rest side by side on the last line with "+N" for those
        left out.
    """
    plan = state.plan
    if not plan or height <= 0:
        return block([], width, max(0, height))
    lines = [_title(plan, width)]
    if height >= 2:
        lines.append(_now_line(state, plan, width, ascii))
    rows = height - len(lines)
    if rows > 0:
        left_w = (width - 1) // 2
        right_w = width - left_w - 1
        upcoming = [Text(_hhmm(u.get("start_utc", "")) + " ", style=S_LABEL)
                    + Text(str(u.get("object", "?")), style=S_VALUE)
                    for u in plan.get("upcoming") or ()]
        skipped = [Text(str(s.get("object", "?")), style="yellow")
                   + Text(": " + str(s.get("reason", "")))
                   for s in plan.get("skipped") or ()]
        left = _list_rows("next", upcoming, left_w, rows)
        right = _list_rows("skipped", skipped, right_w, rows)
        for i in range(rows):
            a = left[i] if i < len(left) else fit("", left_w)
            b = right[i] if i < len(right) else fit("", right_w)
            lines.append(a + Text(" ") + b)
    return block(lines, width, height)


# ----------------------------------------------------------------------------------------------
# the mount
# ----------------------------------------------------------------------------------------------
def has_mount(state: ViewState) -> bool:
    """True when the daemon reports a pointing driver (``mount.driver`` not "none")."""
    return bool(state.mount) and (state.mount or {}).get("driver") != "none"


def _mount_items(state: ViewState, width: int) -> list[Text]:
    m = state.mount or {}
    mstate = str(m.get("state", "?"))
    fault = mstate == "fault"
    head = Text("mount ", style=S_TITLE)
    head.append(str(m.get("driver", "?")), style=S_VALUE)
    head.append(" ")
    head.append(mstate.upper(), style=MOUNT_STYLE.get(mstate, S_VALUE))
    detail = str(m.get("detail") or "")
    wide = width >= 100
    at = kv("dish" if wide else "", f"az {num(_finite(m.get('az_deg')), '.1f', '°')} "
                                    f"el {num(_finite(m.get('el_deg')), '.1f', '°')}")
    to = kv("target" if wide else "→", f"az {num(_finite(m.get('target_az_deg')), '.1f', '°')} "
                                      f"el {num(_finite(m.get('target_el_deg')), '.1f', '°')}")
    err = kv("error" if wide else "err", num(_finite(m.get("error_deg")), ".2f", "°"))
    items = [head]
    if fault and detail:                 # the fault first: it is what the observer must read
        items.append(Text(detail, style=S_SEVERITY["error"]))
    items += [at + Text("  ") + to, err]
    if detail and not fault and not state.awaits_observer():    # the prompt says it
        items.append(Text(detail, style=S_LABEL))
    return items


def mount_height(state: ViewState, width: int, screen_height: int) -> int:
    """Rows of the mount panel ``width`` cells wide: 0 without a driver; else the lines its
    items need, at most 1, or 2 when the driver is at fault or the screen has 30 rows or
    more (room for the detail)."""
    if not has_mount(state):
        return 0
    fault = (state.mount or {}).get("state") == "fault"
    cap = 2 if fault or screen_height >= 30 else 1
    return min(cap, len(pack(_mount_items(state, width), width)))


def mount_panel(state: ViewState, width: int, height: int) -> Text:
    """The pointing driver: driver, STATE, where the dish is and should be, error, detail.

    Parameters
    ----------
    state : ViewState
        ``state.mount`` is drawn; without one (or driver "none") ``height`` empty lines.
    width, height : int
        Cells; :func:`mount_height` says how many rows the screen gives it.

    Returns
    -------
    rich.text.Text
        Exactly ``height`` lines of ``width`` cells: "mount DRIVER STATE", then the
        position the dish reached and the target (az, el in deg; "—" when not known), the
        angle between them ("err"), the detail; packed into the lines, what does not fit
        left out. A fault is written FAULT, and its detail comes right after it, both in the
        error style of the events panel.
    """
    if not has_mount(state) or height <= 0:
        return block([], width, max(0, height))
    return block(pack(_mount_items(state, width), width), width, height)


# ----------------------------------------------------------------------------------------------
# the prompt of the manual driver
# ----------------------------------------------------------------------------------------------
def prompt_panel(state: ViewState, width: int) -> Text:
    """The manual driver's request to the observer, hard to miss; nothing when none.

    Parameters
    ----------
    state : ViewState
    width : int
        Cells.

    Returns
    -------
    rich.text.Text
        No lines unless :meth:`ViewState.awaits_observer` (driver "manual", state
        "waiting"); then "POINT THE DISH: " and the driver's ``detail`` (where to point,
        wrapped over at most two lines, cut with an ellipsis beyond), and the line
        "press p when the dish is there", all reversed in the waiting colour.
    """
    if not state.awaits_observer():
        return Text("")
    detail = " ".join(str((state.mount or {}).get("detail") or "").split())
    words = "POINT THE DISH: " + (detail or "where the plan asks")
    wrapped = textwrap.wrap(words, max(10, width - 2)) or [words]
    if len(wrapped) > 2:
        wrapped = [wrapped[0], " ".join(wrapped[1:])]
    rows = [fit(Text(" " + w, style=S_PROMPT), width) for w in wrapped]
    for r in rows:
        r.stylize(S_PROMPT)
    key = Text(" " + PROMPT_KEY_LINE + " ", style=S_PROMPT)
    key = fit(key, width)
    key.stylize(S_PROMPT)
    rows.append(key)
    return block(rows, width, len(rows))
