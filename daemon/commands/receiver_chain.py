"""Receiver-chain budget of a small radio telescope, from a TOML profile.

What the telescope should deliver before it is switched on: the cascade noise temperature of
the chain (feed losses, amplifiers, filters, cables and the dongle itself), the expected system
temperature, the beam, the radiometer noise of one integration, the antenna temperature of
Galactic HI, and whether enough gain reaches the 8-bit dongle. ``spinflip chain FILE`` prints
it (:mod:`spinflip.daemon.commands.chain_table`).

The maths (Friis cascade, passive loss, beam, radiometer noise, HI antenna temperature) is
:mod:`spinflip.daemon.calibration.cascade`; this module reads profiles and builds the budget.

Enough gain for the 8-bit dongle (the rule of :func:`chain_budget`'s warnings)
--------------------------------------------------------------------------------
With G_b the gain of all stages before the dongle and T_b = T_sky + T_continuum +
T_spillover + (cascade of the stages before the dongle), all referred to the feed input, the
noise power reaching the dongle's antenna input, over the sample rate as bandwidth, is::

    P_in = k T_b B_s G_b                  (k = 1.380649e-23 J/K, B_s = sample_rate_hz)

A warning line is raised when

1. the dongle's own contribution T_dongle / G_b is more than ``max_noise_fraction`` (default
   10 %) of T_sys: the chain's gain is too low for the dongle's noise to be negligible. The gain
   that would bring it down to the fraction f is G_b >= T_dongle (1 - f) / (f T_b);
2. P_in is below ``adc_min_input_dbm`` (default -100 dBm): even at the tuner's highest gain the
   sky noise fills only the lowest few of the 8 ADC bits;
3. P_in is above ``adc_max_input_dbm`` (default -40 dBm): even at the tuner's lowest gain the
   8-bit ADC (about 48 dB of range, 6.02 dB per bit) or the tuner clips; add attenuation.

The two ADC limits are rough figures for an R820T-class tuner in front of an 8-bit ADC (tuner
gain 0 to about 49.6 dB, the dongle's own noise floor about -105 dBm in 2.4 MHz at NF 6 dB),
from memory: measure your own dongle and set them in the profile.

Profile schema (TOML; every number carries its unit in its key)
----------------------------------------------------------------
``[telescope]`` (required)
    ``name`` (str, required); ``dish_diameter_m`` (number, required, 0.1-100 m);
    ``aperture_efficiency`` (number, required, above 0 up to 1);
    ``beamwidth_factor`` (number, optional, 0.8-2.0, default 1.2: HPBW = factor lambda / D).
``[sky]`` (required)
    ``sky_k`` (number, required, 2.7-1000 K: cold sky at 1420 MHz off the plane, CMB +
    Galactic + atmosphere, about 5-10 K); ``spillover_k`` (number, required, 0-300 K: ground
    seen through the sidelobes); ``continuum_k`` (number, optional, 0-1000 K, default 0:
    Galactic continuum added toward the plane); ``hi_brightness_k`` (number, optional,
    0-300 K, default 80: HI brightness of the target).
``[[stage]]`` (one or more, in signal order from the feed; the dongle is not listed here)
    ``name`` (str, required); ``kind`` (required: "amplifier" or "passive").
    amplifier: ``gain_db`` (number, required, -30-70 dB) and exactly one of
    ``noise_figure_db`` (0-20 dB) or ``noise_temp_k`` (0-30000 K).
    passive: ``loss_db`` (number, required, 0-40 dB); ``physical_temp_k`` (number, optional,
    above 0 up to 400 K, default 290).
``[dongle]`` (optional; every key optional)
    ``name`` (str, default "8-bit USB dongle"); ``noise_figure_db`` (0-20 dB, default 6.0: an
    R820T-class dongle is quoted at roughly 3.5-6 dB at its highest gain and is worse at
    1.4 GHz, from memory, so 6 dB is cautious) or ``noise_temp_k`` (0-30000 K), not both;
    ``adc_min_input_dbm`` (default -100), ``adc_max_input_dbm`` (default -40), both -200-+20 dBm
    and min below max; ``max_noise_fraction`` (above 0 up to 1, default 0.10).
``[observing]`` (optional; every key optional)
    ``sample_rate_hz`` (225001-3200000 Hz, default 2.4e6); ``channels`` (integer 8-1048576,
    default 1024); ``integration_s`` (above 0 up to 86400 s, default 10).

Anything else (an unknown section or key, a wrong type, a value out of range, a missing required
key) raises :class:`ProfileError` whose message is one line naming the file, the key, the value
and what is allowed.

References
----------
Those of the maths are listed in :mod:`spinflip.daemon.calibration.cascade`.
"""

