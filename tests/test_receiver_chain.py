"""Receiver-chain budget (daemon/commands/receiver_chain.py) and its tables (daemon/commands/chain_table.py).

Outside references used below (each also named beside its check):
- Friis cascade T = T1 + T2/G1 + T3/(G1 G2) + ... (Friis 1944, Proc. IRE 32, 419; from memory),
  checked against worked examples computed by hand in this file and against the same formula
  in its other arrangement, the noise-factor form F = F1 + (F2 - 1)/G1 + (F3 - 1)/(G1 G2) + ...
- Noise temperature T = T0 (F - 1), T0 = 290 K (IEEE / IRE standard definition, from memory);
  NF 3.0103 dB <-> 290 K and 0.5 dB <-> 35.4 K are widely tabulated (common practice).
- A matched passive loss L at T_phys: T = (L - 1) T_phys, G = 1/L; at 290 K its noise figure
  equals its loss (common practice; Pozar, Microwave Engineering, noise of a lossy line, from
  memory), and a loss ahead of an amplifier gives T = (L - 1) T_phys + L T_amp (same source).
- HPBW ~ 1.2 lambda / D (common practice), lambda from astropy's speed of light and units.
- Radiometer equation Delta T = K Tsys / sqrt(B tau), K = 1 total power, a factor 2 for a
  switched measurement of the same length (Wilson, Rohlfs & Huttemeister, Tools of Radio
  Astronomy).
- Thermal noise floor k T0 = -174 dBm/Hz at 290 K (common practice), k from astropy.constants.
"""

from __future__ import annotations

import copy
import math

import pytest
from astropy import constants as const
from astropy import units as u
from rich.console import Console

from spinflip.daemon.calibration.cascade import (
    beamwidth_deg,
    friis_cascade_k,
    noise_power_dbm,
    passive_noise_temp_k,
    sensitivity_k,
)
from spinflip.daemon.commands import receiver_chain as rc
from spinflip.daemon.commands.chain_table import chain_main, render
from spinflip.daemon.commands.receiver_chain import (
    ProfileError,
    chain_budget,
    load_profile,
    profile_from_dict,
    shipped_profiles,
)


def _render_text(budget) -> str:
    console = Console(record=True, width=120, color_system=None)
    console.print(render(budget))
    return console.export_text()


def _base() -> dict:
    """A small valid profile as a parsed TOML document: feed loss, one LNA, coax."""
    return {
        "telescope": {"name": "test dish", "dish_diameter_m": 3.0, "aperture_efficiency": 0.5},
        "sky": {"sky_k": 10.0, "spillover_k": 15.0},
        "stage": [
            {"name": "feed", "kind": "passive", "loss_db": 0.1},
            {"name": "LNA", "kind": "amplifier", "gain_db": 30.0, "noise_figure_db": 0.5},
            {"name": "coax", "kind": "passive", "loss_db": 2.0, "physical_temp_k": 290.0},
        ],
    }


NO_LNA_TOML = """
[telescope]
name = "no LNA"
dish_diameter_m = 3.0
aperture_efficiency = 0.5
[sky]
sky_k = 10.0
spillover_k = 15.0
[[stage]]
name = "3 m coax"
kind = "passive"
loss_db = 0.6
"""


# ----------------------------------------------------------------------------------------------
# formulas
# ----------------------------------------------------------------------------------------------
def test_friis_hand_example():
    # Worked by hand from Friis (1944, from memory): LNA 50 K / 20 dB, a 3.0103 dB pad at 290 K
    # (T = (2 - 1) 290 = 290 K, G = 1/2), then a 500 K / 10 dB stage:
    # T = 50 + 290/100 + 500/(100 * 0.5) = 50 + 2.9 + 10 = 62.9 K.
    pad_k = passive_noise_temp_k(10 * math.log10(2.0), 290.0)
    assert pad_k == pytest.approx(290.0, rel=1e-12)
    c = friis_cascade_k([50.0, pad_k, 500.0], [100.0, 0.5, 10.0])
    assert c.total_k == pytest.approx(62.9, abs=1e-9)
    assert c.contributions_k == pytest.approx((50.0, 2.9, 10.0))
    assert c.gains_before == pytest.approx((1.0, 100.0, 50.0))
    assert c.cumulative_gains == pytest.approx((100.0, 50.0, 500.0))


