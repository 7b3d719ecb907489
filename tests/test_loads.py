"""Hot/cold-load (Y-factor) calibration: formulas, the JSON record, the guided procedure.

Outside references used below:
- the Y-factor (hot/cold) method, Trx = (Th - Y Tc) / (Y - 1): as in the usual noise-figure
  measurement application notes (Agilent AN 57-1), from memory; worked examples done by hand;
- noise temperature T = 290 K (F - 1), F = 10^(NF/10): IEEE / IRE standard definition
  (T0 = 290 K), from memory; the values for 3.0103 dB and 1 dB are common practice, widely
  tabulated;
- FITS header cards: astropy.io.fits (an independent FITS implementation) parses them back.
"""

from __future__ import annotations

import datetime as dt
import json
import math

import pytest
from astropy.io import fits

import spinflip
from spinflip.daemon.calibration import loads
from spinflip.daemon.calibration.loads import (
    check_record_age,
    check_record_matches,
    header_cards,
    latest_record,
    load_record,
    make_record,
    save_record,
)
from spinflip.daemon.calibration.y_factor import (
    LoadsError,
    check_load_temperatures,
    gain_counts_per_k,
    noise_figure_db,
    noise_source_k_from_loads,
    noise_temperature_k,
    receiver_temperature_k,
    y_factor,
)
from spinflip.daemon.commands.loads_session import LoadsProcedure

#: 2026-12-02T15:30:00 UTC as POSIX seconds (checked against datetime in test_record_name_and_time).
T_2026_12_02_1530_S = 1796225400.0
META = {"gain_setting_db": 40.2, "center_freq_hz": 1420.405751768e6, "sample_rate_hz": 2.4e6,
        "telescope": "HRFS 3 m dish", "site_name": "Heron Ridge Field Station"}


def _one_line(exc_info) -> str:
    msg = str(exc_info.value)
    assert "\n" not in msg and msg
    return msg


def _record(**over):
    kw = dict(p_hot_counts=340_000.0, p_cold_counts=60_000.0, p_cold_cal_counts=130_000.0,
              t_hot_k=290.0, t_cold_k=10.0, time_per_load_s=10.0, time_unix_s=T_2026_12_02_1530_S)
    kw.update(over)
    return make_record(META, **kw)


# ---------------------------------------------------------------------------------------------
# formulas
# ---------------------------------------------------------------------------------------------
def test_y_factor_worked_example_liquid_nitrogen():
    # Y-factor method (AN 57-1, from memory); by hand: (290 - 2.0 * 77) / (2.0 - 1) = 136 K
    assert receiver_temperature_k(2.0, 290.0, 77.0) == pytest.approx(136.0, abs=1e-12)


def test_y_factor_inverse_check():
    # Y-factor method, inverse by hand: Trx = 50 K, Th = 295 K, Tc = 10 K
    # -> Y = (Th + Trx) / (Tc + Trx) = 345 / 60 = 5.75 -> Trx = (295 - 57.5) / 4.75 = 50 K
    y = y_factor(295.0 + 50.0, 10.0 + 50.0)
    assert y == pytest.approx(5.75, rel=1e-15)
    assert receiver_temperature_k(y, 295.0, 10.0) == pytest.approx(50.0, rel=1e-12)


def test_gain_and_noise_source_from_loads():
    # by hand from P = G (T + Trx): G = 1000 counts/K, Trx = 50 K, Th = 290 K, Tc = 10 K,
    # noise source 70 K -> P_hot = 340000, P_cold = 60000, P_cold+cal = 130000
    g = gain_counts_per_k(340_000.0, 60_000.0, 290.0, 10.0)
    assert g == pytest.approx(1000.0, rel=1e-12)
    assert noise_source_k_from_loads(130_000.0, 60_000.0, g) == pytest.approx(70.0, rel=1e-12)
    with pytest.raises(LoadsError) as e:
        noise_source_k_from_loads(60_000.0, 60_000.0, g)
    assert "noise source" in _one_line(e)


def test_y_not_above_one_is_refused():
    # Y <= 1: hot load did not raise the power; Trx would be negative or infinite
    for y in (0.98, 1.0):
        with pytest.raises(LoadsError) as e:
            receiver_temperature_k(y, 290.0, 10.0)
        msg = _one_line(e)
        assert f"Y = {y:g} is not above 1" in msg and "absorber" in msg
    assert issubclass(LoadsError, ValueError)