from __future__ import annotations

import math
import numbers
import os
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any, overload

from spinflip.daemon.calibration.cascade import (
    DEFAULT_BEAMWIDTH_FACTOR,
    Sensitivity,
    beamwidth_deg,
    db_to_linear,
    friis_cascade_k,
    hi_antenna_temperature_k,
    linear_to_db,
    noise_power_dbm,
    passive_noise_temp_k,
    sensitivity_k,
)
from spinflip.daemon.calibration.y_factor import (
    T0_K,
    noise_figure_db,
    noise_temperature_k,
)
from spinflip.daemon.error_line import quoted
from spinflip.daemon.sky.hi_line import C_M_S, HI_REST_FREQ_HZ
from spinflip.daemon.toml_file import TomlFileError, read_toml

#: Noise figure of an R820T-class 8-bit dongle at 1.4 GHz, dB (cautious; from memory).
DEFAULT_DONGLE_NF_DB = 6.0
#: Lowest useful noise power at the dongle input over the sample rate, dBm (rough; from memory).
DEFAULT_ADC_MIN_INPUT_DBM = -100.0
#: Noise power at the dongle input where the 8-bit ADC starts to clip at the lowest tuner gain,
#: dBm (rough; from memory).
DEFAULT_ADC_MAX_INPUT_DBM = -40.0
#: Largest share of T_sys the dongle's own noise may have before a warning.
DEFAULT_MAX_NOISE_FRACTION = 0.10
#: HI brightness temperature of the Galactic plane at its peak, K (50-100 K; from memory).
DEFAULT_HI_BRIGHTNESS_K = 80.0
#: Observing defaults: sample rate (Hz), channels, integration (s).
DEFAULT_SAMPLE_RATE_HZ = 2.4e6
DEFAULT_CHANNELS = 1024
DEFAULT_INTEGRATION_S = 10.0

#: The profiles that come with spinflip (present in a source checkout or editable install).
SHIPPED_PROFILES_DIR = Path(__file__).resolve().parents[2] / "hardware" / "profiles"


class ProfileError(ValueError):
    """A receiver-chain profile that cannot be used (one-line message; exit code 2)."""




# ----------------------------------------------------------------------------------------------
# the profile
# ----------------------------------------------------------------------------------------------
@dataclass(frozen=True)
class _Num:
    """A numeric key: range, unit, default (None = required), integer or not."""

    lo: float
    hi: float
    unit: str = ""
    default: Any = None
    lo_open: bool = False
    integer: bool = False

    def allowed(self) -> str:
        kind = "an integer" if self.integer else "a number"
        lo = f"above {self.lo:g}" if self.lo_open else f"from {self.lo:g}"
        unit = f" {self.unit}" if self.unit else ""
        return f"{kind} {lo} to {self.hi:g}{unit}"


@dataclass(frozen=True)
class _Text:
    """A string key (non-empty), optionally one of some choices."""

    default: Any = None
    choices: tuple = ()

    def allowed(self) -> str:
        if self.choices:
            return "one of " + ", ".join(repr(c) for c in self.choices)
        return "a non-empty string"


