"""The survey view of ``spinflip watch`` (key v): tui/survey.py and tui/survey_panel.py.

Messages are made with the wire format's own ``encode`` and read back with ``decode``, as in
tests/test_panels.py, and the screen is rendered to plain text the same way.

Outside references used below:
- Tangent-point relation for a flat rotation curve: v_t = Theta0 (1 - sin l) at R = R0 sin l
  in the first quadrant (circular rotation; textbook, from memory), with the IAU 1985
  constants R0 = 8.5 kpc, Theta0 = 220 km/s (MNRAS 221, 1023, 1986).
- N(HI) = 1.823e18 cm^-2 per K km/s, optically thin (Dickey & Lockman 1990, ARA&A 28, 215).
- A Gaussian's integral: peak * sigma * sqrt(2 pi).
"""

from __future__ import annotations

import io
import math
from types import SimpleNamespace

import numpy as np
import pytest
from rich.console import Console
from scipy.special import erfc

from spinflip.daemon.live import schema
from spinflip.daemon.live.ports import free_loopback_port
from spinflip.reduce.constants import CONSTANTS
from spinflip.tui import app, panels, survey
from spinflip.tui.state import ViewState

IAU = CONSTANTS["iau1985"]
NCHAN = 1024
NOISE_K = 0.3
LONGITUDES = tuple(range(20, 65, 5))


def _stand_in_terminal_velocity(stack, consts):
    """Used only when spinflip.reduce.tangent is absent (another branch): the last channel of
    the run above 3 sigma from the peak towards positive velocity, first quadrant only."""
    if not 0.0 < stack.glon_deg < 90.0:
        return None
    sig = float(np.nanmax(stack.sigma_k))
    tb = np.where(np.isfinite(stack.tb_k), stack.tb_k, np.inf)     # a NaN does not end the run
    peak = int(np.nanargmax(stack.tb_k))
    below = np.flatnonzero(~(tb[peak:] > 3.0 * sig))
    if not below.size:
        return None
    vt = float(stack.v_km_s[peak + below[0] - 1])
    s = math.sin(math.radians(stack.glon_deg))
    return SimpleNamespace(glon_deg=stack.glon_deg, v_terminal_km_s=vt, v_terminal_err_km_s=2.0,
                           r_kpc=consts.r0_kpc * s, theta_km_s=vt + consts.theta0_km_s * s,
                           theta_err_km_s=3.0)


try:
    from spinflip.reduce.tangent import terminal_velocity as TERMINAL_VELOCITY
except ImportError:
    TERMINAL_VELOCITY = _stand_in_terminal_velocity


def v_axis():
    """LSRK velocities of the channels, descending (sky frequency ascending), ~0.5 km/s."""
    return np.linspace(253.0, -253.0, NCHAN)


def average_frames(glon, row=4, offset_k=1.5, slope_k_per_km_s=0.002, unit="K", obj=None,
                   time_utc="2025-03-01T21:04:05.250000Z", seed=None):
    """An average spectrum with a rotation-curve-like edge: emission from -30 km/s up to the
    flat curve's terminal velocity Theta0 (1 - sin l), edges 8 km/s wide, 30 K, plus a
    baseline (offset + slope), noise and one flagged channel."""
    v = v_axis()
    vt = IAU.theta0_km_s * (1.0 - math.sin(math.radians(glon)))
    t = 30.0 * 0.5 * erfc((v - vt) / (math.sqrt(2) * 8.0)) * 0.5 * erfc((-v - 30.0) /
                                                                       (math.sqrt(2) * 8.0))
    rng = np.random.default_rng(int(glon) if seed is None else seed)
    t = t + offset_k + slope_k_per_km_s * v + rng.normal(0.0, NOISE_K, NCHAN)
    flagged = np.zeros(NCHAN, bool)
    flagged[500] = True
    header = {
        "time_utc": time_utc, "kind": "average", "scan": f"scan-{int(glon):04d}", "row": row,
        "exposure_s": 50.0, "tsys_k": 74.2, "unit": unit, "restfreq_hz": 1_420_405_751.768,
        "vframe_m_s": 0.0, "glon_deg": float(glon), "glat_deg": 0.0, "azimuth_deg": 180.0,
        "elevation_deg": 40.0, "ra_deg": 280.0, "dec_deg": -5.0,
        "object": obj or f"G{glon:05.1f}+0.0", "folded": True, "flagged_fraction": 1 / NCHAN,
        "blanked_fraction": 0.0, "nimpulse": 0, "ncarrier": 0,
    }
    arrays = {
        "freq_hz": (1_420_405_751.768 * (1 - v / 299_792.458), "Hz"),
        "v_lsrk_km_s": (v, "km/s"), "data": (t.astype(np.float32), unit),
        "flagged": (flagged, ""), "exposure_s": (np.full(NCHAN, 50.0, np.float32), "s"),
    }
    return schema.encode("spectrum", header, arrays)


