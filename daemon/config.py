"""Configuration: one TOML file, every key with a default, strict validation.

A wrong section, key, type or range raises :class:`ConfigError` whose message is one line
naming the key, the value and what is allowed; the command line turns it into exit code 2.
"""

from __future__ import annotations

import copy
import datetime as _dt
import math
from dataclasses import dataclass
from pathlib import Path
from typing import Any

from spinflip.daemon.error_line import quoted
from spinflip.daemon.sky.line_constants import HI_REST_FREQ_HZ
from spinflip.daemon.toml_file import TomlFileError, read_toml


class ConfigError(ValueError):
    """A configuration value that cannot be used (exit code 2)."""


@dataclass(frozen=True)
class Key:
    """One configuration key: default, type and allowed range or choices."""

    default: Any
    kind: type
    lo: float | None = None
    hi: float | None = None
    choices: tuple | None = None
    doc: str = ""

    def allowed(self) -> str:
        if self.choices:
            return "one of " + ", ".join(repr(c) for c in self.choices)
        name = {float: "a number", int: "an integer", bool: "true or false", str: "a string",
                list: "a list"}[self.kind]
        if self.lo is not None and self.hi is not None:
            return f"{name} from {self.lo:g} to {self.hi:g}"
        if self.lo is not None:
            return f"{name} >= {self.lo:g}"
        return name


#: Default live data endpoint of the daemon (``publish.data``; ``spinflip watch --connect``).
DEFAULT_DATA_ENDPOINT = "tcp://127.0.0.1:5621"
#: Default control endpoint of the daemon (``publish.control``; ``spinflip ctl --connect``).
DEFAULT_CONTROL_ENDPOINT = "tcp://127.0.0.1:5622"

