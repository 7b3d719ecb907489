"""``spinflip reduce`` on a simulated survey night (issue 15): a plan l = 10..80 step 5 observed
by the simulator with ``--fast`` (the simulator's dish follows each target), reduced with one
command to the stacks, the l-v diagram, the rotation curve and the face-on map.

The check of the science: the rotation curve recovered by the tangent-point method against the
simulator's own curve (:meth:`spinflip.daemon.sources.galaxy.ModelGalaxy.rotation_speed_kms`,
the truth it was given; IAU 1985 constants, MNRAS 221, 1023, 1986, as the reduction's).
"""

from __future__ import annotations

import csv
import json
from pathlib import Path

import numpy as np
import pytest
from astropy.io import fits
from cli_runner import run_cli_inprocess

from spinflip.daemon.sources.galaxy import ModelGalaxy

pytestmark = pytest.mark.live

START = "2026-03-01T08:00:00"      # l = 10..80 all above 20 deg at the site (spinflip plan)
PLAN = f"""name = "plane-survey"
start = "{START}"
[[survey]]
kind = "galactic-plane"
lon_from = 10.0
lon_to = 80.0
lon_step = 5.0
lat = 0.0
seconds = 10
"""
STATION = f"""[sim]
start = "{START}"
[spectrometer]
integration_s = 5.0
[pointing]
settle_s = 0.0
[publish]
data = ""
control = ""
"""
ROTATION_COLUMNS = ["glon_deg", "r_kpc", "v_terminal_km_s", "theta_km_s", "theta_err_km_s"]


@pytest.fixture(scope="module")
def night(tmp_path_factory) -> Path:
    tmp = tmp_path_factory.mktemp("survey")
    (tmp / "survey.toml").write_text(PLAN)
    (tmp / "station.toml").write_text(STATION)
    out = tmp / "scans"
    res = run_cli_inprocess(["run", "--config", tmp / "station.toml", "--plan",
                             tmp / "survey.toml", "--fast", "--out", out])
    assert res.returncode == 0, res.stderr[-2000:]
    assert len(list(out.glob("scan-*.fits"))) == 15
    return out


@pytest.fixture(scope="module")
def reduced(night, tmp_path_factory) -> dict:
    out = tmp_path_factory.mktemp("reduced")
    res = run_cli_inprocess(["reduce", night, "--out", out, "--json", "--jobs", "2"])
    assert res.returncode == 0, res.stderr[-2000:]
    return {"out": out, "summary": json.loads(res.stdout), "stderr": res.stderr}


def rotation_curve(out: Path) -> list[dict]:
    with open(out / "rotation-curve.csv", newline="") as fh:
        return list(csv.DictReader(fh))


def test_one_command_writes_every_product(reduced):
    out = reduced["out"]
    for name in ("reduction.fits", "targets.csv", "rotation-curve.csv", "faceon.csv",
                 "lv-diagram.png", "rotation-curve.png", "faceon.png"):
        f = out / name
        assert f.is_file() and f.stat().st_size > 0, name
    for name in ("lv-diagram.png", "rotation-curve.png", "faceon.png"):
        assert (out / name).read_bytes()[:8] == b"\x89PNG\r\n\x1a\n"   # PNG signature (RFC 2083)
    s = reduced["summary"]
    assert s["targets"] == 15 and s["scans_used"] == 15 and not s["left_out"]


def test_rotation_curve_matches_the_simulators_curve(reduced):
    """Within 8 km/s of the model galaxy's own Theta(R) for 3 < R < 8 kpc (the issue's bar)."""
    rows = rotation_curve(reduced["out"])
    assert rows and list(rows[0])[:5] == ROTATION_COLUMNS
    r = np.array([float(x["r_kpc"]) for x in rows])
    theta = np.array([float(x["theta_km_s"]) for x in rows])
    truth = ModelGalaxy().rotation_speed_kms(r)
    inner = (r > 3.0) & (r < 8.0)
    assert inner.sum() >= 8
    err = np.abs(theta[inner] - truth[inner])
    assert err.max() < 8.0, list(zip(r[inner], theta[inner], truth[inner], strict=True))
    # R = R0 sin l (IAU 1985 R0 = 8.5 kpc)
    l = np.array([float(x["glon_deg"]) for x in rows])
    assert np.allclose(r, 8.5 * np.abs(np.sin(np.radians(l))), atol=1e-6)


def test_the_fits_file_holds_the_stacks_and_tables_with_units(reduced):
    with fits.open(reduced["out"] / "reduction.fits") as hdul:
        assert hdul[0].header["GALCONST"] == "iau1985" and hdul[0].header["R0"] == 8.5
        targets = hdul["TARGETS"]
        assert len(targets.data) == 15
        units = {targets.columns[n].name: targets.columns[n].unit
                 for n in range(len(targets.columns))}
        assert units["W"] == "K km/s" and units["NHI"] == "cm-2" and units["GLON"] == "deg"
        prof = hdul["PROFILE 1"]
        assert prof.columns["VRAD"].unit == "km/s" and prof.columns["TB"].unit == "K"
        assert hdul["ROTATION"].columns["R"].unit == "kpc"
        assert hdul["FACEON"].header["CUNIT1"] == "kpc"
        # the line along the inner plane is bright: tens of K, N(HI) ~ 1e21-1e22 cm-2
        assert np.nanmax(prof.data["TB"]) > 10.0
        nhi = targets.data["NHI"]
        assert np.all((nhi > 1e20) & (nhi < 1e23))


def test_a_folder_without_scans_is_one_line_and_exit_2(tmp_path):
    (tmp_path / "notes.txt").write_text("nothing here")
    res = run_cli_inprocess(["reduce", tmp_path, "--out", tmp_path / "r"])
    assert res.returncode == 2
    assert len(res.stderr.strip().splitlines()) == 1 and "no spinflip scan" in res.stderr
    res = run_cli_inprocess(["reduce", tmp_path / "missing"])
    assert res.returncode == 2 and "no such folder" in res.stderr
    res = run_cli_inprocess(["reduce", tmp_path, "--constants", "nonsense"])
    assert res.returncode == 2 and "iau1985" in res.stderr


def test_unreadable_files_are_left_out_with_a_warning(night, tmp_path):
    folder = tmp_path / "mixed"
    folder.mkdir()
    for f in sorted(night.glob("scan-*.fits"))[:3]:
        (folder / f.name).write_bytes(f.read_bytes())
    (folder / "scan-broken.fits").write_bytes(b"SIMPLE  =  this is not FITS")
    res = run_cli_inprocess(["reduce", folder, "--out", tmp_path / "r", "--jobs", "1"])
    assert res.returncode == 0, res.stderr
    warnings = [ln for ln in res.stderr.splitlines() if ln.startswith("warning:")]
    assert len(warnings) == 1 and "scan-broken.fits" in warnings[0]
    assert "Traceback" not in res.stderr
