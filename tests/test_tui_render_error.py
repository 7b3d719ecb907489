"""A screen that cannot be drawn leaves the terminal UI running (found while typing tui/app.py:
the error path itself raised TypeError, which closed the UI)."""

from rich.console import Console

from spinflip.daemon.live.ports import free_loopback_port
from spinflip.tui import app, panels


def test_a_failing_panel_gives_one_error_line_and_the_ui_goes_on(monkeypatch):
    def broken(*args, **kwargs):
        raise RuntimeError("panel exploded\nwith a second line")
    monkeypatch.setattr(panels, "screen", broken)
    port = free_loopback_port()
    session = app.WatchSession(f"tcp://127.0.0.1:{port}", f"tcp://127.0.0.1:{port + 1}")
    console = Console(width=60, height=20, record=True)
    text = session.render(console)
    line = text.plain
    assert "the screen could not be drawn (RuntimeError: panel exploded" in line
    assert "\n" not in line and len(line) <= 120 and session.render_errors == 1
    monkeypatch.undo()                       # the next redraw tries again and works
    assert "spinflip" in session.render(console).plain and session.render_errors == 1