_TELESCOPE = {
    "name": _Text(),
    "dish_diameter_m": _Num(0.1, 100.0, "m"),
    "aperture_efficiency": _Num(0.0, 1.0, lo_open=True),
    "beamwidth_factor": _Num(0.8, 2.0, default=DEFAULT_BEAMWIDTH_FACTOR),
}
_SKY = {
    "sky_k": _Num(2.7, 1000.0, "K"),
    "spillover_k": _Num(0.0, 300.0, "K"),
    "continuum_k": _Num(0.0, 1000.0, "K", default=0.0),
    "hi_brightness_k": _Num(0.0, 300.0, "K", default=DEFAULT_HI_BRIGHTNESS_K),
}
_STAGE_COMMON = {
    "name": _Text(),
    "kind": _Text(choices=("amplifier", "passive")),
}
_AMPLIFIER = {
    "gain_db": _Num(-30.0, 70.0, "dB"),
    "noise_figure_db": _Num(0.0, 20.0, "dB", default=None),
    "noise_temp_k": _Num(0.0, 30000.0, "K", default=None),
}
_PASSIVE = {
    "loss_db": _Num(0.0, 40.0, "dB"),
    "physical_temp_k": _Num(0.0, 400.0, "K", default=T0_K, lo_open=True),
}
_DONGLE = {
    "name": _Text(default="8-bit USB dongle"),
    "noise_figure_db": _Num(0.0, 20.0, "dB", default=None),
    "noise_temp_k": _Num(0.0, 30000.0, "K", default=None),
    "adc_min_input_dbm": _Num(-200.0, 20.0, "dBm", default=DEFAULT_ADC_MIN_INPUT_DBM),
    "adc_max_input_dbm": _Num(-200.0, 20.0, "dBm", default=DEFAULT_ADC_MAX_INPUT_DBM),
    "max_noise_fraction": _Num(0.0, 1.0, default=DEFAULT_MAX_NOISE_FRACTION, lo_open=True),
}
_OBSERVING = {
    "sample_rate_hz": _Num(225001.0, 3.2e6, "Hz", default=DEFAULT_SAMPLE_RATE_HZ),
    "channels": _Num(8, 1048576, default=DEFAULT_CHANNELS, integer=True),
    "integration_s": _Num(0.0, 86400.0, "s", default=DEFAULT_INTEGRATION_S, lo_open=True),
}
_SECTIONS = ("telescope", "sky", "stage", "dongle", "observing")
_REQUIRED_SECTIONS = ("telescope", "sky", "stage")
#: Keys whose "required" is decided by the either-or rule, not by their own default.
_EITHER_NOISE = ("noise_figure_db", "noise_temp_k")


@dataclass(frozen=True)
class Stage:
    """One stage of the chain, resolved to a noise temperature and a linear gain.

    Attributes
    ----------
    name, kind : from the profile ("amplifier", "passive" or "dongle")
    gain_db : power gain, dB (passive: minus the loss); None for the dongle (its tuner gain does
        not enter the cascade)
    noise_figure_db : noise figure, dB (IEEE, T0 = 290 K)
    noise_temp_k : noise temperature referred to the stage's input, K
    """

    name: str
    kind: str
    gain_db: float | None
    noise_figure_db: float
    noise_temp_k: float


@dataclass(frozen=True)
class Profile:
    """A validated receiver-chain profile (see the module docstring for the keys)."""

    source: str
    telescope_name: str
    dish_diameter_m: float
    aperture_efficiency: float
    beamwidth_factor: float
    sky_k: float
    spillover_k: float
    continuum_k: float
    hi_brightness_k: float
    stages: tuple[Stage, ...]          # the listed stages, then the dongle last
    adc_min_input_dbm: float
    adc_max_input_dbm: float
    max_noise_fraction: float
    sample_rate_hz: float
    channels: int
    integration_s: float


@overload
def _check_value(where: str, key: str, spec: _Text, value: Any) -> str: ...
@overload
def _check_value(where: str, key: str, spec: _Num, value: Any) -> float | int: ...
def _check_value(where: str, key: str, spec: _Num | _Text, value: Any) -> float | int | str:
    """Type and range of one value (as TOML gave it); returns it as float / int / str."""
    if isinstance(spec, _Text):
        if not isinstance(value, str) or not value.strip() or "\n" in value:
            raise ProfileError(f"{where}: {key} = {quoted(value)}: expected {spec.allowed()}")
        if spec.choices and value not in spec.choices:
            raise ProfileError(f"{where}: {key} = {quoted(value)}: expected {spec.allowed()}")
        return value
    if spec.integer:
        ok = isinstance(value, int) and not isinstance(value, bool)
    else:
        ok = isinstance(value, numbers.Real) and not isinstance(value, bool)
    if not ok or not math.isfinite(float(value)):
        raise ProfileError(f"{where}: {key} = {quoted(value)}: expected {spec.allowed()}")
    v = int(value) if spec.integer else float(value)
    low_bad = v <= spec.lo if spec.lo_open else v < spec.lo
    if low_bad or v > spec.hi:
        raise ProfileError(f"{where}: {key} = {v!r}: expected {spec.allowed()}")
    return v


