"""The simulator's speed figure for ``spinflip bench``: its shape only (speed is never asserted)."""

from spinflip.daemon.commands.bench_sim import simulator_speed


def test_simulator_speed_reports_positive_figures():
    r = simulator_speed(seconds=0.2)
    assert set(r) == {"simulated_s_per_wall_s", "block_samples", "sample_rate"}
    assert isinstance(r["simulated_s_per_wall_s"], float) and r["simulated_s_per_wall_s"] > 0
    assert isinstance(r["block_samples"], int) and r["block_samples"] > 0
    assert r["sample_rate"] > 0
