"""A replayed capture made here: noise plus a known carrier plus known bursts.

``spinflip run --source replay:FILE --fast`` (a capture is total power: DATA in counts) must
flag the carrier's channels and blank the bursts, leaving the rest of the spectrum at the
level of a noise-only capture of the same length (within 3 %), with at most 2 % of the other
channels flagged.
"""

import json

import numpy as np
import pytest
from astropy.io import fits
from cli_runner import NO_PORTS, run_cli, write_config

from spinflip.daemon.dsp.samples import complex_to_u8

FS = 2.4e6
SECONDS = 6.0
NCHAN = 1024
CARRIER_HZ = 312.5e3            # baseband offset of the carrier
BURST_EVERY_S, BURST_S, BURST_AMP = 0.1, 1e-3, 0.5


def _capture(path, seed, carrier=False, bursts=False):
    rng = np.random.default_rng(seed)
    n = int(SECONDS * FS)
    out = bytearray()
    chunk = 1 << 20
    for start in range(0, n, chunk):
        m = min(chunk, n - start)
        x = 0.15 * (rng.standard_normal(m) + 1j * rng.standard_normal(m))
        t = (start + np.arange(m)) / FS
        if carrier:
            x += 0.05 * np.exp(2j * np.pi * CARRIER_HZ * t)
        if bursts:
            on = (t % BURST_EVERY_S) < BURST_S
            x[on] += BURST_AMP * (rng.standard_normal(on.sum()) + 1j * rng.standard_normal(on.sum()))
        out += complex_to_u8(x.astype(np.complex64)).tobytes()
    path.write_bytes(bytes(out))
    return path


def _replay(tmp_path, name, capture, rfi=True, inspect=False):
    cfg = write_config(tmp_path / f"{name}.toml", f"""[spectrometer]
integration_s = 2.0
[rfi]
impulses = {'true' if rfi else 'false'}
sk = {'true' if rfi else 'false'}
carriers = {'true' if rfi else 'false'}
""" + NO_PORTS)
    r = run_cli(["run", "--config", cfg, "--source", f"replay:{capture}", "--fast",
                 "--out", tmp_path / name])
    assert r.returncode == 0, r.stderr
    (path,) = list((tmp_path / name).glob("*.fits"))
    with fits.open(path) as h:
        out = h["SINGLE DISH"].data.copy(), dict(h["SINGLE DISH"].header)
    if inspect:
        r = run_cli(["inspect", path, "--json"])
        assert r.returncode == 0, r.stderr
        return out + (json.loads(r.stdout),)
    return out


@pytest.fixture(scope="module")
def runs(tmp_path_factory):
    d = tmp_path_factory.mktemp("replay")
    dirty = _capture(d / "dirty.cu8", seed=1, carrier=True, bursts=True)
    clean = _capture(d / "clean.cu8", seed=2)
    rows, head, summary = _replay(d, "dirty", dirty, inspect=True)
    return {"dirty": (rows, head), "summary": summary, "clean": _replay(d, "clean", clean),
            "unflagged": _replay(d, "raw", dirty, rfi=False)}


def test_carrier_flagged_and_little_else(runs):
    rows, head = runs["dirty"]
    assert head["BUNIT"] == "count" and len(rows) >= 2
    c = NCHAN // 2 + int(round(CARRIER_HZ / (FS / NCHAN)))
    assert np.all(rows["FLAGGED"][:, c])
    others = np.ones(NCHAN, dtype=bool)
    others[c - 3:c + 4] = False
    others[NCHAN // 2] = False                       # DC, flagged by name
    assert rows["FLAGGED"][:, others].mean() <= 0.02


def test_bursts_blanked_and_spectrum_back_at_the_noise_level(runs):
    rows, _ = runs["dirty"]
    clean, _ = runs["clean"]
    raw, _ = runs["unflagged"]
    # every burst found: one per 0.1 s of the 6 s capture
    assert rows["NIMPULSE"].sum() >= 0.99 * SECONDS / BURST_EVERY_S
    good = ~rows["FLAGGED"].any(axis=0) & ~clean["FLAGGED"].any(axis=0)
    k = np.arange(NCHAN)
    good &= (k > 0.1 * NCHAN) & (k < 0.9 * NCHAN)
    ratio = rows["DATA"][:, good].mean() / clean["DATA"][:, good].mean()
    assert abs(ratio - 1) < 0.03, ratio
    # without flagging the bursts raise the level well beyond that (1 % duty, ~11 x power)
    raw_ratio = raw["DATA"][:, good].mean() / clean["DATA"][:, good].mean()
    assert raw_ratio - 1 > 0.05, raw_ratio
    assert np.all(rows["FLAGTIME"] > 0.005) and np.all(clean["FLAGTIME"] == 0)


def test_inspect_reports_the_interference(runs):
    s = runs["summary"]
    assert s["impulses"] >= 0.99 * SECONDS / BURST_EVERY_S
    assert 0.005 < s["blanked_time_fraction"] < 0.1 and s["carrier_onsets"] >= 1