def test_friis_agrees_with_noise_factor_form():
    # The same cascade in its noise-factor arrangement (Friis 1944, from memory):
    # F = F1 + (F2 - 1)/G1 + (F3 - 1)/(G1 G2) + ..., T = 290 K (F - 1) (IEEE T0).
    nfs_db = [0.6, 1.0, 2.5, 6.0]
    gains_db = [18.0, -1.0, 25.0, 30.0]
    t0 = 290.0
    temps = [t0 * (10 ** (nf / 10) - 1) for nf in nfs_db]
    gains = [10 ** (g / 10) for g in gains_db]
    f_total, g_prod = 0.0, 1.0
    for i, nf in enumerate(nfs_db):
        f = 10 ** (nf / 10)
        f_total += f if i == 0 else (f - 1) / g_prod
        g_prod *= gains[i]
    assert friis_cascade_k(temps, gains).total_k == pytest.approx(t0 * (f_total - 1), rel=1e-12)


def test_loss_ahead_of_amplifier():
    # Loss L at T_phys before an amplifier T_amp: T = (L - 1) T_phys + L T_amp
    # (Pozar, Microwave Engineering, lossy line followed by an amplifier; from memory).
    loss_db, t_phys, t_amp = 0.5, 280.0, 35.0
    big_l = 10 ** (loss_db / 10)
    c = friis_cascade_k([passive_noise_temp_k(loss_db, t_phys), t_amp], [1 / big_l, 100.0])
    assert c.total_k == pytest.approx((big_l - 1) * t_phys + big_l * t_amp, rel=1e-12)


@pytest.mark.parametrize("nf_db, t_k, tol_k", [
    (3.0103, 290.0, 0.01),     # F = 2: T = T0 (IEEE T0 = 290 K; common practice)
    (0.5, 35.4, 0.05),         # 290 (10^0.05 - 1) = 35.39 K (common practice, tabulated)
    (0.0, 0.0, 1e-12),         # a noiseless stage
])
def test_noise_figure_to_temperature(nf_db, t_k, tol_k):
    prof = _base()
    prof["stage"][1]["noise_figure_db"] = nf_db
    lna = profile_from_dict(prof).stages[1]
    assert lna.noise_temp_k == pytest.approx(t_k, abs=tol_k)
    prof["stage"][1] = {"name": "LNA", "kind": "amplifier", "gain_db": 30.0, "noise_temp_k": t_k}
    assert profile_from_dict(prof).stages[1].noise_figure_db == pytest.approx(nf_db, abs=2e-3)


@pytest.mark.parametrize("loss_db", [0.1, 1.0, 3.0, 10.0])
def test_passive_loss_at_290_k_has_noise_figure_equal_to_loss(loss_db):
    # Common practice (and Pozar, from memory): a matched loss at T0 = 290 K has F = L.
    prof = _base()
    prof["stage"][2]["loss_db"] = loss_db
    coax = profile_from_dict(prof).stages[2]
    assert coax.noise_figure_db == pytest.approx(loss_db, rel=1e-12)
    assert coax.gain_db == -loss_db
    assert coax.noise_temp_k == pytest.approx(290.0 * (10 ** (loss_db / 10) - 1), rel=1e-12)


@pytest.mark.parametrize("diameter_m", [1.2, 2.3, 3.0])
def test_beamwidth_against_1_2_lambda_over_d(diameter_m):
    # HPBW = 1.2 lambda / D (common practice); lambda = c / 1420.405751768 MHz via astropy.
    lam = (const.c / (1420.405751768 * u.MHz)).to(u.m)
    expected_deg = (1.2 * lam / (diameter_m * u.m)).to(
        u.deg, equivalencies=u.dimensionless_angles())
    assert beamwidth_deg(diameter_m) == pytest.approx(expected_deg.value, rel=1e-9)
    assert beamwidth_deg(3.0) == pytest.approx(4.84, abs=0.01)     # 1.2 * 0.2111 m / 3 m