def _section(where: str, prefix: str, table: object, schema: dict, either_noise: bool = False) -> dict:
    """Validate one table against its schema: unknown, missing, type, range."""
    if not isinstance(table, dict):
        raise ProfileError(f"{where}: {prefix} = {quoted(table)}: expected a table "
                           f"([{prefix}])")
    for key in table:
        if key not in schema:
            raise ProfileError(f"{where}: {prefix}.{key} = {quoted(table[key])}: unknown key; "
                               f"allowed: {', '.join(schema)}")
    out = {}
    for key, spec in schema.items():
        if key in table:
            out[key] = _check_value(where, f"{prefix}.{key}", spec, table[key])
        elif either_noise and key in _EITHER_NOISE:
            continue
        elif spec.default is None:
            raise ProfileError(f"{where}: {prefix}.{key}: missing; expected {spec.allowed()}")
        else:
            out[key] = spec.default
    if either_noise:
        given = [k for k in _EITHER_NOISE if k in table]
        if len(given) == 2:
            raise ProfileError(f"{where}: {prefix}.noise_temp_k = {quoted(table['noise_temp_k'])}"
                               f": give noise_figure_db or noise_temp_k, not both")
    return out


def _noise_pair(values: dict, default_nf_db: float | None, where: str,
                prefix: str) -> tuple[float, float]:
    """(noise figure dB, noise temperature K) from whichever of the two the table gave."""
    if "noise_figure_db" in values:
        nf_db = values["noise_figure_db"]
        return nf_db, noise_temperature_k(nf_db)            # T = T0 (10^(NF/10) - 1)
    if "noise_temp_k" in values:
        t_k = values["noise_temp_k"]
        return noise_figure_db(t_k), t_k                    # NF = 10 log10(1 + T / T0)
    if default_nf_db is None:
        raise ProfileError(f"{where}: {prefix}.noise_figure_db: missing; give noise_figure_db "
                           f"(0 to 20 dB) or noise_temp_k (0 to 30000 K)")
    return default_nf_db, noise_temperature_k(default_nf_db)


def profile_from_dict(data: dict, where: str = "profile") -> Profile:
    """Validate a parsed profile (the TOML document as a dict) and resolve its stages.

    Parameters
    ----------
    data : dict
        The parsed TOML document.
    where : str
        What to name in error messages (the file).

    Returns
    -------
    Profile

    Raises
    ------
    ProfileError
        One line naming the key, the value and what is allowed.
    """
    if not isinstance(data, dict):
        raise ProfileError(f"{where}: expected a TOML document (a table at the top)")
    for key in data:
        if key not in _SECTIONS:
            raise ProfileError(f"{where}: {key} = {quoted(data[key])}: unknown section; allowed: "
                               "[telescope], [sky], [[stage]], [dongle], [observing]")
    for key in _REQUIRED_SECTIONS:
        if key not in data:
            what = "[[stage]] tables (one or more)" if key == "stage" else f"a [{key}] table"
            raise ProfileError(f"{where}: {key}: missing; expected {what}")
    tel = _section(where, "telescope", data["telescope"], _TELESCOPE)
    sky = _section(where, "sky", data["sky"], _SKY)
    dongle = _section(where, "dongle", data.get("dongle", {}), _DONGLE, either_noise=True)
    obs = _section(where, "observing", data.get("observing", {}), _OBSERVING)
    if dongle["adc_min_input_dbm"] >= dongle["adc_max_input_dbm"]:
        raise ProfileError(f"{where}: dongle.adc_min_input_dbm = {dongle['adc_min_input_dbm']!r}: "
                           f"expected below dongle.adc_max_input_dbm "
                           f"({dongle['adc_max_input_dbm']!r})")

    raw_stages = data["stage"]
    if not isinstance(raw_stages, list) or not raw_stages:
        raise ProfileError(f"{where}: stage = {quoted(raw_stages)}: expected one or more "
                           "[[stage]] tables")
    stages = []
    for i, raw in enumerate(raw_stages):
        prefix = f"stage[{i + 1}]"
        if not isinstance(raw, dict):
            raise ProfileError(f"{where}: {prefix} = {quoted(raw)}: expected a [[stage]] table")
        if "kind" not in raw:
            raise ProfileError(f"{where}: {prefix}.kind: missing; expected "
                               f"{_STAGE_COMMON['kind'].allowed()}")
        kind = _check_value(where, f"{prefix}.kind", _STAGE_COMMON["kind"], raw["kind"])
        if kind == "amplifier":
            vals = _section(where, prefix, raw, {**_STAGE_COMMON, **_AMPLIFIER}, either_noise=True)
            nf_db, t_k = _noise_pair(vals, None, where, prefix)
            stages.append(Stage(vals["name"], kind, vals["gain_db"], nf_db, t_k))
        else:
            vals = _section(where, prefix, raw, {**_STAGE_COMMON, **_PASSIVE})
            t_k = passive_noise_temp_k(vals["loss_db"], vals["physical_temp_k"])
            stages.append(Stage(vals["name"], kind, -vals["loss_db"], noise_figure_db(t_k), t_k))
    nf_db, t_k = _noise_pair(dongle, DEFAULT_DONGLE_NF_DB, where, "dongle")
    stages.append(Stage(dongle["name"], "dongle", None, nf_db, t_k))

    return Profile(
        source=where, telescope_name=tel["name"], dish_diameter_m=tel["dish_diameter_m"],
        aperture_efficiency=tel["aperture_efficiency"], beamwidth_factor=tel["beamwidth_factor"],
        sky_k=sky["sky_k"], spillover_k=sky["spillover_k"], continuum_k=sky["continuum_k"],
        hi_brightness_k=sky["hi_brightness_k"], stages=tuple(stages),
        adc_min_input_dbm=dongle["adc_min_input_dbm"],
        adc_max_input_dbm=dongle["adc_max_input_dbm"],
        max_noise_fraction=dongle["max_noise_fraction"],
        sample_rate_hz=obs["sample_rate_hz"], channels=obs["channels"],
        integration_s=obs["integration_s"])


