"""A clean simulated sky (``[sim] rfi = false``): nothing reported as interference.

One 120-s run of the ``run`` command's code path (a TOML file in tmp_path loaded by
``config.load``, ``Daemon(fast=True, duration_s=120)``; publishing disabled), shared by the
tests of this module, then ``spinflip inspect`` on its file. The integrations are 2 s long,
as in ``spinflip demo``: with 10 ref-phase blocks per integration (5 in one holding a
noise-source firing) the receiver's LO leakage at the reference LO (a steady tone near the
spectral-kurtosis threshold) used to be reported as a carrier appearing and going about every
20 s. Expected numbers come from the configuration alone:

- channels not covered by the fold: |switching.offset_hz| / source.sample_rate of the band
  (the reference LO is offset by that much, so that share of the signal band has no partner;
  the daemon rounds the offset to whole channels, hence the half-channel tolerance);
- channels flagged for interference: a clean sky has none; spectral kurtosis removes a
  channel from a block's sums with probability 2 ``rfi.sk_pfa`` (both sides), and a channel is
  only flagged in a row when something removed it in every block, so the share per row stays
  below 2 ``rfi.sk_pfa`` unless a carrier is reported falsely.
"""

import json

import numpy as np
import pytest
from astropy.io import fits
from cli_runner import run_cli, write_config

from spinflip.daemon import config
from spinflip.daemon.live import schema
from spinflip.daemon.run import observation

DURATION_S = 120.0
CONFIG = """
[sim]
start = "2026-03-01T04:00:00"
rfi = false
[spectrometer]
integration_s = 2.0
[publish]
data = ""
control = ""
[output]
dir = "{out}"
"""


@pytest.fixture(scope="module")
def clean(tmp_path_factory):
    d = tmp_path_factory.mktemp("clean120")
    path = write_config(d / "clean.toml", CONFIG.format(out=d / "out"))
    cfg = config.load(path)
    daemon = observation.Daemon(cfg, fast=True, duration_s=DURATION_S, log=lambda msg: None)
    result = daemon.run()
    (scan,) = result.files
    with fits.open(scan) as h:
        rows = h["SINGLE DISH"].data.copy()
        rfi_log = h["RFI LOG"].data.copy() if "RFI LOG" in h else None
    r = run_cli(["inspect", scan, "--json"])
    assert r.returncode == 0, r.stderr
    text = run_cli(["inspect", scan])
    assert text.returncode == 0, text.stderr
    return {"scan": scan, "cfg": cfg, "rows": rows, "log": rfi_log, "status": daemon.status(),
            "summary": json.loads(r.stdout), "text": text.stdout}


def test_no_carrier_logged_on_a_clean_sky(clean):
    rows = clean["rows"]
    assert len(rows) >= 50                                  # 120 s of 2-s integrations
    log = clean["log"]
    kinds = [] if log is None else [str(k).strip() for k in log["KIND"]]
    carriers = [(str(r["KIND"]).strip(), float(r["FREQ"]), str(r["TEXT"]).strip())
                for r in (log if log is not None else []) if str(r["KIND"]).startswith("carrier")]
    assert "carrier-on" not in kinds, carriers
    assert np.all(rows["NCARRIER"] == 0), rows["NCARRIER"]
    assert clean["status"]["rfi"]["carrier_onsets"] == 0
    assert clean["summary"]["carrier_onsets"] == 0


def _expected_uncovered(cfg) -> float:
    """Share of the band without a fold partner: |offset| / sample rate (configuration)."""
    return abs(cfg["switching"]["offset_hz"]) / cfg["source"]["sample_rate"]