#: The schema: section -> key -> Key. The site, telescope and sky are fictional defaults.
SCHEMA: dict[str, dict[str, Key]] = {
    "site": {
        "name": Key("Heron Ridge Field Station", str, doc="site name (fictional default)"),
        "telescope": Key("HRFS 3 m dish", str, doc="TELESCOP keyword"),
        "lat": Key(46.82, float, -90, 90, doc="geodetic latitude, deg"),
        "lon": Key(8.37, float, -180, 360, doc="east longitude, deg"),
        "height_m": Key(640.0, float, -500, 9000, doc="height above the ellipsoid, m"),
        "dish_diameter_m": Key(3.0, float, 0.1, 100, doc="aperture diameter for the beam, m"),
    },
    "source": {
        "kind": Key("sim", str, choices=("sim", "rtlsdr", "replay")),
        "device": Key("0", str, doc="rtlsdr: device index or serial number"),
        "sample_rate": Key(2.4e6, float, 225001, 3.2e6,
                           doc="complex samples per second: 225001-300000 or 900001-3200000"),
        "center_freq": Key(HI_REST_FREQ_HZ, float, 24e6, 1.766e9, doc="signal-phase LO, Hz"),
        "gain": Key(40.2, float, 0, 50, doc="tuner gain, dB (manual, AGC off)"),
        "ppm": Key(0, int, -200, 200, doc="crystal correction, parts per million"),
        "bias_tee": Key(False, bool, doc="power the LNA through the coax"),
        "path": Key("", str, doc="replay: .cu8 file"),
        "replay_loop": Key(False, bool, doc="replay: start the file again at its end (soak "
                           "tests of the daemon's own cost on a capture)"),
        "block_samples": Key(262144, int, 16384, 4194304, doc="complex samples per block"),
        "reconnect_max_s": Key(30.0, float, 1, 600, doc="rtlsdr: longest wait between attempts "
                               "to reopen a lost dongle, s (the wait doubles from 1 s)"),
    },
    "sim": {
        "start": Key("now", str, doc="UTC ISO time of the first sample, or 'now'"),
        "seed": Key(1, int, 0, 2**32 - 1),
        "receiver_k": Key(55.0, float, 1, 2000, doc="receiver noise temperature, K"),
        "spillover_k": Key(12.0, float, 0, 300, doc="ground pick-up through sidelobes, K"),
        "gain_drift": Key(0.02, float, 0, 0.5, doc="peak fractional gain drift"),
        "gain_drift_period_s": Key(900.0, float, 1, 1e6, doc="period of the gain drift, s"),
        "rfi": Key(False, bool, doc="inject interference (carriers and bursts)"),
        "noise_source_k": Key(70.0, float, 0, 5000,
                              doc="true excess temperature of the simulated noise source, K"),
        "ambient_k": Key(290.0, float, 200, 330, doc="physical temperature of the hot load, K"),
        "cold_sky_k": Key(5.0, float, 2.7, 100, doc="true sky temperature toward the cold load, K"),
    },
    "spectrometer": {
        "channels": Key(1024, int, 64, 65536, doc="power of two"),
        "method": Key("pfb", str, choices=("pfb", "fft")),
        "taps": Key(4, int, 2, 16, doc="PFB taps per channel"),
        "integration_s": Key(10.0, float, 0.5, 3600, doc="observing time per saved row, s"),
    },
    "switching": {
        "mode": Key("frequency", str, choices=("frequency", "none")),
        "offset_hz": Key(-0.8e6, float, -10e6, 10e6, doc="reference LO minus signal LO, Hz"),
        "dwell_s": Key(0.5, float, 0.05, 60, doc="time in each phase, s"),
        "settle_s": Key(0.02, float, 0, 1, doc="samples blanked after each hop, s"),
    },
    "calibration": {
        "tsys_from": Key("noise_source", str, choices=("noise_source", "loads", "fixed"),
                         doc="where Tsys for the kelvin scale comes from"),
        "tsys_k": Key(85.0, float, 1, 5000, doc="tsys_from = 'fixed': the system temperature, K"),
        "noise_source_k": Key(0.0, float, 0, 5000,
                              doc="noise source excess temperature, K; 0: not given"),
        "cal_interval_s": Key(60.0, float, 2, 86400, doc="noise source fired this often, s"),
        "cal_on_s": Key(1.0, float, 0.05, 60,
                        doc="noise source on per firing, s (whole switching cycles)"),
        "tsys_max_age_s": Key(600.0, float, 10, 86400,
                              doc="rows whose newest Tsys is older are flagged, s"),
        "switch": Key("none", str, choices=("none", "command", "gpio"),
                      doc="how the noise source is switched (the simulator has its own)"),
        "switch_on_cmd": Key("", str, doc="switch = 'command': shell command turning it on"),
        "switch_off_cmd": Key("", str, doc="switch = 'command': shell command turning it off"),
        "switch_timeout_s": Key(5.0, float, 0.1, 60, doc="longest a switch command may take, s"),
        "gpio_chip": Key("/dev/gpiochip0", str, doc="switch = 'gpio': GPIO character device"),
        "gpio_line": Key(-1, int, -1, 1023, doc="switch = 'gpio': line offset; -1: not given"),
        "gpio_active_low": Key(False, bool, doc="switch = 'gpio': the line is active low"),
        "t_hot_k": Key(290.0, float, 200, 400, doc="hot load temperature (absorber), K"),
        "t_cold_k": Key(10.0, float, 2.7, 150, doc="cold load temperature (cold sky), K"),
        "loads_s": Key(5.0, float, 0.5, 600, doc="seconds measured on each load"),
        "records": Key("", str, doc="folder of hot/cold records; empty: <output.dir>/calibration"),
        "max_record_age_s": Key(21600.0, float, 60, 3.2e7,
                                doc="a hot/cold record older than this is refused, s"),
        "main_beam_efficiency": Key(1.0, float, 0.05, 1.0,
                                    doc="eta_mb: DATA = T_A / eta_mb (1: antenna temperature)"),
    },
    "baseline": {
        "mode": Key("auto", str, choices=("auto", "windows", "off"),
                    doc="line-free channels found automatically, given as windows, or no fit"),
        "order": Key(1, int, 0, 8, doc="polynomial order"),
        "windows_km_s": Key([], list, doc="line-free LSRK velocity windows [[lo, hi], ...], km/s"),
    },
    "rfi": {
        "flag_dc": Key(True, bool, doc="flag the channel at the LO (DC spike)"),
        "impulses": Key(True, bool, doc="blank spectra hit by short broadband bursts"),
        "impulse_sigma": Key(6.0, float, 3, 100, doc="impulse threshold, robust sigmas"),
        "sk": Key(True, bool, doc="spectral kurtosis per channel and block"),
        "sk_pfa": Key(0.0013, float, 1e-7, 0.1,
                      doc="spectral kurtosis false-alarm probability, each side"),
        "carriers": Key(True, bool, doc="find persistent narrow-band carriers"),
        "carrier_sigma": Key(5.0, float, 3, 100, doc="carrier threshold, robust sigmas"),
        "carrier_history": Key(3, int, 1, 20, doc="integrations in the carriers' running mean"),
        "spurs_hz": Key([], list, doc="the receiver's own lines: offsets from the LO, Hz"),
        "masks_mhz": Key([], list, doc="polluted sky-frequency ranges [[lo, hi], ...], MHz"),
    },
    "pointing": {
        "frame": Key("auto", str, choices=("auto", "galactic", "azel", "radec")),
        "lon": Key(30.0, float, -360, 360, doc="l, az or RA in deg"),
        "lat": Key(0.0, float, -90, 90, doc="b, el or Dec in deg"),
        "object": Key("", str, doc="OBJECT name; empty: made from the position"),
        "min_elevation": Key(10.0, float, -5, 89, doc="lowest usable elevation, deg"),
        "horizon": Key([], list, doc="horizon mask for plans: [az, el] pairs in deg (trees, "
                       "buildings), interpolated in azimuth; empty: flat"),
        "sun_avoid_deg": Key(15.0, float, 0, 90, doc="plans keep this far from the Sun, deg"),
        "slew_deg_s": Key(2.0, float, 0.01, 30, doc="slew speed per axis for plans, deg/s"),
        "settle_s": Key(5.0, float, 0, 600, doc="time after a slew before observing, s"),
        "driver": Key("none", str, choices=("none", "manual", "rotator"),
                      doc="what points the dish: nothing (a fixed dish), the observer by hand, "
                      "or a rotator behind rotctld ([rotator])"),
    },
    "rotator": {
        "endpoint": Key("127.0.0.1:4533", str, doc="rotctld's TCP endpoint, host:port"),
        "tolerance_deg": Key(1.0, float, 0.01, 30, doc="on target when this close, deg"),
        "timeout_s": Key(120.0, float, 1, 3600, doc="longest a slew may take, s"),
        "answer_s": Key(3.0, float, 0.1, 60, doc="longest wait for one answer of rotctld, s"),
        "poll_s": Key(0.5, float, 0.05, 10, doc="position read this often while slewing, s"),
        "track_fraction": Key(0.1, float, 0.01, 1, doc="re-command when the target has moved "
                              "this fraction of the beam FWHM (at most tolerance_deg / 2)"),
        "az_range": Key([0.0, 360.0], list, doc="the rotator's azimuth limits [lo, hi], deg "
                        "(within -180..540)"),
        "el_range": Key([0.0, 90.0], list, doc="the rotator's elevation limits [lo, hi], deg"),
        "park": Key([0.0, 90.0], list, doc="park position [az, el], deg (inside the limits)"),
    },
    "output": {
        "dir": Key("spinflip-data", str),
        "hold_mb": Key(64.0, float, 1, 4096, doc="spectra held in memory while the disk refuses"
                       " writes (full disk), MB; past it new integrations are dropped and said so"),
    },
    "publish": {
        "data": Key(DEFAULT_DATA_ENDPOINT, str, doc="live data (PUB) endpoint; '' for none"),
        "control": Key(DEFAULT_CONTROL_ENDPOINT, str, doc="control (ROUTER, answers REQ clients) endpoint; '' for none"),
        "keys": Key("", str, doc="folder of CURVE keys (spinflip keys); '' for none"),
        "allow_insecure": Key(False, bool, doc="bind beyond loopback without keys (warned)"),
    },
}