def test_y_at_or_above_th_over_tc_is_refused():
    # Trx = (Th - Y Tc) / (Y - 1) <= 0 for Y >= Th / Tc = 29 (Th 290 K, Tc 10 K)
    with pytest.raises(LoadsError) as e:
        receiver_temperature_k(29.0, 290.0, 10.0)
    assert "Trx <= 0 K" in _one_line(e)
    assert receiver_temperature_k(28.9, 290.0, 10.0) > 0.0


@pytest.mark.parametrize("th, tc, word", [
    (290.0, 300.0, "not below the hot load"), (290.0, 290.0, "not below the hot load"),
    (450.0, 10.0, "at most 400 K"), (290.0, 0.0, "above 0 K"), (-5.0, -10.0, "above 0 K"),
    (float("nan"), 10.0, "finite"), (290.0, "cold", "expected a number"),
])
def test_load_temperature_sanity(th, tc, word):
    with pytest.raises(LoadsError) as e:
        check_load_temperatures(th, tc)
    assert word in _one_line(e)
    assert check_load_temperatures(400, 3) == (400.0, 3.0)


def test_noise_temperature_from_noise_figure():
    # IEEE standard definition T = 290 K (10^(NF/10) - 1) (from memory); common practice,
    # widely tabulated: 3.0103 dB (F = 2) -> 290 K, 1 dB -> 75.1 K, 0 dB -> 0 K
    assert noise_temperature_k(3.0103) == pytest.approx(290.0, abs=0.01)
    assert noise_temperature_k(1.0) == pytest.approx(75.1, abs=0.05)
    assert noise_temperature_k(0.0) == 0.0
    for t_k in (0.0, 35.0, 75.088, 290.0, 1500.0):
        assert noise_temperature_k(noise_figure_db(t_k)) == pytest.approx(t_k, abs=1e-9)
    assert noise_figure_db(290.0) == pytest.approx(10 * math.log10(2.0), rel=1e-15)
    with pytest.raises(LoadsError) as e:
        noise_temperature_k(-0.5)
    assert "-0.5 dB" in _one_line(e)
    with pytest.raises(LoadsError):
        noise_figure_db(-1.0)


# ---------------------------------------------------------------------------------------------
# the record
# ---------------------------------------------------------------------------------------------
def test_record_name_and_time():
    assert dt.datetime.fromtimestamp(T_2026_12_02_1530_S, dt.UTC) == \
        dt.datetime(2026, 12, 2, 15, 30, tzinfo=dt.UTC)
    r = _record()
    assert r.name == "loads-20261202T153000" and r.time_utc == "2026-12-02T15:30:00"
    assert r.time_unix_s == T_2026_12_02_1530_S
    assert r.software_version == spinflip.__version__
    # the model of test_gain_and_noise_source_from_loads, by hand: Y = 340000/60000
    assert r.y == pytest.approx(340 / 60, rel=1e-12)
    assert r.trx_k == pytest.approx(50.0, rel=1e-12)
    assert r.tsys_cold_k == pytest.approx(60.0, rel=1e-12)
    assert r.noise_source_k == pytest.approx(70.0, rel=1e-12)
    no_cal = _record(p_cold_cal_counts=None)
    assert no_cal.noise_source_k is None and no_cal.p_cold_cal_counts is None


def test_record_json_round_trip_atomic(tmp_path):
    for r in (_record(), _record(p_cold_cal_counts=None, time_unix_s=T_2026_12_02_1530_S + 60)):
        path = save_record(r, tmp_path / "cal")
        assert path == tmp_path / "cal" / f"{r.name}.json"
        assert load_record(path) == r
    assert sorted(p.name for p in (tmp_path / "cal").iterdir()) == [
        "loads-20261202T153000.json", "loads-20261202T153100.json"]   # no .tmp left
    data = json.loads(path.read_text())
    assert data["format"] == 1 and data["noise_source_k"] is None
    with pytest.raises(LoadsError) as e:   # never overwritten
        save_record(r, tmp_path / "cal")
    assert "exists already" in _one_line(e)