def survey_state(terminal_velocity=TERMINAL_VELOCITY) -> ViewState:
    state = ViewState(endpoint="tcp://127.0.0.1:5621")
    state.survey = survey.SurveyState(terminal_velocity=terminal_velocity)
    for i, lon in enumerate(LONGITUDES):
        state.apply(schema.decode(average_frames(lon)), 10.0 + i)
    state.now_s = 10.0 + len(LONGITUDES)
    return state


def render(renderable, width, height) -> str:
    console = Console(record=True, width=width, height=height, file=io.StringIO(),
                      color_system=None)
    console.print(renderable)
    return console.export_text()


# ----------------------------------------------------------------------------------------------
# the stack made from an average
# ----------------------------------------------------------------------------------------------
def test_stack_from_average_baseline_noise_and_column_density():
    state = ViewState()
    state.apply(schema.decode(average_frames(40.0)), 1.0)
    st = survey.stack_from_average(state.average)
    assert np.all(np.diff(st.v_km_s) > 0)                          # ascending, as Stack says
    assert np.isnan(st.tb_k[NCHAN - 1 - 500])                      # the flagged channel
    free = np.abs(st.v_km_s) > 200.0                               # line-free band edges
    assert abs(np.nanmean(st.tb_k[free])) < 0.05                   # offset and slope gone
    assert np.nanmax(st.sigma_k) == pytest.approx(NOISE_K, rel=0.15)
    # W: the emission's integral (erfc edges: width = vt + 30 km/s at 30 K), within 3 sigma
    vt = IAU.theta0_km_s * (1 - math.sin(math.radians(40.0)))
    assert st.w_k_km_s == pytest.approx(30.0 * (vt + 30.0), abs=3 * st.w_err_k_km_s + 5.0)
    assert st.nhi_cm2 == pytest.approx(1.823e18 * st.w_k_km_s)   # Dickey & Lockman 1990
    assert st.baseline_order == 1 and st.n_scans == 1 and st.n_rows == 5


def test_stack_from_average_w_of_a_gaussian():
    # analytic integral of a Gaussian: peak sigma sqrt(2 pi) = 20 * 10 * 2.5066 K km/s
    v = v_axis()
    spec = {"unit": "K", "glon_deg": 120.0, "glat_deg": 1.0, "object": "G120",
            "arrays": {"v_lsrk_km_s": v, "data": 20.0 * np.exp(-0.5 * (v / 10.0) ** 2),
                       "flagged": np.zeros(NCHAN, bool)}}
    st = survey.stack_from_average(spec)
    assert st.w_k_km_s == pytest.approx(20.0 * 10.0 * math.sqrt(2 * math.pi), rel=1e-3)


def test_stack_from_average_refuses_counts_and_bad_axes():
    spec = {"unit": "count", "glon_deg": 30.0, "glat_deg": 0.0,
            "arrays": {"v_lsrk_km_s": v_axis(), "data": np.ones(NCHAN)}}
    with pytest.raises(ValueError, match="not K"):
        survey.stack_from_average(spec)
    spec["unit"] = "K"
    spec["arrays"]["v_lsrk_km_s"] = v_axis() ** 3
    with pytest.raises(ValueError, match="not uniform"):
        survey.stack_from_average(spec)


# ----------------------------------------------------------------------------------------------
# the survey state
# ----------------------------------------------------------------------------------------------
def test_newest_average_per_object_bounded_and_throttled():
    calls = []

    def tv(stack, consts):
        calls.append(stack.object)
        return None

    s = survey.SurveyState(max_objects=5, terminal_velocity=tv)
    state = ViewState()
    state.survey = s
    state.apply(schema.decode(average_frames(30.0, row=1)), 0.0)
    assert s.refresh(0.0) == 1 and calls == ["G030.0+0.0"]
    assert s.entries["G030.0+0.0"].raw is None                     # the full average let go
    assert s.entries["G030.0+0.0"].tb_k.dtype == np.float32
    # the same object's next average: not before a second has passed
    state.apply(schema.decode(average_frames(30.0, row=2, time_utc="2025-03-01T21:05:00Z")),
                0.5)
    assert s.refresh(0.5) == 0 and s.refresh(0.99) == 0
    assert s.refresh(1.0) == 1 and len(calls) == 2
    # a new object: at once
    state.apply(schema.decode(average_frames(35.0)), 1.2)
    assert s.refresh(1.2) == 1 and calls[-1] == "G035.0+0.0"
    assert s.refresh(5.0) == 0                                     # nothing changed
    for lon in range(40, 80, 5):                                   # 8 more: 5 newest kept
        state.apply(schema.decode(average_frames(float(lon))), 6.0)
    assert list(s.entries) == [f"G{lon:05.1f}+0.0" for lon in range(55, 80, 5)]
    assert s.refresh(6.0) == 5