def test_radiometer_noise_total_switched_folded():
    # Wilson, Rohlfs & Huttemeister: Delta T = Tsys / sqrt(B tau); a switched measurement of
    # the same length costs a factor 2 (half the time per phase, and a difference of two);
    # folding two copies wins sqrt 2 back.
    b_hz = 2.4e6 / 1024
    s = sensitivity_k(100.0, b_hz, 10.0)
    assert s.total_power_k == pytest.approx(100.0 / math.sqrt(23437.5), rel=1e-12)   # 0.6532 K
    assert s.total_power_k == pytest.approx(0.6532, abs=1e-4)
    assert s.switched_k == pytest.approx(2 * s.total_power_k, rel=1e-12)
    assert s.folded_k == pytest.approx(math.sqrt(2) * s.total_power_k, rel=1e-12)


def test_noise_power_dbm_against_kt0():
    # k T0 at 290 K = -174 dBm/Hz (common practice); k from astropy.constants.
    kt0_dbm_hz = 10 * math.log10(const.k_B.value * 290.0 / 1e-3)
    assert noise_power_dbm(290.0, 1.0) == pytest.approx(kt0_dbm_hz, abs=1e-9)
    assert noise_power_dbm(290.0, 1.0) == pytest.approx(-174.0, abs=0.05)
    assert noise_power_dbm(290.0, 1e6, 30.0) == pytest.approx(kt0_dbm_hz + 60.0 + 30.0, abs=1e-9)


def test_budget_sums_and_hi_antenna_temperature():
    # Tsys = sky + spillover + Friis cascade (dongle last, default NF 6 dB), hand arrangement.
    b = chain_budget(profile_from_dict(_base()))
    t0 = 290.0
    l1, g2, l3 = 10 ** 0.01, 10 ** 3.0, 10 ** 0.2
    t_dongle = t0 * (10 ** 0.6 - 1)
    cascade = (l1 - 1) * t0 + l1 * (t0 * (10 ** 0.05 - 1)) + (l3 - 1) * t0 * l1 / g2 \
        + t_dongle * l1 * l3 / g2
    assert b.cascade_k == pytest.approx(cascade, rel=1e-9)
    assert b.tsys_k == pytest.approx(10.0 + 15.0 + cascade, rel=1e-9)
    assert b.loss_ahead_k == pytest.approx((l1 - 1) * t0, rel=1e-9)
    assert b.hi_antenna_k == pytest.approx(0.5 * 80.0)       # eta_A T_B, default T_B 80 K
    assert b.warnings == ()


# ----------------------------------------------------------------------------------------------
# shipped profiles, rendering, warnings
# ----------------------------------------------------------------------------------------------
def test_there_are_shipped_profiles():
    assert len(shipped_profiles()) >= 2


@pytest.mark.parametrize("path", shipped_profiles(), ids=lambda p: p.name)
def test_shipped_profile_loads_and_renders(path):
    budget = chain_budget(load_profile(path))
    text = _render_text(budget)
    assert f"{budget.cascade_k:.1f} K" in text
    assert f"{budget.tsys_k:.1f} K" in text
    assert "Tsys (expected)" in text and "HPBW" in text
    assert budget.warnings == () and "WARNING" not in text       # shipped chains have LNAs
    assert budget.profile.stages[-1].kind == "dongle"
    assert 20.0 < budget.tsys_k < 300.0
    console = Console(record=True, width=120, color_system=None)
    assert chain_main(str(path), console=console) == 0
    assert f"{budget.cascade_k:.1f} K" in console.export_text()