def test_failed_write_leaves_no_tmp_and_no_record(tmp_path, monkeypatch):
    def broken_replace(src, dst):
        raise OSError(28, "No space left on device")
    monkeypatch.setattr(loads.os, "replace", broken_replace)
    with pytest.raises(OSError):
        save_record(_record(), tmp_path)
    assert list(tmp_path.iterdir()) == []


def test_save_refuses_a_bad_record(tmp_path):
    import dataclasses
    bad = dataclasses.replace(_record(), y=0.98)
    with pytest.raises(LoadsError) as e:
        save_record(bad, tmp_path)
    assert "'y' = 0.98" in _one_line(e)
    assert list(tmp_path.iterdir()) == []


def _write(tmp_path, text, name="loads-20261202T153000.json"):
    p = tmp_path / name
    p.write_text(text)
    return p


@pytest.mark.parametrize("edit, words", [
    (lambda d: d.pop("trx_k"), ["'trx_k' is missing"]),
    (lambda d: d.update(y="two"), ["'y' = 'two'", "number"]),
    (lambda d: d.update(gain_counts_per_k=float("nan")), ["'gain_counts_per_k'", "finite"]),
    (lambda d: d.update(trx_k=float("inf")), ["'trx_k'", "finite"]),
    (lambda d: d.update(y=0.98), ["'y' = 0.98 is not above 1"]),
    (lambda d: d.update(y=True), ["'y' = True", "number"]),
    (lambda d: d.update(t_cold_k=300.0), ["t_cold_k = 300 K"]),
    (lambda d: d.update(time_utc="yesterday"), ["'time_utc' = 'yesterday'"]),
    (lambda d: d.update(telescope="dish\n2"), ["'telescope'", "printable ASCII"]),
    (lambda d: d.pop("format"), ["'format'"]),
    (lambda d: d.update(noise_source_k=None), ["'noise_source_k'", "both"]),
    (lambda d: d.update(sample_rate_hz=-1), ["'sample_rate_hz' = -1", "above 0"]),
])
def test_damaged_record_one_line_error(tmp_path, edit, words):
    data = _record().to_dict()
    edit(data)
    path = _write(tmp_path, json.dumps(data))   # json writes NaN / Infinity literals
    with pytest.raises(LoadsError) as e:
        load_record(path)
    msg = _one_line(e)
    assert str(path) in msg
    for w in words:
        assert w in msg


@pytest.mark.parametrize("text, word", [
    ('{"format": 1, "name": "loads-2026', "not valid JSON"),
    ("", "not valid JSON"),
    ("[1, 2]", "expected a JSON object"),
])
def test_corrupt_record_one_line_error(tmp_path, text, word):
    path = _write(tmp_path, text)
    with pytest.raises(LoadsError) as e:
        load_record(path)
    msg = _one_line(e)
    assert str(path) in msg and word in msg
    with pytest.raises(LoadsError) as e:
        load_record(tmp_path / "missing.json")
    assert "cannot be read" in _one_line(e)


def test_latest_record(tmp_path):
    assert latest_record(tmp_path / "nowhere") is None
    assert latest_record(tmp_path) is None
    early, late = _record(), _record(time_unix_s=T_2026_12_02_1530_S + 3600)
    save_record(late, tmp_path)
    save_record(early, tmp_path)
    (tmp_path / "loads-20261203T000000.json.tmp").write_text("torn")   # a crash's leftover
    assert latest_record(tmp_path) == late
    _write(tmp_path, "{", "loads-20261203T000000.json")
    with pytest.raises(LoadsError) as e:   # a damaged record is named, not skipped
        latest_record(tmp_path)
    assert "loads-20261203T000000.json" in _one_line(e)


def test_record_age():
    r = _record()
    assert check_record_age(r, T_2026_12_02_1530_S + 3600.0, 21600.0) == 3600.0
    with pytest.raises(LoadsError) as e:
        check_record_age(r, T_2026_12_02_1530_S + 9.3 * 3600.0, 21600.0)
    assert _one_line(e) == (
        "calibration record loads-20261202T153000 is 9.3 h old, older than "
        "calibration.max_record_age_s = 21600 s: repeat the hot/cold calibration (spinflip loads)")
    with pytest.raises(LoadsError) as e:   # the clock went backwards (no time sync at boot)
        check_record_age(r, T_2026_12_02_1530_S - 2 * 3600.0, 21600.0)
    assert "2.0 h in the future" in _one_line(e)
    with pytest.raises(LoadsError):
        check_record_age(r, T_2026_12_02_1530_S, 0.0)