def test_averages_not_in_kelvin_are_left_out_and_said():
    state = survey_state()
    state.apply(schema.decode(average_frames(25.0, unit="count", obj="raw")), 30.0)
    state.now_s = 30.0
    state.view = "survey"
    text = render(panels.screen(state, 100, 30), 100, 30)
    assert "1 left out" in text and state.survey.left_out() == 1


def test_terminal_velocities_follow_the_edge():
    state = survey_state()
    state.survey.refresh(state.now_s)
    pts = state.survey.points()
    assert [round(p.glon_deg) for p in sorted(pts, key=lambda p: p.glon_deg)] == \
        list(LONGITUDES)
    # the synthetic edge is the flat curve's terminal velocity, 8 km/s wide: Theta near
    # Theta0 (the edge criterion and dispersion allowed for: within 25 km/s)
    for p in pts:
        assert abs(p.theta_km_s - IAU.theta0_km_s) < 25.0, p
        assert p.r_kpc == pytest.approx(IAU.r0_kpc * math.sin(math.radians(p.glon_deg)),
                                        rel=1e-6)


# ----------------------------------------------------------------------------------------------
# the view
# ----------------------------------------------------------------------------------------------
@pytest.mark.parametrize("width,height", [(80, 24), (100, 30), (160, 48)])
def test_survey_view_renders_the_diagram_points_and_curve(width, height):
    state = survey_state()
    state.view = "survey"
    text = render(panels.screen(state, width, height), width, height)
    lines = text.splitlines()
    assert len(lines) == height and max(len(line) for line in lines) <= width
    assert "survey: 9 targets, 9 tangent points" in text
    assert "l–v diagram" in text and "terminal velocities (9)" in text
    assert "rotation curve" in text and "R kpc" in text
    for lon in (20, 60):                                         # table rows and the l axis
        assert f"{lon:.1f}" in text
    bottom = lines[-2]                                            # under the map
    assert "60" in bottom and "30" in bottom and bottom.index("60") < bottom.index("30")
    assert "█" in text and "*" in text                             # emission, terminal marks
    assert "[v]main" in text


def test_survey_view_at_80x24_in_ascii():
    state = survey_state()
    state.view = "survey"
    text = render(panels.screen(state, 80, 24, ascii=True), 80, 24)
    assert "#" in text and "█" not in text and "⠀" not in text
    assert all(ord(ch) < 0x2800 for ch in text)


def test_survey_view_says_when_the_reduction_is_not_available(monkeypatch):
    monkeypatch.setattr(survey, "_load_terminal_velocity", lambda: None)
    state = survey_state(terminal_velocity=None)
    state.view = "survey"
    text = render(panels.screen(state, 80, 24), 80, 24)
    assert state.survey.available is False
    side = " ".join(line.split("│")[-1].strip() for line in text.splitlines())
    assert survey.NOT_AVAILABLE in side
    assert "█" in text                                             # the l-v diagram still fills


def test_survey_view_before_any_average():
    state = ViewState()
    state.view = "survey"
    text = render(panels.screen(state, 80, 24), 80, 24)
    assert "no scan averages yet" in text and "survey: 0 targets" in text


def test_key_v_toggles_the_view():
    session = app.WatchSession(f"tcp://127.0.0.1:{free_loopback_port()}", "")
    assert app.KEY_VIEW == "v" and session.state.view == "main"
    for i, lon in enumerate(LONGITUDES):
        session.state.apply(schema.decode(average_frames(lon)), 1.0 + i)
    console = Console(record=True, width=100, height=30, file=io.StringIO(), color_system=None)
    session.handle_keys("v")
    assert session.state.view == "survey"
    assert "survey: 9 targets" in render(session.render(console), 100, 30)
    session.handle_keys("V")                                       # either case
    assert session.state.view == "main"
    assert "[v]survey" in render(session.render(console), 100, 30)
    assert session.render_errors == 0