def defaults() -> dict[str, dict[str, Any]]:
    """A fresh dictionary of every key's default (deep copies: lists are not shared)."""
    return {s: {k: copy.deepcopy(v.default) for k, v in keys.items()} for s, keys in SCHEMA.items()}


def _check(section: str, key: str, value: Any) -> Any:
    spec = SCHEMA[section][key]
    where = f"{section}.{key}"
    if (section, key) in _PAIRS:
        return _check_pair(where, value, *_PAIRS[section, key])
    ok_type = isinstance(value, spec.kind) and not (spec.kind is not bool and isinstance(value, bool))
    if spec.kind is float and isinstance(value, int) and not isinstance(value, bool):
        value, ok_type = float(value), True
    if not ok_type:
        raise ConfigError(f"config {where} = {quoted(value)}: expected {spec.allowed()}")
    if spec.kind is float and not math.isfinite(value):
        raise ConfigError(f"config {where} = {quoted(value)}: expected {spec.allowed()}")
    if spec.kind is str and section in ("site", "pointing") and not (value.isascii() and value.isprintable()):
        raise ConfigError(f"config {where} = {quoted(value)}: expected printable ASCII (it goes into FITS headers)")
    if section == "rotator" and key == "endpoint" and isinstance(value, str):
        if split_host_port(value) is None:
            raise ConfigError(f"config {where} = {quoted(value)}: expected host:port with a port "
                              "from 1 to 65535, e.g. '127.0.0.1:4533'")
    if spec.kind is list:
        if key == "spurs_hz":
            return _check_numbers(where, value)
        if key == "horizon":
            return _check_horizon(where, value)
        return _check_windows(where, value)
    if spec.choices and value not in spec.choices:
        raise ConfigError(f"config {where} = {quoted(value)}: expected {spec.allowed()}")
    if spec.lo is not None and value < spec.lo or spec.hi is not None and value > spec.hi:
        raise ConfigError(f"config {where} = {quoted(value)}: expected {spec.allowed()}")
    return value