def load_profile(path: str | os.PathLike[str]) -> Profile:
    """Read and validate a profile TOML file.

    Parameters
    ----------
    path : str or path-like

    Returns
    -------
    Profile

    Raises
    ------
    ProfileError
        One line: the file missing, unreadable or not valid TOML (naming the file), or a key
        wrong (naming the file, the key, the value and what is allowed).
    """
    p = Path(path)
    try:
        data = read_toml(p, "profile")
    except TomlFileError as exc:
        raise ProfileError(str(exc)) from None
    return profile_from_dict(data, str(p))


def shipped_profiles() -> list[Path]:
    """The profiles in ``hardware/profiles`` (source checkout or editable install), sorted."""
    return sorted(SHIPPED_PROFILES_DIR.glob("*.toml"))


# ----------------------------------------------------------------------------------------------
# the budget
# ----------------------------------------------------------------------------------------------
@dataclass(frozen=True)
class StageRow:
    """One stage's line in the budget: the stage, its contribution, the gain after it."""

    stage: Stage
    contribution_k: float              # T_i / (G_1 ... G_{i-1}), referred to the feed input
    cumulative_gain_db: float | None   # gain from the feed input to this stage's output


@dataclass(frozen=True)
class Budget:
    """Everything :mod:`chain_table` shows, computed from a :class:`Profile`."""

    profile: Profile
    rows: tuple[StageRow, ...]
    cascade_k: float                   # T_cascade incl. the dongle, at the feed input
    loss_ahead_k: float                # contributions of passive stages before any amplifier
    sky_k: float                       # T_sky + T_continuum
    spillover_k: float
    tsys_k: float
    hpbw_deg: float
    channel_hz: float
    channel_km_s: float                # channel width in radio velocity, km/s
    sensitivity: Sensitivity
    hi_antenna_k: float
    gain_before_dongle_db: float
    dongle_k: float                    # the dongle's contribution at the feed input
    dongle_fraction: float             # dongle_k / tsys_k
    needed_gain_db: float              # gain before the dongle for dongle_k = fraction * tsys
    dongle_input_dbm: float            # P_in = k T_b B_s G_b
    warnings: tuple[str, ...] = field(default_factory=tuple)


