"""The terminal UI under a plan and a pointing driver (tui/plan_panel.py, tui/state.py, the
screen in tui/panels.py, the key p in tui/app.py).

Messages are made with the wire format's own ``encode`` and read back with ``decode``, as a
subscriber sees them; ``status.mount`` and ``progress.plan`` come from tests/wire_examples.py
(``mount_object``, ``plan_object``: valid by the schema's checks). Panels are rendered to plain
text on a colourless ``rich`` console, as in tests/test_panels.py, and the assertions are on
that text.
"""

from __future__ import annotations

import re
import time

import pytest
from test_panels import assert_fits, full_state, render
from wire_examples import mount_object, plan_object, progress_header, status_header

from spinflip.daemon.live import schema
from spinflip.daemon.live.control import ControlServer
from spinflip.daemon.live.control.protocol import CommandError, validate_args
from spinflip.daemon.live.ports import free_loopback_port
from spinflip.daemon.live.schema.fields import PLAN_PHASES
from spinflip.tui import app, panels, plan_panel
from spinflip.tui.cells import S_SEVERITY
from spinflip.tui.state import ViewState

SIZES = [(80, 24), (100, 30), (160, 48)]
MANUAL_DETAIL = "point the dish to az 181.5 deg, el 42.2 deg (G130.0+0.0)"


def status(now_s: float, view: ViewState, seq: int, **fields) -> None:
    frames = schema.encode("status", status_header(seq=seq, **fields))
    view.apply(schema.decode(frames), now_s)


def progress(now_s: float, view: ViewState, seq: int, **fields) -> None:
    frames = schema.encode("progress", progress_header(seq=seq, **fields))
    view.apply(schema.decode(frames), now_s)


def planned_state(mount: dict | None = None, plan: dict | None = None,
                  daemon_state: str = "observing") -> ViewState:
    """tests/test_panels.py's full state, then a status with ``mount`` and a progress with
    ``plan`` (each left out when None)."""
    state = full_state()
    extra = {} if mount is None else {"mount": mount}
    status(100.1, state, 101, state=daemon_state, **extra)
    progress(100.1, state, 102, **({} if plan is None else {"plan": plan}))
    state.now_s = 100.4
    return state


def manual_waiting() -> dict:
    return mount_object(driver="manual", state="waiting", az_deg=None, el_deg=None,
                        error_deg=None, detail=MANUAL_DETAIL)


# ----------------------------------------------------------------------------------------------
# the state
# ----------------------------------------------------------------------------------------------
def test_state_keeps_the_newest_mount_and_plan_and_drops_them_when_absent():
    state = ViewState()
    status(1.0, state, 1)                           # a daemon without a driver: no mount
    progress(1.0, state, 1)
    assert state.mount is None and state.plan is None
    status(2.0, state, 2, mount=mount_object())
    assert state.mount == mount_object()
    status(3.0, state, 3, mount=mount_object(state="slewing", error_deg=12.5))
    assert state.mount["state"] == "slewing" and state.mount["error_deg"] == 12.5
    progress(3.0, state, 2, plan=plan_object())
    assert state.plan["name"] == "heron-ridge-plane" and state.plan["step"] == 3
    progress(4.0, state, 3, plan=plan_object(step=4, object="G130.0+0.0"))
    assert state.plan["object"] == "G130.0+0.0"
    # a status (no mount field) does not touch the plan; a progress does not touch the mount
    status(5.0, state, 4, mount=mount_object())
    assert state.plan["step"] == 4
    progress(5.0, state, 4)                         # progress without plan: the plan is over
    assert state.plan is None and state.mount is not None
    progress(6.0, state, 5, plan=plan_object())
    progress(7.0, state, 6, plan=None)              # null: no plan either
    assert state.plan is None
    status(8.0, state, 5)                           # status without mount: no driver any more
    assert state.mount is None