#: Keys that are one pair of numbers: (what the pair is, lowest, highest, the first < the second).
_PAIRS: dict[tuple[str, str], tuple[str, float, float, bool]] = {
    ("rotator", "az_range"): ("[lo, hi] in deg", -180.0, 540.0, True),
    ("rotator", "el_range"): ("[lo, hi] in deg", 0.0, 90.0, True),
    ("rotator", "park"): ("[az, el] in deg", -180.0, 540.0, False),
}


def _check_pair(where: str, value: Any, what: str, lo: float, hi: float, ordered: bool) -> list:
    """One pair of finite numbers within [lo, hi] (and first < second when ``ordered``);
    ``rotator.park``'s elevation is held to 0..90."""
    ok = (isinstance(value, list) and len(value) == 2
          and all(isinstance(x, (int, float)) and not isinstance(x, bool) and math.isfinite(x)
                  for x in value))
    if ok and ordered:
        ok = lo <= value[0] < value[1] <= hi
    elif ok:
        ok = lo <= value[0] <= hi and 0.0 <= value[1] <= 90.0
    if not ok:
        rule = (f"{lo:g} <= lo < hi <= {hi:g}" if ordered
                else f"az from {lo:g} to {hi:g}, el from 0 to 90")
        raise ConfigError(f"config {where} = {quoted(value)}: expected {what}, {rule}")
    return [float(value[0]), float(value[1])]


