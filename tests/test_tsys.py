"""System temperature from noise-source on/off spectra, and the schedule that fires the source."""

import numpy as np
import pytest

from spinflip.daemon import config
from spinflip.daemon.calibration.noise_source import CalControl
from spinflip.daemon.calibration.tsys_meter import (
    TsysMeter,
    line_free_channels,
    tsys_from_on_off,
    usable_channels,
)
from spinflip.daemon.dsp.block import REF, SIG, Block
from spinflip.daemon.dsp.switching import Schedule

NCHAN = 512


def _bandpass():
    k = np.arange(NCHAN)
    return 1e-3 * (1 + 0.3 * np.cos(k / 30.0)) / (1 + ((k - NCHAN / 2) / (0.45 * NCHAN)) ** 16)


def test_on_off_formula_noiseless():
    # Tsys = Tcal Poff / (Pon - Poff) with G(f) cancelling (Wilson, Rohlfs & Huttemeister,
    # noise-injection calibration); here Tsys = 80 K, Tcal = 20 K, any band-pass
    g = _bandpass()
    t, chan, used, ratio = tsys_from_on_off(g * 100.0, g * 80.0, 20.0)
    assert t == pytest.approx(80.0, rel=1e-12)
    assert ratio == pytest.approx(100.0 / 80.0)
    np.testing.assert_allclose(chan[usable_channels(NCHAN)], 80.0, rtol=1e-12)


def test_line_channels_do_not_enter_the_band_average():
    # T_sys(f) = T_sys + T_line(f): the line only adds, the one-sided clip finds the level
    rng = np.random.default_rng(1)
    k = np.arange(NCHAN)
    line = 40.0 * np.exp(-0.5 * ((k - 300) / 25.0) ** 2)
    g = _bandpass()
    noise = lambda: 1 + 0.01 * rng.standard_normal(NCHAN)
    p_off = g * (80.0 + line) * noise()
    p_on = g * (80.0 + line + 20.0) * noise()
    t, _, used, _ = tsys_from_on_off(p_on, p_off, 20.0)
    # what stays is the wings below the clip level (3 sigma of the smoothed values, ~5 K here)
    assert abs(t / 80.0 - 1) < 0.015
    assert not used[260:340].any()
    # without the clip (all usable channels) the line would bias it by several per cent
    u = usable_channels(NCHAN)
    naive = 20.0 * p_off[u].sum() / (p_on[u] - p_off[u]).sum()
    assert naive / 80.0 - 1 > 0.03


def test_line_free_channels_keeps_noise_only_channels():
    rng = np.random.default_rng(2)
    x = 100 + rng.standard_normal(NCHAN)
    keep = line_free_channels(x, usable_channels(NCHAN))
    assert keep.sum() > 0.95 * usable_channels(NCHAN).sum()


def _blocks(sch, n, lo=1.42e9):
    """Blocks following the schedule (no samples: the meter only needs their context)."""
    for i in range(n):
        yield Block(raw=np.zeros(2 * 1024, np.uint8), lo_hz=lo, sample_rate=2.4e6,
                    t0_unix_s=1e9 + i * 0.1, phase=sch.phase_of_block(i), cal_on=sch.cal_on(i),
                    index=i)


def _schedule(**cal):
    cfg = config.load(None)
    cfg["calibration"].update(cal)
    return Schedule.from_config(cfg)


def test_schedule_fires_whole_cycles_with_off_cycles_around():
    sch = _schedule(cal_interval_s=10.0, cal_on_s=1.0)
    bpc = sch.blocks_per_cycle
    cycle_s = bpc * 262144 / 2.4e6
    assert sch.cal_on_cycles == int(np.ceil(1.0 / cycle_s))
    assert sch.cal_period_cycles == round(10.0 / cycle_s)
    on = np.array([sch.cal_on(i) for i in range(3 * sch.cal_period_cycles * bpc)])
    per_cycle = on.reshape(-1, bpc)
    assert np.all(per_cycle.all(axis=1) | ~per_cycle.any(axis=1))   # whole cycles only
    cyc = per_cycle[:, 0]
    assert not cyc[0] and cyc[1] and not cyc[1 + sch.cal_on_cycles]
    assert cyc.sum() == 3 * sch.cal_on_cycles
    assert _schedule(**{"tsys_from": "fixed"}).cal_period_cycles == 0


def test_meter_cancels_a_linear_gain_drift():
    # the firing is bracketed by off cycles before and after; their mean cancels a gain that
    # drifts linearly (a 5 % ramp across the firing would otherwise bias Tsys by ~10 %)
    sch = _schedule(cal_interval_s=10.0, cal_on_s=1.0)
    meter = TsysMeter(sch.blocks_per_cycle, NCHAN, tcal_k=20.0)
    g0 = _bandpass()
    out = []
    for b in _blocks(sch, 8 * sch.blocks_per_cycle):
        gain = 1 + 0.05 * b.index / sch.blocks_per_cycle
        t = 80.0 + (20.0 if b.cal_on else 0.0)
        res = meter.add(b, 1000 * g0 * gain * t, 1000)
        if res is not None:
            out.append(res)
    assert len(out) == 1 and out[0].ok
    assert out[0].tsys_k == pytest.approx(80.0, rel=2e-3)
    assert set(out[0].tsys_phase_k) == {SIG, REF}


def test_meter_refuses_a_source_that_did_not_fire():
    sch = _schedule(cal_interval_s=10.0, cal_on_s=1.0)
    meter = TsysMeter(sch.blocks_per_cycle, NCHAN, tcal_k=20.0)
    res = [meter.add(b, 1000 * _bandpass() * 80.0, 1000) for b in _blocks(sch, 6 * sch.blocks_per_cycle)]
    res = [r for r in res if r is not None]
    assert len(res) == 1 and not res[0].ok and "did not raise the power" in res[0].message


def test_meter_reports_an_unknown_state_once_and_recovers():
    sch = _schedule(cal_interval_s=10.0, cal_on_s=1.0)
    meter = TsysMeter(sch.blocks_per_cycle, NCHAN, tcal_k=20.0)
    res = []
    for b in _blocks(sch, 6 * sch.blocks_per_cycle):
        if b.cal_on:
            b.cal_on = None                     # the switch failed during the firing
        r = meter.add(b, 1000 * _bandpass() * 80.0, 1000)
        if r is not None:
            res.append(r)
    assert len(res) == 1 and not res[0].ok and "unknown" in res[0].message


class _FlakySwitch:
    can_switch = True

    def __init__(self):
        self.calls = []

    def set(self, on):
        self.calls.append(on)
        if on:
            raise RuntimeError("relay jammed")


def test_cal_control_marks_failed_switching_unknown_and_retries():
    events = []
    cc = CalControl(_FlakySwitch(), event=lambda sev, text: events.append((sev, text)))
    assert cc.state_for(False) is False
    assert cc.state_for(True) is None and cc.state_for(True) is None   # one attempt per change
    assert len(events) == 1 and events[0][0] == "error" and "relay jammed" in events[0][1]
    assert cc.state_for(False) is False
    assert cc.switch.calls == [False, True, False]