def test_low_gain_warning_without_lna(tmp_path):
    path = tmp_path / "nolna.toml"
    path.write_text(NO_LNA_TOML)
    console = Console(record=True, width=120, color_system=None)
    assert chain_main(str(path), console=console) == 0
    text = console.export_text()
    assert "WARNING: gain before the dongle" in text
    assert "below the 8-bit ADC" in text
    b = chain_budget(load_profile(path))
    # The dongle's 864.5 K (NF 6 dB) behind a 0.6 dB loss is most of Tsys.
    assert b.dongle_fraction > 0.5


def test_clipping_warning_with_too_much_gain():
    prof = _base()
    prof["stage"][1]["gain_db"] = 70.0
    prof["stage"].insert(2, {"name": "LNA 2", "kind": "amplifier", "gain_db": 30.0,
                             "noise_figure_db": 1.0})
    b = chain_budget(profile_from_dict(prof))
    assert any("clip" in w for w in b.warnings)
    assert not any("too low" in w for w in b.warnings)


def test_dongle_fraction_rule_threshold():
    # The rule (module docstring): warn when T_dongle / G_b > f Tsys. A noiseless stage of
    # gain (needed - present) just ahead of the dongle leaves the rest of Tsys as it is and must
    # bring the dongle's share to exactly f; checked by hand: T_d / G = f (T_b + T_d / G).
    prof = _base()
    b = chain_budget(profile_from_dict(prof))
    t_b = b.tsys_k - b.dongle_k
    extra_db = b.needed_gain_db - b.gain_before_dongle_db
    ideal = {"name": "ideal", "kind": "amplifier", "gain_db": extra_db, "noise_temp_k": 0.0}
    prof["stage"].append(ideal)
    b2 = chain_budget(profile_from_dict(prof))
    assert b2.dongle_fraction == pytest.approx(0.10, rel=1e-9)
    assert b2.dongle_k == pytest.approx(0.10 * (t_b + b2.dongle_k), rel=1e-9)
    ideal["gain_db"] = extra_db - 0.1
    assert any("too low" in w for w in chain_budget(profile_from_dict(prof)).warnings)
    ideal["gain_db"] = extra_db + 0.1
    assert not any("too low" in w for w in chain_budget(profile_from_dict(prof)).warnings)


# ----------------------------------------------------------------------------------------------
# bad profiles
# ----------------------------------------------------------------------------------------------
def _set(path, value):
    def edit(d):
        *head, last = path
        for k in head:
            d = d[k]
        d[last] = value
    return edit


def _delete(path):
    def edit(d):
        *head, last = path
        for k in head:
            d = d[k]
        del d[last]
    return edit


