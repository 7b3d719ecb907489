"""Shape of ``spinflip bench``'s new JSON keys (speed is never asserted)."""

import numpy as np

from spinflip.daemon.commands.bench import BLOCK_SAMPLES, _noise_u8, run_bench
from spinflip.daemon.commands.bench_stages import CORE_STAGES, PROFILE_STAGES, run_scaling


def test_bench_reports_fraction_of_bare_fft_stage_profile_and_core_share():
    r = run_bench(seconds=0.05)
    assert r["simulator"]["simulated_s_per_wall_s"] > 0 and r["simulator"]["sample_rate"] == 2.4e6
    assert set(r["fraction_of_bare_fft"]) == {"pfb", "fft"}
    for k in ("pfb", "fft"):
        frac = r["fraction_of_bare_fft"][k]
        assert frac > 0 and np.isclose(frac, r["throughput_msps"][k]
                                       / r["throughput_msps"]["bare_fft"])
        prof = r["stage_ns_per_sample"][k]
        assert list(prof) == [*PROFILE_STAGES, "total"]
        assert all(v >= 0 for v in prof.values())
        assert np.isclose(prof["total"], sum(prof[s] for s in PROFILE_STAGES))
    share = r["core_share"]
    assert list(share) == [*CORE_STAGES, "total"]
    assert share["channelizer"] > 0 and share["conversion"] > 0
    assert np.isclose(share["total"], sum(share[s] for s in CORE_STAGES))
    assert r["core_share_config"]["nchan"] == 1024


def test_scaling_reports_every_channel_count_and_a_growth_fit():
    raw = _noise_u8(4 * 512 * 4, 1)
    r = run_scaling(raw, BLOCK_SAMPLES, channels=(256, 512), repeats=1)
    assert r["channels"] == [256, 512]
    for k in ("pfb", "fft"):
        assert len(r["msps"][k]) == len(r["peak_mb"][k]) == 2
        assert all(v > 0 for v in r["msps"][k]) and all(v > 0 for v in r["peak_mb"][k])
        assert np.isfinite(r["ns_per_sample_per_log2n"][k])
        assert np.isfinite(r["throughput_exponent"][k])