def test_awaits_observer_only_for_the_manual_driver_waiting():
    state = ViewState()
    assert not state.awaits_observer()
    for driver, mstate, expected in (("manual", "waiting", True), ("manual", "tracking", False),
                                     ("rotator", "waiting", False), ("none", "waiting", False)):
        state.mount = mount_object(driver=driver, state=mstate)
        assert state.awaits_observer() is expected, (driver, mstate)


def test_wire_example_objects_are_checked_by_the_schema():
    with pytest.raises(schema.WireError, match="header.plan.phase"):
        plan_object(phase="dozing")
    with pytest.raises(schema.WireError, match="header.mount.state"):
        mount_object(state="asleep")


# ----------------------------------------------------------------------------------------------
# the plan panel
# ----------------------------------------------------------------------------------------------
@pytest.mark.parametrize("width", [80, 160])
def test_plan_panel_says_the_step_target_next_and_skipped(width):
    state = planned_state(mount_object(), plan_object())
    text = render(plan_panel.plan_panel(state, width, 4), width, 10)
    assert_fits(text, width, 4)
    lines = text.splitlines()
    assert len(lines) == 4
    title = lines[0]
    for words in ("plan heron-ridge-plane", "step 3 of 8", "ETA 2 h 03 min", "done 2",
                  "abandoned 1"):
        assert words in title, (words, title)
    now = lines[1]
    assert "now G120.0+0.5" in now and "OBSERVING" in now
    assert "40 %" in now and "360.0/900.0 s on source" in now         # 360 of 900 s
    assert "21:40 G130.0+0.0" in lines[2] and "22:00 G140.0+0.0" in lines[3]
    assert "skipped G010.0+0.0: below" in lines[2] and "G030.0+0.0: within" in lines[3]
    if width == 80:                                  # 39 cells a half: the reason is cut
        assert lines[2].rstrip().endswith("…")
    else:
        assert "below 15 deg elevation all night" in lines[2]
        assert "within 20 deg of the Sun" in lines[3]


def test_lists_longer_than_their_rows_end_with_how_many_are_left_out():
    upcoming = [{"object": f"G{100 + 10 * i:03d}.0+0.0", "start_utc": f"2025-03-01T21:{10 * i:02d}:00Z"}
                for i in range(6)]
    skipped = [{"object": f"G{10 * i:03d}.0+0.0", "reason": "below the horizon mask"}
               for i in range(1, 4)]
    state = planned_state(plan=plan_object(upcoming=upcoming, skipped=skipped))
    text = render(plan_panel.plan_panel(state, 80, 3), 80, 10)
    assert_fits(text, 80, 3)
    row = text.splitlines()[2]
    assert "next    21:00 G100.0+0.0" in row            # the first one whole
    left, right = row[:40], row[40:]
    count = int(left.rstrip().rsplit("+", 1)[1])        # "+N": the ones not shown
    shown = sum(f"G{100 + 10 * i:03d}" in left for i in range(6))
    assert shown + count == 6 and count >= 1
    assert right.rstrip().endswith("+2")                # 3 skipped, one shown (cut)
    taller = render(plan_panel.plan_panel(state, 80, 8), 80, 10).splitlines()
    assert [f"21:{10 * i:02d} G{100 + 10 * i:03d}.0+0.0" in taller[2 + i] for i in range(6)] \
        == [True] * 6                                   # room: one a line, none left out
    assert not any(re.search(r" \+\d", line) for line in taller[2:])


@pytest.mark.parametrize("phase", PLAN_PHASES)
def test_every_phase_is_said_in_words(phase):
    state = planned_state(plan=plan_object(phase=phase))
    now = render(plan_panel.plan_panel(state, 100, 3), 100, 5).splitlines()[1]
    assert f"now G120.0+0.5  {phase.upper()}" in now
    notes = {"slewing": "nothing is kept", "deferred": "nothing is up yet",
             "parked": "resume goes on", "finished": "every visit made or given up"}
    if phase in notes:
        assert notes[phase] in now
    assert ("%" in now) is (phase in ("observing", "paused"))     # the visit's bar


