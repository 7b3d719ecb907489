"""``spinflip soak --source replay:FILE`` (issue 16, item 4): a capture paced in real time and
looped, so the soak measures the daemon's own cost. The soak itself runs in CI's ``.ci/run``
(60 s); here the parts it is made of and its refusals."""

from __future__ import annotations

from pathlib import Path

import numpy as np
from cli_runner import run_cli_inprocess

from spinflip.daemon import config as config_mod
from spinflip.daemon.commands import soak
from spinflip.daemon.sources.replay import ReplaySource


def _capture(path: Path, samples: int) -> Path:
    rng = np.random.default_rng(3)
    path.write_bytes(rng.integers(0, 256, 2 * samples, dtype=np.uint8).tobytes())
    return path


def test_a_looped_replay_starts_again_with_time_running_on(tmp_path):
    cap = _capture(tmp_path / "c.cu8", 3 * 16384)
    cfg = config_mod.defaults()
    config_mod.merge(cfg, {"source": {"kind": "replay", "path": str(cap), "block_samples": 16384,
                                      "replay_loop": True},
                           "sim": {"start": "2026-03-01T00:00:00"}})
    src = ReplaySource(cfg, fast=True)
    src.open()
    blocks = [src.read() for _ in range(7)]           # more than the file holds
    src.close()
    assert all(b is not None for b in blocks)
    t0 = [b.t0_unix_s for b in blocks]
    assert np.all(np.diff(t0) > 0)
    assert np.array_equal(blocks[0].raw, blocks[3].raw)           # the file again
    cfg["source"]["replay_loop"] = False
    src = ReplaySource(cfg, fast=True)
    src.open()
    got = [src.read() for _ in range(4)]
    src.close()
    assert got[3] is None                                          # not looped: it ends


def test_the_soak_replay_configuration_is_valid(tmp_path):
    text = soak._REPLAY_CONFIG.format(path=str(tmp_path / 'a "b".cu8').replace('"', '\\"'),
                                      sample_rate=3.2e6, channels=4096, integration_s=5.0,
                                      data=1, control=2)
    (tmp_path / "s.toml").write_text(text.replace("tcp://127.0.0.1:1", "").replace(
        "tcp://127.0.0.1:2", ""))
    cfg = config_mod.load(tmp_path / "s.toml")
    assert cfg["source"]["kind"] == "replay" and cfg["source"]["replay_loop"] is True
    assert cfg["source"]["path"].endswith('a "b".cu8')
    assert cfg["spectrometer"]["channels"] == 4096 and cfg["source"]["sample_rate"] == 3.2e6
    assert cfg["calibration"]["tsys_from"] == "fixed"


def test_soak_refuses_bad_options_in_one_line(tmp_path):
    for args, words in ((["--source", "sim"], "soak takes replay:FILE"),
                        (["--source", f"replay:{tmp_path / 'none.cu8'}"], "no such file"),
                        (["--source", f"replay:{_capture(tmp_path / 'c.cu8', 65536)}",
                          "--channels", "1000"], "power of two")):
        res = run_cli_inprocess(["soak", "--seconds", "1", *args])
        assert res.returncode == 2, res.stderr
        assert len(res.stderr.strip().splitlines()) == 1 and words in res.stderr