def test_interference_and_coverage_are_reported_apart_in_the_file(clean):
    rows, cfg = clean["rows"], clean["cfg"]
    nchan = rows["DATA"].shape[1]
    bound = 2 * cfg["rfi"]["sk_pfa"]
    assert np.all(rows["RFIFRAC"] <= bound), rows["RFIFRAC"]
    assert np.all(np.abs(rows["UNCOVFR"] - _expected_uncovered(cfg)) <= 0.5 / nchan)
    # FLAGGED is unchanged: the uncovered band edge is still flagged, and it is most of it
    assert np.all(rows["FLAGFREQ"] >= rows["UNCOVFR"])
    # the rest is the DC channel flagged by name (rfi.flag_dc), N/2 in both phases: it spoils
    # folded channels N/2 and N/2 + shift, both covered here
    assert np.allclose(rows["FLAGFREQ"] - rows["UNCOVFR"] - rows["RFIFRAC"], 2 / nchan)
    with fits.open(clean["scan"]) as h:
        cols = h["SINGLE DISH"].columns
        assert cols["RFIFRAC"].format == "D" and cols["UNCOVFR"].format == "D"


def test_status_carries_both_fractions(clean):
    cfg = clean["cfg"]
    # as a subscriber gets it: through the wire format's own encoder and decoder
    rfi = schema.decode(schema.encode("status", dict(clean["status"]))).header["rfi"]
    rows = clean["rows"]
    assert rfi["flagged_rfi_fraction"] == pytest.approx(float(rows["RFIFRAC"][-1]))
    assert rfi["uncovered_fraction"] == pytest.approx(float(rows["UNCOVFR"][-1]))
    assert rfi["flagged_rfi_fraction"] <= 2 * cfg["rfi"]["sk_pfa"]
    nchan = rows["DATA"].shape[1]
    assert abs(rfi["uncovered_fraction"] - _expected_uncovered(cfg)) <= 0.5 / nchan
    # the uncovered channels' sky frequencies: the reference LO is below the signal LO, so the
    # top of the signal band (from sig LO + fs/2 - |offset| up to the band's last channel)
    lo_hz, fs = cfg["source"]["center_freq"], cfg["source"]["sample_rate"]
    first, last = rfi["uncovered_hz"]
    ch = fs / nchan
    assert abs(first - (lo_hz + fs / 2 - abs(cfg["switching"]["offset_hz"]))) <= ch
    assert abs(last - (lo_hz + fs / 2 - ch)) <= 0.5 * ch


def test_inspect_reports_interference_and_coverage_apart(clean):
    s, cfg = clean["summary"], clean["cfg"]
    assert s["interference_flagged_fraction"] <= 2 * cfg["rfi"]["sk_pfa"]
    assert abs(s["uncovered_fraction"] - _expected_uncovered(cfg)) <= 0.5 / 1024
    assert s["flagged_fraction"] > 0.3                       # FLAGGED as it was
    text = clean["text"]
    assert f"{100 * s['uncovered_fraction']:.1f} % not covered by the fold" in text
    assert f"{100 * s['interference_flagged_fraction']:.2f} % of channels flagged for " \
           "interference" in text


def test_fold_geometry_of_coverage_and_spoiling():
    # F[k] = (D_sig[k] - D_ref[k - shift]) / 2 exists where 0 <= k - shift < N
    from spinflip.daemon.calibration.kelvin import fold_covered, fold_spoiled
    n, shift = 64, -10
    covered = fold_covered(n, shift)
    assert covered.sum() == n - abs(shift) and not covered[n - abs(shift):].any()
    bad = np.zeros(n, bool)
    bad[20] = True                     # spoils F[20] (signal copy) and F[10] (reference copy)
    assert np.flatnonzero(fold_spoiled(bad, shift, True)).tolist() == [10, 20]
    bad[:] = False
    bad[60] = True                     # F[60] is not covered; only F[50] uses channel 60
    assert np.flatnonzero(fold_spoiled(bad, shift, True)).tolist() == [50]
    assert np.flatnonzero(fold_spoiled(bad, shift, False)).tolist() == [60]


def test_status_before_the_first_integration_says_not_known(tmp_path):
    path = write_config(tmp_path / "c.toml", CONFIG.format(out=tmp_path / "out"))
    daemon = observation.Daemon(config.load(path), fast=True, duration_s=1.0, log=lambda m: None)
    rfi = schema.decode(schema.encode("status", dict(daemon.status()))).header["rfi"]
    assert rfi["flagged_rfi_fraction"] is None and rfi["uncovered_fraction"] is None
    assert rfi["uncovered_hz"] is None and rfi["carrier_onsets"] == 0