@pytest.mark.parametrize("edit, named", [
    (_set(("telescope", "colour_k"), 3.0), "telescope.colour_k"),                 # unknown key
    (_set(("mount",), {"kind": "altaz"}), "mount"),                                # unknown section
    (_delete(("sky", "spillover_k")), "sky.spillover_k"),                          # missing key
    (_delete(("telescope",)), "telescope"),                                        # missing section
    (_delete(("stage",)), "stage"),                                                # no stages
    (_set(("stage",), []), "stage"),
    (_set(("telescope", "dish_diameter_m"), "3"), "telescope.dish_diameter_m"),    # wrong type
    (_set(("telescope", "dish_diameter_m"), True), "telescope.dish_diameter_m"),
    (_set(("telescope", "aperture_efficiency"), 1.5), "telescope.aperture_efficiency"),
    (_set(("telescope", "aperture_efficiency"), 0.0), "telescope.aperture_efficiency"),
    (_set(("sky", "sky_k"), 1.0), "sky.sky_k"),                                    # below the CMB
    (_set(("sky", "spillover_k"), float("nan")), "sky.spillover_k"),
    (_set(("stage", 0, "loss_db"), -1.0), "stage[1].loss_db"),                     # a loss < 0
    (_set(("stage", 0, "physical_temp_k"), 0.0), "stage[1].physical_temp_k"),
    (_set(("stage", 1, "noise_figure_db"), -0.5), "stage[2].noise_figure_db"),
    (_set(("stage", 1, "gain_db"), 120.0), "stage[2].gain_db"),
    (_set(("stage", 1, "noise_temp_k"), 35.0), "stage[2].noise_temp_k"),           # both given
    (_delete(("stage", 1, "noise_figure_db")), "stage[2].noise_figure_db"),        # neither
    (_set(("stage", 1, "loss_db"), 1.0), "stage[2].loss_db"),                      # wrong kind key
    (_set(("stage", 2, "kind"), "mixer"), "stage[3].kind"),
    (_delete(("stage", 2, "kind")), "stage[3].kind"),
    (_set(("stage", 0), "feed"), "stage[1]"),
    (_set(("dongle",), {"noise_figure_db": 6.0, "noise_temp_k": 865.0}), "dongle.noise_temp_k"),
    (_set(("dongle",), {"adc_min_input_dbm": -30.0}), "dongle.adc_min_input_dbm"),
    (_set(("dongle",), {"max_noise_fraction": 0.0}), "dongle.max_noise_fraction"),
    (_set(("observing",), {"channels": 1024.0}), "observing.channels"),           # int wanted
    (_set(("observing",), {"sample_rate_hz": 10e6}), "observing.sample_rate_hz"),
    (_set(("observing",), {"integration_s": 0}), "observing.integration_s"),
    (_set(("observing",), 5), "observing"),
])
def test_bad_profile_raises_naming_the_key(edit, named):
    prof = copy.deepcopy(_base())
    edit(prof)
    with pytest.raises(ValueError) as exc:
        profile_from_dict(prof, "bad.toml")
    msg = str(exc.value)
    assert isinstance(exc.value, ProfileError)
    assert "\n" not in msg
    assert msg.startswith("bad.toml: ")
    assert named in msg


def test_bad_value_message_says_value_and_allowed():
    prof = _base()
    prof["telescope"]["aperture_efficiency"] = 1.5
    with pytest.raises(ValueError, match=r"aperture_efficiency = 1\.5: expected a number above 0 "
                                         r"to 1"):
        profile_from_dict(prof)


def test_missing_file_directory_and_toml_syntax(tmp_path):
    missing = tmp_path / "nope.toml"
    with pytest.raises(ValueError, match="nope.toml"):
        chain_main(str(missing))
    with pytest.raises(ValueError, match=str(tmp_path)):
        load_profile(tmp_path)
    broken = tmp_path / "broken.toml"
    broken.write_text("[telescope]\nname = \"x\"\ndish_diameter_m = = 3\n")
    with pytest.raises(ValueError) as exc:
        load_profile(broken)
    assert "broken.toml" in str(exc.value) and "not valid TOML" in str(exc.value)
    assert "\n" not in str(exc.value)
    binary = tmp_path / "binary.toml"
    binary.write_bytes(b"\xff\xfe\x00 not text")
    with pytest.raises(ValueError, match="binary.toml"):
        load_profile(binary)


def test_defaults_are_applied_and_stated():
    p = profile_from_dict(_base())
    assert p.stages[-1].noise_figure_db == rc.DEFAULT_DONGLE_NF_DB == 6.0
    assert p.sample_rate_hz == 2.4e6 and p.channels == 1024 and p.integration_s == 10.0
    assert p.stages[0].noise_temp_k == pytest.approx(290.0 * (10 ** 0.01 - 1))  # 290 K default


def test_chain_command_prints_the_cascade_and_refuses_a_bad_profile(tmp_path):
    from cli_runner import run_cli
    r = run_cli(["chain", rc.SHIPPED_PROFILES_DIR / "hrfs_3m_dish.toml"])
    assert r.returncode == 0 and "cascade temperature" in r.stdout and "44.4 K" in r.stdout
    bad = tmp_path / "bad.toml"
    text = (rc.SHIPPED_PROFILES_DIR / "hrfs_3m_dish.toml").read_text()
    bad.write_text(text.replace("dish_diameter_m = 3.0", "dish_diameter_m = -3.0"))
    r = run_cli(["chain", bad])
    assert r.returncode == 2 and r.stderr.count("\n") == 1 and "dish_diameter_m" in r.stderr