def split_host_port(text: str) -> tuple[str, int] | None:
    """``"host:port"`` (``"[::1]:4533"`` for IPv6) as ``(host, port)``, or None when it is not
    one (no host, or a port that is not a whole number from 1 to 65535)."""
    host, sep, port = text.rpartition(":")
    if host.startswith("[") and host.endswith("]"):
        host = host[1:-1]
    if (not sep or not host or not host.isascii() or not host.isprintable() or " " in host
            or not port.isdigit() or not port.isascii() or not 1 <= int(port) <= 65535):
        return None
    return host, int(port)


def _check_horizon(where: str, value: list) -> list:
    """A horizon mask: [az, el] pairs, az 0..360 and el 0..90 deg."""
    out = []
    for w in value:
        ok = (isinstance(w, list) and len(w) == 2
              and all(isinstance(x, (int, float)) and not isinstance(x, bool)
                      and math.isfinite(x) for x in w)
              and 0 <= w[0] <= 360 and 0 <= w[1] <= 90)
        if not ok:
            raise ConfigError(f"config {where} = {quoted(value)}: expected a list of [az, el] "
                              f"pairs in deg (az 0-360, el 0-90), e.g. [[0, 5], [120, 25]]; "
                              f"{quoted(w)} is not")
        out.append([float(w[0]), float(w[1])])
    return out


def _check_numbers(where: str, value: list) -> list:
    """A list of finite numbers."""
    for x in value:
        if isinstance(x, bool) or not isinstance(x, (int, float)) or not math.isfinite(x):
            raise ConfigError(f"config {where} = {quoted(value)}: expected a list of numbers, e.g. "
                              f"[-300000, 450000]; {x!r} is not")
    return [float(x) for x in value]


def _check_windows(where: str, value: list) -> list:
    """A list of [lo, hi] pairs (velocities in km/s, frequencies in MHz) with lo < hi."""
    out = []
    for w in value:
        ok = (isinstance(w, list) and len(w) == 2
              and all(isinstance(x, (int, float)) and not isinstance(x, bool)
                      and math.isfinite(x) for x in w))
        if not ok or not w[0] < w[1]:
            raise ConfigError(f"config {where} = {quoted(value)}: expected a list of [lo, hi] pairs of "
                              f"numbers with lo < hi, e.g. [[-250, -150], [180, 250]]; {w!r} is not")
        out.append([float(w[0]), float(w[1])])
    return out


def merge(cfg: dict, overrides: dict, origin: str = "config") -> dict:
    """Validate ``overrides`` (section -> key -> value) and merge them into ``cfg``."""
    for section, keys in overrides.items():
        if section not in SCHEMA:
            raise ConfigError(
                f"{origin}: unknown section [{section}]: allowed sections are " + ", ".join(SCHEMA))
        if not isinstance(keys, dict):
            raise ConfigError(f"{origin}: [{section}] must be a table of keys, got {keys!r}")
        for key, value in keys.items():
            if key not in SCHEMA[section]:
                raise ConfigError(f"{origin}: unknown key {section}.{key}: allowed keys are "
                                  + ", ".join(SCHEMA[section]))
            cfg[section][key] = _check(section, key, value)
    _cross_checks(cfg)
    return cfg


def utc_start(text: str) -> str:
    """``sim.start``: ``"now"`` or a UTC ISO 8601 time, returned as ``YYYY-MM-DDTHH:MM:SS[.f]``.

    Raises
    ------
    ConfigError
        Not a time (one line naming ``sim.start``), or one with a UTC offset other than 0.
    """
    if text == "now":
        return text
    try:
        t = _dt.datetime.fromisoformat(text)
    except ValueError:
        raise ConfigError(f"config sim.start = {quoted(text)}: expected 'now' or a UTC time "
                          "in ISO 8601, e.g. '2026-03-01T04:00:00'") from None
    if t.utcoffset() not in (None, _dt.timedelta(0)):
        raise ConfigError(f"config sim.start = {quoted(text)}: expected a UTC time (no offset "
                          "other than Z or +00:00)")
    return t.replace(tzinfo=None).isoformat()