def test_record_matches_settings():
    r = _record()
    check_record_matches(r, 40.2, 1420.405751768e6 + 5e6, 2.4e6)   # small retune accepted
    with pytest.raises(LoadsError) as e:
        check_record_matches(r, 49.6, 1420.405751768e6, 2.4e6)
    msg = _one_line(e)
    assert "gain 40.2 dB" in msg and "49.6 dB" in msg and "spinflip loads" in msg
    with pytest.raises(LoadsError) as e:
        check_record_matches(r, 40.2, 1420.405751768e6 + 15e6, 2.4e6)
    assert "1435.406 MHz" in _one_line(e)
    with pytest.raises(LoadsError) as e:
        check_record_matches(r, 40.2, 1420.405751768e6, 2.048e6)
    assert "2.048e+06 samples/s" in _one_line(e)


def test_header_cards_are_valid_fits():
    r = _record()
    cards = header_cards(r)
    assert {"CALFILE", "CALDATE", "THOT", "TCOLD", "YFACTOR", "TRX", "TSYSCOLD", "TCAL"} <= set(cards)
    assert "TCAL" not in header_cards(_record(p_cold_cal_counts=None))
    assert set(cards) <= set(loads.HEADER_CARD_COMMENTS)
    # FITS 3.0 (Pence et al. 2010) via astropy.io.fits: keys <= 8 chars, values parse back
    h = fits.Header()
    for key, value in cards.items():
        assert len(key) <= 8 and key == key.upper()
        h[key] = (value, loads.HEADER_CARD_COMMENTS[key])
    back = fits.Header.fromstring(h.tostring())
    for card in back.cards:
        card.verify("exception")
    assert back["CALFILE"] == "loads-20261202T153000"
    assert back["TRX"] == pytest.approx(r.trx_k, rel=1e-12)
    assert back["TCAL"] == pytest.approx(70.0, rel=1e-12)


# ---------------------------------------------------------------------------------------------
# the procedure
# ---------------------------------------------------------------------------------------------
class FakeReceiver:
    """P = G (T_load + Trx + T_ns if on): Trx 50 K, G 1000 counts/K, noise source 70 K.

    The fake observer puts the load the prompt asks for on the feed (or the other one when
    ``swap`` is set), so the procedure's order of prompts and switching is what is tested.
    """

    def __init__(self, t_hot_k=290.0, t_cold_k=10.0, swap=False, bad=None):
        self.t_hot_k, self.t_cold_k, self.swap, self.bad = t_hot_k, t_cold_k, swap, bad
        self.load_k = 150.0          # whatever is on the feed before the observer acts
        self.noise_on = True         # left on by an earlier session: must be switched off
        self.steps, self.switches, self.measured = [], [], []

    def prompt(self, step):
        self.steps.append(step)
        hot = (step.load == "hot") != self.swap
        self.load_k = self.t_hot_k if hot else self.t_cold_k

    def set_noise_source(self, on):
        self.switches.append(on)
        self.noise_on = on

    def measure(self, load, seconds):
        self.measured.append((load, seconds, self.noise_on))
        if load == self.bad:
            return float("nan")
        return 1000.0 * (self.load_k + 50.0 + (70.0 if self.noise_on else 0.0))


def _procedure(rx, noise=True, **kw):
    return LoadsProcedure(rx.measure, rx.prompt, t_hot_k=rx.t_hot_k, t_cold_k=rx.t_cold_k,
                          seconds=5.0, set_noise_source=rx.set_noise_source if noise else None,
                          clock=lambda: T_2026_12_02_1530_S, **kw)


