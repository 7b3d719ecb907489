"""Observing plan files (issue 14, item 1): targets and surveys read into typed values; every
bad key, type or value refused with one line naming it. The survey expansions are plain
arithmetic (ranges with both ends included when a step reaches them: common practice)."""

import pytest

from spinflip.daemon.run.plan_file import MAX_TARGETS, PlanError, load_plan, plan_from_dict

GOOD = """
name = "plane-north"
start = "2026-10-15T18:00:00"
end = 2026-10-15T23:00:00Z
[[target]]
frame = "galactic"
lon = 30.0
lat = 0.0
object = "G030+00"
seconds = 600
[[target]]
frame = "radec"
lon = 83.63
lat = 22.01
seconds = 120
repeat = 2
cal_interval_s = 60
[[survey]]
kind = "galactic-plane"
lon_from = 10.0
lon_to = 90.0
lon_step = 10.0
lat = 0.0
seconds = 300
[[survey]]
kind = "grid"
lon_from = -10
lon_to = 10
lon_step = 10
lat_from = -5
lat_to = 5
lat_step = 5
seconds = 60
[[survey]]
kind = "drift"
az = 180.0
el = 60.0
seconds = 3600
"""


def test_a_plan_with_targets_and_every_survey_kind(tmp_path):
    f = tmp_path / "night.toml"
    f.write_text(GOOD)
    plan = load_plan(f)
    assert plan.name == "plane-north" and plan.order == "scheduler"
    assert plan.start == "2026-10-15T18:00:00" and plan.end == "2026-10-15T23:00:00"
    first, second = plan.targets[:2]
    assert (first.object, first.frame, first.lon_deg, first.lat_deg, first.seconds) == \
        ("G030+00", "galactic", 30.0, 0.0, 600.0)
    assert second.object == "RA083.63DEC+22.01" and second.repeat == 2
    assert second.cal_interval_s == 60.0 and first.cal_interval_s is None
    plane = [t for t in plan.targets if t.source == "survey[1]"]
    assert [t.lon_deg for t in plane] == [10.0, 20.0, 30.0, 40.0, 50.0, 60.0, 70.0, 80.0, 90.0]
    assert plane[0].object == "G010.0+00.0" and all(t.seconds == 300.0 for t in plane)
    grid = [t for t in plan.targets if t.source == "survey[2]"]
    assert len(grid) == 9                             # 3 longitudes x 3 latitudes
    assert sorted({t.lon_deg for t in grid}) == [0.0, 10.0, 350.0]   # l wrapped into 0..360
    assert sorted({t.lat_deg for t in grid}) == [-5.0, 0.0, 5.0]
    (drift,) = [t for t in plan.targets if t.source == "survey[3]"]
    assert drift.drift and drift.frame == "azel" and (drift.lon_deg, drift.lat_deg) == (180, 60)
    assert len(plan.targets) == 2 + 9 + 9 + 1


def test_a_step_that_misses_the_end_stops_before_it():
    plan = plan_from_dict({"name": "x", "survey": [{"kind": "galactic-plane", "lon_from": 10,
                                                    "lon_to": 35, "lon_step": 10, "lat": 0,
                                                    "seconds": 10}]})
    assert [t.lon_deg for t in plan.targets] == [10.0, 20.0, 30.0]


BAD = [
    ("", "name is missing"),
    ('name = "x"\n', "nothing to observe"),
    ('name = "x"\ncolour = 1\n[[target]]\nframe="azel"\nlon=1\nlat=45\nseconds=5\n',
     "unknown key 'colour'"),
    ('name = "café"\n[[target]]\nframe="azel"\nlon=1\nlat=45\nseconds=5\n', "name = 'café'"),
    ('name = "x"\n[[target]]\nframe="ecliptic"\nlon=1\nlat=2\nseconds=5\n',
     "target[1].frame = 'ecliptic': expected one of 'galactic', 'radec', 'azel'"),
    ('name = "x"\n[[target]]\nframe="galactic"\nlat=2\nseconds=5\n', "target[1]: lon is missing"),
    ('name = "x"\n[[target]]\nframe="galactic"\nlon=1\nlat=95\nseconds=5\n',
     "target[1].lat = 95: expected a number from -90 to 90"),
    ('name = "x"\n[[target]]\nframe="azel"\nlon=1\nlat=-5\nseconds=5\n',
     "target[1].lat = -5: expected a number from 0 to 90"),
    ('name = "x"\n[[target]]\nframe="galactic"\nlon=1\nlat=2\nseconds=0\n',
     "target[1].seconds = 0"),
    ('name = "x"\n[[target]]\nframe="galactic"\nlon=1\nlat=2\nseconds=5\nrepeat=1.5\n',
     "target[1].repeat = 1.5: expected an integer from 1 to 100"),
    ('name = "x"\n[[target]]\nframe="galactic"\nlon="thirty"\nlat=2\nseconds=5\n',
     "target[1].lon = 'thirty'"),
    ('name = "x"\n[[survey]]\nkind="spiral"\nseconds=5\n', "survey[1].kind = 'spiral'"),
    ('name = "x"\n[[survey]]\nkind="drift"\naz=1\nel=40\nlat=2\nseconds=5\n',
     "survey[1]: unknown key 'lat' with kind = 'drift'"),
    ('name = "x"\n[[survey]]\nkind="galactic-plane"\nlon_from=90\nlon_to=10\nlon_step=10\n'
     'lat=0\nseconds=5\n', "survey[1].lon_to = 10: must not be below lon_from = 90"),
    ('name = "x"\n[[survey]]\nkind="grid"\nlon_from=0\nlon_to=360\nlon_step=0.01\n'
     'lat_from=0\nlat_to=0\nlat_step=1\nseconds=5\n', f"more than {MAX_TARGETS}"),
    ('name = "x"\nstart = "tonight"\n[[target]]\nframe="azel"\nlon=1\nlat=45\nseconds=5\n',
     "start = 'tonight': expected a UTC time"),
    ('name = "x"\nstart = "2026-10-15T23:00:00"\nend = "2026-10-15T18:00:00"\n[[target]]\n'
     'frame="azel"\nlon=1\nlat=45\nseconds=5\n', "end = '2026-10-15T18:00:00' is not after"),
    ('name = "x"\ntarget = 3\n', "target must be an array of tables"),
    ('name = "x"\n[[target]]\nframe = ' + "[" * 3000 + "]" * 3000 + "\n",
     "nested too deeply"),
    ('name = "x"\n[[target]\n', "not valid TOML"),
]


@pytest.mark.parametrize("text, fragment", BAD)
def test_a_bad_plan_is_one_line_naming_what_is_wrong(tmp_path, text, fragment):
    f = tmp_path / "bad.toml"
    f.write_text(text)
    with pytest.raises(PlanError) as err:
        load_plan(f)
    msg = str(err.value)
    assert fragment in msg and "\n" not in msg and len(msg) < 300, msg
    assert str(f) in msg


def test_a_missing_plan_file_is_one_line(tmp_path):
    with pytest.raises(PlanError, match="not found"):
        load_plan(tmp_path / "nope.toml")