def _cross_checks(cfg: dict) -> None:
    cfg["sim"]["start"] = utc_start(cfg["sim"]["start"])
    n = cfg["spectrometer"]["channels"]
    if n & (n - 1):
        raise ConfigError(f"config spectrometer.channels = {n}: expected a power of two")
    fs = cfg["source"]["sample_rate"]
    if not (225001 <= fs <= 300000 or 900001 <= fs <= 3.2e6):
        raise ConfigError(f"config source.sample_rate = {fs:g}: the RTL2832U supports 225001-300000 "
                          "or 900001-3200000 samples/s")
    sw = cfg["switching"]
    if sw["mode"] == "frequency" and sw["settle_s"] >= sw["dwell_s"]:
        raise ConfigError(f"config switching.settle_s = {sw['settle_s']}: must be shorter than "
                          f"switching.dwell_s = {sw['dwell_s']}")
    if sw["mode"] == "frequency" and abs(sw["offset_hz"]) < 4 * cfg["source"]["sample_rate"] / n:
        raise ConfigError(f"config switching.offset_hz = {sw['offset_hz']:g}: must be at least four "
                          "channels wide for frequency switching")
    calib = cfg["calibration"]
    if calib["cal_interval_s"] < 3 * calib["cal_on_s"]:
        raise ConfigError(f"config calibration.cal_interval_s = {calib['cal_interval_s']:g}: must "
                          f"be at least three times calibration.cal_on_s = {calib['cal_on_s']:g} (the "
                          "noise source needs off time on both sides of each firing)")
    if calib["switch"] == "command":
        for key, what in (("switch_on_cmd", "on"), ("switch_off_cmd", "off")):
            if not calib[key].strip():
                raise ConfigError(f"config calibration.{key} is empty: calibration.switch = "
                                  f"'command' needs a command that turns the noise source {what}")
    if calib["switch"] == "gpio" and calib["gpio_line"] < 0:
        raise ConfigError("config calibration.gpio_line is not given: calibration.switch = 'gpio' "
                          "needs the line offset (0-1023) on calibration.gpio_chip")
    for key in ("data", "control"):
        ep = cfg["publish"][key]
        if ep and not ep.startswith(("tcp://", "ipc://", "inproc://")):
            raise ConfigError(f"config publish.{key} = {ep!r}: expected a ZeroMQ endpoint such "
                              f"as {DEFAULT_DATA_ENDPOINT!r}, or '' for none")
    if cfg["publish"]["data"] and cfg["publish"]["data"] == cfg["publish"]["control"]:
        raise ConfigError(f"config publish.control = {cfg['publish']['control']!r}: must differ "
                          "from publish.data")
    rot = cfg["rotator"]
    (az_lo, az_hi), (el_lo, el_hi), (park_az, park_el) = rot["az_range"], rot["el_range"], rot["park"]
    if not (az_lo <= park_az <= az_hi and el_lo <= park_el <= el_hi):
        raise ConfigError(f"config rotator.park = [{park_az:g}, {park_el:g}]: must lie inside "
                          f"rotator.az_range = [{az_lo:g}, {az_hi:g}] and rotator.el_range = "
                          f"[{el_lo:g}, {el_hi:g}]")
    if cfg["baseline"]["mode"] == "windows" and not cfg["baseline"]["windows_km_s"]:
        raise ConfigError("config baseline.windows_km_s is empty: baseline.mode = 'windows' needs "
                          "at least one line-free [lo, hi] window in km/s")


def load(path: str | Path | None = None) -> dict:
    """Defaults, overlaid by the TOML file at ``path`` (if given), validated."""
    cfg = defaults()
    if path is None:
        _cross_checks(cfg)
        return cfg
    try:
        data = read_toml(path, "config file")
    except TomlFileError as exc:
        raise ConfigError(str(exc)) from None
    return merge(cfg, data, origin=f"config file {path}")