def test_procedure_recovers_the_receiver():
    # model P = G (T + Trx) with the Y-factor formulas (AN 57-1, from memory)
    rx = FakeReceiver()
    proc = _procedure(rx)
    rec = proc.run(dict(META))
    assert rec.y == pytest.approx(340 / 60, rel=1e-12)
    assert rec.trx_k == pytest.approx(50.0, rel=1e-12)
    assert rec.tsys_cold_k == pytest.approx(60.0, rel=1e-12)
    assert rec.gain_counts_per_k == pytest.approx(1000.0, rel=1e-12)
    assert rec.noise_source_k == pytest.approx(70.0, rel=1e-12)
    assert rec.name == "loads-20261202T153000" and rec.time_per_load_s == 5.0
    assert rec.gain_setting_db == 40.2 and rec.telescope == META["telescope"]
    # prompts in order, numbered, with the load temperatures
    assert [(s.number, s.total, s.load) for s in rx.steps] == [
        (1, 3, "hot"), (2, 3, "cold"), (3, 3, "cold+cal")]
    assert rx.steps == proc.steps()
    assert rx.steps[0].instruction == ("Step 1 of 3: cover the feed with the absorber "
                                       "(hot load, 290.0 K), then press Enter")
    assert "10.0 K" in rx.steps[1].instruction
    # noise source off for hot and cold, on only for cold+cal, off at the end
    assert rx.measured == [("hot", 5.0, False), ("cold", 5.0, False), ("cold+cal", 5.0, True)]
    assert rx.switches[0] is False and rx.noise_on is False


def test_procedure_without_noise_source():
    rx = FakeReceiver()
    rx.noise_on = False
    proc = _procedure(rx, noise=False, go_action="send go")
    rec = proc.run(META)
    assert [s.load for s in rx.steps] == ["hot", "cold"]
    assert rx.steps[1].instruction.startswith("Step 2 of 2:")
    assert rx.steps[1].instruction.endswith("then send go")
    assert rec.noise_source_k is None and rec.trx_k == pytest.approx(50.0, rel=1e-12)


def test_swapped_loads_raise_and_leave_no_file(tmp_path):
    rx = FakeReceiver(swap=True)
    with pytest.raises(LoadsError) as e:
        save_record(_procedure(rx).run(META), tmp_path)
    assert "is not above 1" in _one_line(e)
    assert list(tmp_path.iterdir()) == []
    assert rx.noise_on is False


def test_bad_power_names_the_step_and_switches_noise_off():
    rx = FakeReceiver(bad="cold+cal")
    with pytest.raises(LoadsError) as e:
        _procedure(rx).run(META)
    msg = _one_line(e)
    assert "step 3 of 3 (cold load + noise source)" in msg and "finite" in msg
    assert rx.noise_on is False

    rx = FakeReceiver()

    def failing_measure(load, seconds):
        if load == "cold+cal":
            raise OSError("USB transfer failed")
        return rx.measure(load, seconds)
    proc = LoadsProcedure(failing_measure, rx.prompt, t_hot_k=290.0, t_cold_k=10.0, seconds=1.0,
                          set_noise_source=rx.set_noise_source)
    with pytest.raises(OSError):
        proc.run(META)
    assert rx.switches[-2:] == [True, False] and rx.noise_on is False


def test_cancel_leaves_no_record(tmp_path):
    rx = FakeReceiver()

    def cancel_at_cold(step):
        rx.prompt(step)
        if step.load == "cold":
            raise KeyboardInterrupt
    proc = LoadsProcedure(rx.measure, cancel_at_cold, t_hot_k=290.0, t_cold_k=10.0, seconds=1.0,
                          set_noise_source=rx.set_noise_source)
    rec = None
    with pytest.raises(KeyboardInterrupt):
        rec = proc.run(META)
    assert rec is None and list(tmp_path.iterdir()) == []
    assert [m[0] for m in rx.measured] == ["hot"] and rx.noise_on is False


def test_bad_meta_is_refused_before_the_first_prompt():
    rx = FakeReceiver()
    for meta, word in (({k: v for k, v in META.items() if k != "sample_rate_hz"},
                        "'sample_rate_hz' is missing"),
                       ({**META, "gain_db": 3.0}, "unknown key 'gain_db'"),
                       ({**META, "center_freq_hz": "1420 MHz"}, "expected a number")):
        with pytest.raises(LoadsError) as e:
            _procedure(rx).run(meta)
        assert word in _one_line(e)
    assert rx.steps == [] and rx.measured == []
    with pytest.raises(LoadsError) as e:
        LoadsProcedure(rx.measure, rx.prompt, t_hot_k=290.0, t_cold_k=10.0, seconds=0.0)
    assert "seconds per load = 0 s" in _one_line(e)