def test_unknown_visit_length_and_null_target():
    state = planned_state(plan=plan_object(visit_total_s=None, eta_s=None, object=None,
                                           step=0, upcoming=[], skipped=[]))
    lines = render(plan_panel.plan_panel(state, 80, 3), 80, 5).splitlines()
    assert "step 0 of 8 (not begun)" in lines[0] and "ETA ?" in lines[0]
    assert "now —  OBSERVING  6 min 00 s on source" in lines[1] and "%" not in lines[1]
    assert "next    none" in lines[2] and "skipped none" in lines[2]


# ----------------------------------------------------------------------------------------------
# the mount
# ----------------------------------------------------------------------------------------------
@pytest.mark.parametrize("width", [80, 160])
def test_mount_panel_says_where_the_dish_is_and_should_be(width):
    state = planned_state(mount_object())
    text = render(plan_panel.mount_panel(state, width, 2), width, 4)
    assert_fits(text, width, 2)
    assert "mount rotator TRACKING" in text
    assert "az 181.2° el 42.0°" in text and "az 181.5° el 42.2°" in text
    assert "0.31°" in text and "rotator at tcp://127.0.0.1:4533" in text
    assert ("target az 181.5°" in text) is (width >= 100)      # words where there is room
    assert plan_panel.mount_height(state, width, 48) == (2 if width < 160 else 1)  # no blank
    unknown = planned_state(mount_object(az_deg=None, el_deg=None, error_deg=None))
    assert "az —° el —°" in render(plan_panel.mount_panel(unknown, width, 1), width, 4)


def test_a_fault_comes_first_in_the_error_style():
    why = "rotator at tcp://127.0.0.1:4533 did not answer for 10 s"
    state = planned_state(mount_object(state="fault", detail=why))
    assert plan_panel.mount_height(state, 80, 24) == 2
    panel = plan_panel.mount_panel(state, 80, 2)
    text = render(panel, 80, 4)
    assert text.splitlines()[0].startswith("mount rotator FAULT  " + why)
    styled = [panel.plain[s.start:s.end] for s in panel.spans if s.style == S_SEVERITY["error"]]
    assert "FAULT" in styled and why in styled


def test_no_driver_no_mount_lines():
    state = planned_state(mount_object(driver="none", state="idle"))
    assert plan_panel.mount_height(state, 160, 48) == 0
    assert "mount" not in render(panels.screen(state, 100, 30), 100, 30)


# ----------------------------------------------------------------------------------------------
# the prompt of the manual driver
# ----------------------------------------------------------------------------------------------
@pytest.mark.parametrize("width,height", SIZES)
def test_the_manual_prompt_shows_only_while_the_observer_is_awaited(width, height):
    waiting = planned_state(manual_waiting(), plan_object(phase="waiting"), "waiting")
    text = render(panels.screen(waiting, width, height), width, height)
    assert_fits(text, width, height)
    lines = text.splitlines()
    assert lines[1].startswith(" POINT THE DISH: point the dish to az 181.5 deg")
    assert "(G130.0+0.0)" in " ".join(lines[1:3])                 # wrapped, not lost
    assert any(line.startswith(" press p when the dish is there") for line in lines[1:4])
    assert "WAITING for you" in lines[0] and "[p]pointed" in lines[-1]
    assert "for you to point the dish" in text                   # the plan's "now" line
    for mount, word in ((mount_object(driver="manual", state="tracking"), "[p]pointed"),
                        (mount_object(state="waiting"), None)):
        other = render(panels.screen(planned_state(mount, plan_object(), "waiting"),
                                     width, height), width, height)
        assert "POINT THE DISH" not in other and "press p" not in other
        assert ("[p]pointed" in other) is (word is not None)      # p only with a manual driver


