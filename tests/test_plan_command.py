"""``spinflip plan FILE [--config] [--start] [--json]`` (issue 14, item 3), in-process: the
schedule as a table, a chart and JSON; bad input one line and exit 2. Positions are checked
against astropy in test_scheduler.py; here the command's contract."""

import json

import pytest

from spinflip import cli

PLAN = """name = "plane-north"
[[survey]]
kind = "galactic-plane"
lon_from = 10.0
lon_to = 90.0
lon_step = 40.0
lat = 0.0
seconds = 300
[[target]]
frame = "radec"
lon = 30
lat = -80
seconds = 60
object = "DEEPSOUTH"
"""

CONFIG = """[pointing]
min_elevation = 12.0
horizon = [[0, 5], [180, 5]]
slew_deg_s = 1.0
settle_s = 10.0
"""

KEYS = {"object", "start_utc", "end_utc", "az_deg", "el_deg", "seconds", "status", "reason"}


@pytest.fixture
def files(tmp_path):
    plan, cfg = tmp_path / "night.toml", tmp_path / "station.toml"
    plan.write_text(PLAN)
    cfg.write_text(CONFIG)
    return plan, cfg


def test_json_lists_every_visit_with_the_contract_keys(files, capsys):
    plan, cfg = files
    assert cli.main(["plan", str(plan), "--config", str(cfg), "--start",
                     "2026-10-15T18:00:00", "--json"]) == 0
    entries = json.loads(capsys.readouterr().out)
    assert len(entries) == 4 and all(KEYS <= set(e) for e in entries)
    by = {e["object"]: e for e in entries}
    assert by["DEEPSOUTH"]["status"] == "skipped"
    assert "below the elevation limit of 12 deg" in by["DEEPSOUTH"]["reason"]
    done = [e for e in entries if e["status"] == "scheduled"]
    assert len(done) == 3 and all(e["el_deg"] >= 12.0 and e["reason"] == "" for e in done)
    assert done[0]["start_utc"] == "2026-10-15T18:00:00Z"
    # the configured slew speed and settle time are in the schedule
    assert all(e["slew_s"] >= 10.0 for e in done[1:])


def test_table_and_chart(files, capsys):
    plan, cfg = files
    assert cli.main(["plan", str(plan), "--config", str(cfg), "--start",
                     "2026-10-15T18:00:00"]) == 0
    out = capsys.readouterr().out
    assert "plan plane-north: 3 of 4 visits scheduled" in out
    for name in ("G010.0+00.0", "G050.0+00.0", "G090.0+00.0", "DEEPSOUTH", "scheduled",
                 "skipped DEEPSOUTH: below the elevation limit"):
        assert name in out
    assert "h after 18:00 UTC" in out and "el °" in out          # the chart's axes


@pytest.mark.parametrize("args, fragment", [
    (["--start", "yesterday"], "sim.start"),
    (["--config", "NOCONFIG"], "not found"),
])
def test_bad_options_are_one_line_exit_2(files, capsys, args, fragment):
    plan, _ = files
    args = [a.replace("NOCONFIG", str(plan.parent / "none.toml")) for a in args]
    assert cli.main(["plan", str(plan), *args]) == 2
    err = capsys.readouterr().err
    assert fragment in err and err.count("\n") == 1


def test_a_bad_plan_is_one_line_exit_2_naming_the_key(files, capsys):
    plan, _ = files
    plan.write_text(PLAN.replace("lon_step = 40.0", "lon_step = -4"))
    assert cli.main(["plan", str(plan), "--start", "2026-10-15T18:00:00"]) == 2
    err = capsys.readouterr().err
    assert "survey[1].lon_step = -4" in err and err.count("\n") == 1


def test_a_bad_horizon_in_the_config_names_the_key(files, capsys):
    plan, cfg = files
    cfg.write_text("[pointing]\nhorizon = [[0, 5], [400, 5]]\n")
    assert cli.main(["plan", str(plan), "--config", str(cfg)]) == 2
    assert "pointing.horizon" in capsys.readouterr().err