def chain_budget(profile: Profile) -> Budget:
    """Cascade, T_sys, beam, radiometer noise, HI antenna temperature and gain warnings.

    Parameters
    ----------
    profile : Profile

    Returns
    -------
    Budget

    Notes
    -----
    The formulas are in the module docstring. Warning rule (one line each in ``warnings``):
    with G_b the gain before the dongle, T_b the system temperature without the dongle and
    P_in = k T_b B_s G_b the noise power at the dongle input over the sample rate B_s, warn if
    T_dongle / G_b > max_noise_fraction * T_sys (gain too low: the dongle's noise is not
    negligible), if P_in < adc_min_input_dbm (too little noise for the 8-bit ADC even at top
    tuner gain) or if P_in > adc_max_input_dbm (the ADC clips even at the lowest tuner gain).
    """
    stages = profile.stages
    gains = [db_to_linear(s.gain_db) if s.gain_db is not None else 1.0 for s in stages]
    cascade = friis_cascade_k([s.noise_temp_k for s in stages], gains)
    rows = tuple(StageRow(s, c, linear_to_db(g) if s.kind != "dongle" else None)
                 for s, c, g in zip(stages, cascade.contributions_k, cascade.cumulative_gains,
                                    strict=True))

    loss_ahead_k = 0.0
    for s, c in zip(stages, cascade.contributions_k, strict=True):
        if s.kind != "passive":
            break
        loss_ahead_k += c

    sky_k = profile.sky_k + profile.continuum_k
    tsys_k = sky_k + profile.spillover_k + cascade.total_k     # T_sys at the feed input

    g_before = cascade.gains_before[-1]                          # G_1 ... G_{n-1}
    dongle_k = cascade.contributions_k[-1]                       # T_dongle / G_b
    t_before_k = tsys_k - dongle_k                               # T_b: all but the dongle
    frac = profile.max_noise_fraction
    # T_d / G = f (T_b + T_d / G)  <=>  G = T_d (1 - f) / (f T_b)
    needed_gain = stages[-1].noise_temp_k * (1.0 - frac) / (frac * t_before_k)
    p_in_dbm = noise_power_dbm(t_before_k, profile.sample_rate_hz, linear_to_db(g_before))

    channel_hz = profile.sample_rate_hz / profile.channels
    channel_km_s = C_M_S * channel_hz / HI_REST_FREQ_HZ / 1e3   # dv = c dnu / nu0
    sens = sensitivity_k(tsys_k, channel_hz, profile.integration_s)

    warnings = []
    g_before_db = linear_to_db(g_before)
    needed_db = linear_to_db(needed_gain) if needed_gain > 0 else -math.inf
    if dongle_k > frac * tsys_k:
        warnings.append(
            f"gain before the dongle {g_before_db:.1f} dB is too low: the dongle adds "
            f"{dongle_k:.1f} K ({100 * dongle_k / tsys_k:.0f} % of Tsys, allowed "
            f"{100 * frac:.0f} %); the chain needs at least {needed_db:.1f} dB of gain ahead of "
            "the dongle (add or move an LNA)")
    if p_in_dbm < profile.adc_min_input_dbm:
        warnings.append(
            f"noise at the dongle input {p_in_dbm:.1f} dBm is below the 8-bit ADC's usable "
            f"range (from {profile.adc_min_input_dbm:g} dBm): add gain before the dongle")
    if p_in_dbm > profile.adc_max_input_dbm:
        warnings.append(
            f"noise at the dongle input {p_in_dbm:.1f} dBm is above the 8-bit ADC's usable "
            f"range (to {profile.adc_max_input_dbm:g} dBm): it will clip; add attenuation")

    return Budget(
        profile=profile, rows=rows, cascade_k=cascade.total_k, loss_ahead_k=loss_ahead_k,
        sky_k=sky_k, spillover_k=profile.spillover_k, tsys_k=tsys_k,
        hpbw_deg=beamwidth_deg(profile.dish_diameter_m, factor=profile.beamwidth_factor),
        channel_hz=channel_hz, channel_km_s=channel_km_s, sensitivity=sens,
        hi_antenna_k=hi_antenna_temperature_k(profile.hi_brightness_k,
                                              profile.aperture_efficiency),
        gain_before_dongle_db=g_before_db, dongle_k=dongle_k, dongle_fraction=dongle_k / tsys_k,
        needed_gain_db=needed_db, dongle_input_dbm=p_in_dbm, warnings=tuple(warnings))