# ----------------------------------------------------------------------------------------------
# the whole screen
# ----------------------------------------------------------------------------------------------
@pytest.mark.parametrize("width,height", SIZES)
def test_screen_with_a_plan_and_a_rotator_fits_and_keeps_the_spectrum(width, height):
    state = planned_state(mount_object(), plan_object())
    text = render(panels.screen(state, width, height), width, height)
    assert_fits(text, width, height)
    assert len(text.splitlines()) == height
    assert "mount rotator TRACKING" in text and "plan heron-ridge-plane" in text
    assert "21:40 G130.0+0.0" in text and "skipped G010.0+0.0" in text
    assert "v LSRK km/s" in text and "Tsys 74.2 K" in text        # the main area is still there
    assert "events" in text and "[q]quit" in text


@pytest.mark.parametrize("width,height", SIZES)
def test_nothing_plan_related_without_a_plan_or_driver(width, height):
    state = planned_state()                 # an older daemon: neither mount nor plan
    text = render(panels.screen(state, width, height), width, height)
    assert_fits(text, width, height)
    for words in ("plan ", "mount", "POINT THE DISH", "[p]", "now ", "skipped", "SLEWING"):
        assert words not in text, words
    lines = text.splitlines()
    assert lines[1].startswith("int #5") and lines[2].startswith("scan")
    assert lines[3].startswith("━ average")          # the main area right under the progress


def test_slewing_and_waiting_are_said_in_the_top_bar_and_the_spectrum():
    state = planned_state(mount_object(state="slewing"),
                          plan_object(phase="slewing", object="G130.0+0.0"), "slewing")
    assert "SLEWING to G130.0+0.0" in panels.top_bar(state, 100).plain
    assert "SLEWING" in render(panels.spectrum_panel(state, 70, 16), 70, 16).splitlines()[0]
    deferred = planned_state(plan=plan_object(phase="deferred"), daemon_state="waiting")
    assert "WAITING: nothing up yet" in panels.top_bar(deferred, 100).plain
    fault = planned_state(mount_object(state="fault"), plan_object(phase="waiting"), "waiting")
    assert "WAITING for the rotator" in panels.top_bar(fault, 100).plain
    fresh = ViewState()                     # no spectrum yet: the placeholder says why
    status(1.0, fresh, 1, state="slewing", mount=mount_object(state="slewing"))
    progress(1.0, fresh, 1, plan=plan_object(phase="slewing"))
    fresh.now_s = 1.2
    empty = render(panels.spectrum_panel(fresh, 70, 9), 70, 9)
    assert "no spectrum yet: SLEWING to G120.0+0.5 (nothing is observed meanwhile)" in empty


# ----------------------------------------------------------------------------------------------
# the key p
# ----------------------------------------------------------------------------------------------
def test_key_p_sends_pointed_without_arguments():
    assert app.KEY_COMMANDS["p"] == ("pointed", None)
    seen = []

    def handler(cmd, args):
        seen.append((cmd, args))
        return {"pointed": True}

    server = ControlServer("tcp://127.0.0.1:*", handler).start()   # checks against COMMANDS
    try:
        session = app.WatchSession(f"tcp://127.0.0.1:{free_loopback_port()}",
                                   server.bound_endpoint)
        session.handle_keys("P")                    # keys are taken in either case
        deadline = time.monotonic() + 5.0
        while not session.state.reply.startswith("pointed: ok") and time.monotonic() < deadline:
            time.sleep(0.02)
    finally:
        server.stop()
    assert seen == [("pointed", {})], session.state.reply
    assert session.state.reply.startswith("pointed: ok")


def test_pointed_takes_where_the_dish_really_points():
    assert validate_args("pointed", {"az_deg": 181.4, "el_deg": 42.3}) == \
        {"az_deg": 181.4, "el_deg": 42.3}
    with pytest.raises(CommandError, match="el_deg"):
        validate_args("pointed", {"el_deg": 95})
