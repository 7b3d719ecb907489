"""Hot/cold-load (Y-factor) calibration of the receiver: formulas, record, guided procedure.

Two loads of known brightness temperature fill the beam of the feed in turn: a hot load (an
absorber at ambient temperature covering the feed, or the ground) and a cold load (the cold
sky near the zenith, a few K). A linear receiver of power gain G (counts per K) and noise
temperature Trx then delivers the band-averaged powers

    P_hot  = G (T_hot  + Trx)
    P_cold = G (T_cold + Trx)

and, with the Y factor Y = P_hot / P_cold,

    Trx    = (T_hot - Y T_cold) / (Y - 1)
    G      = (P_hot - P_cold) / (T_hot - T_cold)          counts per K
    Tsys   = Trx + T_cold                                 on the cold sky

A noise source switched on while the feed sees the cold load adds its excess temperature T_cal:
P_cold+cal = G (T_cold + Trx + T_cal), so T_cal = (P_cold+cal - P_cold) / G, which later scans
use to calibrate without the loads.

Physical limits: 1 < Y < T_hot / T_cold. Y <= 1 means the hot load did not raise the power;
Y >= T_hot / T_cold would make Trx <= 0 K (the cold load saw more than T_cold, or the load
temperatures are wrong). The method assumes the receiver is linear from P_cold to P_hot: an
8-bit dongle that clips under the hot load under-reports P_hot, which lowers Y and raises Trx.

Noise figure (IEEE standard definition, reference temperature T0 = 290 K):
F = 1 + T / T0, NF = 10 log10(F) dB.

Units: powers in counts (band-averaged power in the caller's scale, the same for every load),
temperatures in K, frequencies in Hz, times in s, times of day in UTC.

The parts:

- formulas: :func:`y_factor`, :func:`receiver_temperature_k`, :func:`system_temperature_k`,
  :func:`gain_counts_per_k`, :func:`noise_source_k_from_loads`, :func:`noise_temperature_k`,
  :func:`noise_figure_db`, :func:`check_load_temperatures`;
- the calibration record :class:`LoadsRecord` (:func:`make_record`), kept as one JSON file per
  calibration (:func:`save_record`, :func:`load_record`, :func:`latest_record`), checked before
  use (:func:`check_record_age`, :func:`check_record_matches`) and cited in FITS headers
  (:func:`header_cards`);
- the guided procedure :class:`LoadsProcedure`, independent of where the samples come from.

References
----------
Friis, H. T. 1944, Proc. IRE 32, 419 (noise figure of a receiver; from memory).
IRE Standards on Methods of Measuring Noise in Linear Twoports, 1959, Proc. IRE 48, 60 (1960):
noise temperature and noise figure, reference temperature T0 = 290 K (from memory).
Agilent Technologies, Application Note 57-1, Fundamentals of RF and Microwave Noise Figure
Measurements (the Y-factor hot/cold method; from memory).
Wilson, T. L., Rohlfs, K. & Huttemeister, S., Tools of Radio Astronomy (receiver temperature
from hot and cold loads).
Pence, W. D. et al. 2010, A&A 524, A42 (FITS standard 3.0: keywords of at most 8 characters,
string values of printable ASCII).
"""

from __future__ import annotations

import dataclasses
import datetime as _dt
import json
import math
import numbers
import os
import time
from collections.abc import Callable
from dataclasses import dataclass
from pathlib import Path

from spinflip import __version__
from spinflip.daemon.storage.durable import fsync_dir
from spinflip.daemon.utc import utc_iso


class LoadsError(ValueError):
    """A hot/cold-load measurement, record or setting that cannot be used (one-line message)."""


#: Reference temperature of the noise figure, K (IEEE / IRE standard definition).
T0_K = 290.0
#: Highest hot-load temperature accepted, K (an absorber at ambient temperature, or the ground).
MAX_HOT_LOAD_K = 400.0
#: A record measured at a centre frequency further than this from the current one is refused, Hz.
MAX_CENTER_FREQ_SHIFT_HZ = 10e6
#: Suggested default for the configuration key ``calibration.max_record_age_s``, s (6 h).
DEFAULT_MAX_RECORD_AGE_S = 21600.0
#: Gain settings closer than this are the same setting (dongle gains are tabulated steps), dB.
_GAIN_TOLERANCE_DB = 0.05
#: Sample rates differing by less than this fraction are the same setting.
_SAMPLE_RATE_REL_TOL = 1e-3
#: A record dated up to this far in the future is accepted (clock steps of a few s), s.
_CLOCK_SLACK_S = 60.0
#: Version of the JSON record layout.
RECORD_FORMAT = 1
#: Measurements, in the order the procedure makes them.
LOADS = ("hot", "cold", "cold+cal")


# ----------------------------------------------------------------------------------------------
# formulas
# ----------------------------------------------------------------------------------------------
def _finite(value, what: str) -> float:
    if isinstance(value, bool) or not isinstance(value, numbers.Real):
        raise LoadsError(f"{what} = {value!r}: expected a number")
    v = float(value)
    if not math.isfinite(v):
        raise LoadsError(f"{what} = {v!r}: expected a finite number")
    return v


def _power(value, what: str) -> float:
    v = _finite(value, what)
    if v <= 0.0:
        raise LoadsError(f"{what} = {v:g} counts: expected above 0")
    return v


def check_load_temperatures(t_hot_k: float, t_cold_k: float) -> tuple[float, float]:
    """Check the two load temperatures; return them as floats.

    Parameters
    ----------
    t_hot_k : float
        Hot-load brightness temperature, K: above 0 and at most :data:`MAX_HOT_LOAD_K`.
    t_cold_k : float
        Cold-load brightness temperature, K: above 0 and below ``t_hot_k``.

    Returns
    -------
    (float, float)
        ``t_hot_k``, ``t_cold_k``.

    Raises
    ------
    LoadsError
        One line naming the temperature, its value and what is allowed.
    """
    th = _finite(t_hot_k, "hot load temperature t_hot_k")
    tc = _finite(t_cold_k, "cold load temperature t_cold_k")
    if th <= 0.0:
        raise LoadsError(f"hot load temperature t_hot_k = {th:g} K: expected above 0 K")
    if th > MAX_HOT_LOAD_K:
        raise LoadsError(f"hot load temperature t_hot_k = {th:g} K: expected at most "
                         f"{MAX_HOT_LOAD_K:g} K (an absorber at ambient temperature)")
    if tc <= 0.0:
        raise LoadsError(f"cold load temperature t_cold_k = {tc:g} K: expected above 0 K")
    if tc >= th:
        raise LoadsError(f"cold load temperature t_cold_k = {tc:g} K is not below the hot load "
                         f"t_hot_k = {th:g} K: expected t_cold_k < t_hot_k")
    return th, tc


def y_factor(p_hot: float, p_cold: float) -> float:
    """Y factor, the ratio of the band-averaged powers on the hot and the cold load.

    Parameters
    ----------
    p_hot, p_cold : float
        Band-averaged power with the hot and with the cold load on the feed, counts (> 0).

    Returns
    -------
    float
        Y = P_hot / P_cold (dimensionless).

    Notes
    -----
    With a linear receiver P = G (T_load + Trx), so Y = (T_hot + Trx) / (T_cold + Trx).

    References
    ----------
    Agilent Application Note 57-1 (Y-factor method; from memory).
    """
    return _power(p_hot, "hot-load power p_hot") / _power(p_cold, "cold-load power p_cold")


def receiver_temperature_k(y: float, t_hot_k: float, t_cold_k: float) -> float:
    """Receiver noise temperature from the Y factor of two loads.

    Parameters
    ----------
    y : float
        Y = P_hot / P_cold; must satisfy 1 < Y < t_hot_k / t_cold_k.
    t_hot_k, t_cold_k : float
        Load temperatures, K (see :func:`check_load_temperatures`).

    Returns
    -------
    float
        Trx = (T_hot - Y T_cold) / (Y - 1), K (> 0).

    Raises
    ------
    LoadsError
        Y <= 1 (the hot load did not raise the power), Y >= T_hot / T_cold (Trx would not be
        positive), or bad load temperatures.

    Notes
    -----
    Solve Y (T_cold + Trx) = T_hot + Trx for Trx.

    References
    ----------
    Agilent Application Note 57-1 (from memory); Wilson, Rohlfs & Huttemeister, Tools of Radio
    Astronomy.
    """
    th, tc = check_load_temperatures(t_hot_k, t_cold_k)
    yv = _finite(y, "Y factor")
    if yv <= 1.0:
        raise LoadsError(f"Y = {yv:.4g} is not above 1: the hot load did not raise the power; "
                         "check that the absorber covers the feed and that the gain is not "
                         "clipping")
    if yv >= th / tc:
        raise LoadsError(f"Y = {yv:.4g} is not below T_hot/T_cold = {th / tc:.4g}: that would "
                         "make Trx <= 0 K; check the load temperatures and that the cold load "
                         "saw only the cold sky")
    return (th - yv * tc) / (yv - 1.0)


def system_temperature_k(trx_k: float, t_load_k: float) -> float:
    """System temperature with a load on the feed: Tsys = Trx + T_load, K.

    Parameters
    ----------
    trx_k : float
        Receiver noise temperature, K.
    t_load_k : float
        Brightness temperature the feed sees, K (the cold sky for the cold load).

    Returns
    -------
    float
        Tsys, K.

    References
    ----------
    Wilson, Rohlfs & Huttemeister, Tools of Radio Astronomy (system temperature).
    """
    return _finite(trx_k, "receiver temperature trx_k") + _finite(t_load_k, "load temperature")


def gain_counts_per_k(p_hot: float, p_cold: float, t_hot_k: float, t_cold_k: float) -> float:
    """Receiver power gain from two loads, counts per K.

    Parameters
    ----------
    p_hot, p_cold : float
        Band-averaged powers on the hot and the cold load, counts (> 0).
    t_hot_k, t_cold_k : float
        Load temperatures, K.

    Returns
    -------
    float
        G = (P_hot - P_cold) / (T_hot - T_cold), counts per K (> 0).

    Raises
    ------
    LoadsError
        P_hot <= P_cold, non-positive powers or bad load temperatures.

    Notes
    -----
    Difference of P = G (T_load + Trx) for the two loads; Trx cancels.
    """
    th, tc = check_load_temperatures(t_hot_k, t_cold_k)
    ph = _power(p_hot, "hot-load power p_hot")
    pc = _power(p_cold, "cold-load power p_cold")
    if ph <= pc:
        raise LoadsError(f"hot-load power {ph:g} counts is not above the cold-load power "
                         f"{pc:g} counts: check that the absorber covers the feed")
    return (ph - pc) / (th - tc)


def noise_source_k_from_loads(p_cold_cal: float, p_cold: float, gain_counts_per_k: float) -> float:
    """Excess temperature of a noise source measured on the cold load, K.

    Parameters
    ----------
    p_cold_cal : float
        Band-averaged power on the cold load with the noise source on, counts.
    p_cold : float
        The same with the noise source off, counts.
    gain_counts_per_k : float
        Receiver gain G from :func:`gain_counts_per_k`, counts per K.

    Returns
    -------
    float
        T_cal = (P_cold+cal - P_cold) / G, K (> 0).

    Raises
    ------
    LoadsError
        The noise source did not raise the power, or a non-positive input.

    Notes
    -----
    P_cold+cal = G (T_cold + Trx + T_cal) minus P_cold = G (T_cold + Trx).
    """
    pcc = _power(p_cold_cal, "cold-load + noise source power p_cold_cal")
    pc = _power(p_cold, "cold-load power p_cold")
    g = _finite(gain_counts_per_k, "gain_counts_per_k")
    if g <= 0.0:
        raise LoadsError(f"gain_counts_per_k = {g:g}: expected above 0 counts per K")
    if pcc <= pc:
        raise LoadsError(f"power with the noise source on ({pcc:g} counts) is not above the power "
                         f"with it off ({pc:g} counts): check that the noise source is connected "
                         "and switches")
    return (pcc - pc) / g


def noise_temperature_k(noise_figure_db: float) -> float:
    """Noise temperature of a noise figure: T = T0 (F - 1), F = 10^(NF/10), T0 = 290 K.

    Parameters
    ----------
    noise_figure_db : float
        Noise figure NF, dB (>= 0).

    Returns
    -------
    float
        Noise temperature, K.

    References
    ----------
    IRE Standards on Methods of Measuring Noise in Linear Twoports, Proc. IRE 48, 60 (1960);
    Friis 1944 (both from memory).
    """
    nf = _finite(noise_figure_db, "noise figure")
    if nf < 0.0:
        raise LoadsError(f"noise figure = {nf:g} dB: expected at least 0 dB (F >= 1)")
    return T0_K * (10.0 ** (nf / 10.0) - 1.0)


def noise_figure_db(t_k: float) -> float:
    """Noise figure of a noise temperature: NF = 10 log10(1 + T / T0) dB, T0 = 290 K.

    Parameters
    ----------
    t_k : float
        Noise temperature, K (>= 0).

    Returns
    -------
    float
        Noise figure, dB; the inverse of :func:`noise_temperature_k`.

    References
    ----------
    IRE Standards on Methods of Measuring Noise in Linear Twoports, Proc. IRE 48, 60 (1960)
    (from memory).
    """
    t = _finite(t_k, "noise temperature")
    if t < 0.0:
        raise LoadsError(f"noise temperature = {t:g} K: expected at least 0 K")
    return 10.0 * math.log10(1.0 + t / T0_K)


# ----------------------------------------------------------------------------------------------
# the calibration record
# ----------------------------------------------------------------------------------------------
@dataclass(frozen=True)
class LoadsRecord:
    """One hot/cold-load calibration: what was measured, the results and the receiver settings.

    Attributes
    ----------
    name : str
        ``loads-YYYYMMDDTHHMMSS`` (UTC); the file is ``<name>.json``.
    time_utc : str
        UTC ISO time the calibration was completed, e.g. ``2026-12-02T15:30:00``.
    t_hot_k, t_cold_k : float
        Load temperatures, K.
    p_hot_counts, p_cold_counts : float
        Band-averaged powers on the hot and the cold load, counts.
    y : float
        Y factor.
    trx_k : float
        Receiver noise temperature, K.
    tsys_cold_k : float
        System temperature on the cold sky, K.
    gain_counts_per_k : float
        Receiver gain, counts per K.
    gain_setting_db : float
        Tuner gain setting during the measurement, dB.
    center_freq_hz, sample_rate_hz : float
        LO frequency and complex sample rate during the measurement, Hz.
    time_per_load_s : float
        Integration time on each load, s.
    telescope, site_name, software_version : str
        Which telescope, where, and which spinflip made the record.
    p_cold_cal_counts : float or None
        Power on the cold load with the noise source on, counts; None without a noise source.
    noise_source_k : float or None
        Noise-source excess temperature, K; None without a noise source.
    """

    name: str
    time_utc: str
    t_hot_k: float
    t_cold_k: float
    p_hot_counts: float
    p_cold_counts: float
    y: float
    trx_k: float
    tsys_cold_k: float
    gain_counts_per_k: float
    gain_setting_db: float
    center_freq_hz: float
    sample_rate_hz: float
    time_per_load_s: float
    telescope: str
    site_name: str
    software_version: str
    p_cold_cal_counts: float | None = None
    noise_source_k: float | None = None

    @property
    def time_unix_s(self) -> float:
        """:attr:`time_utc` as POSIX seconds."""
        return _parse_utc_s(self.time_utc)

    def to_dict(self) -> dict:
        """The JSON object written by :func:`save_record` (with the layout version)."""
        return {"format": RECORD_FORMAT, **dataclasses.asdict(self)}


#: Keys of ``meta`` (run, make_record): the receiver settings and where, by type.
META_KEYS = {"gain_setting_db": float, "center_freq_hz": float, "sample_rate_hz": float,
             "telescope": str, "site_name": str}
_FIELD_KINDS = {f.name: (str if f.type == "str" else float)
                for f in dataclasses.fields(LoadsRecord)}
_OPTIONAL = {"p_cold_cal_counts", "noise_source_k"}
#: Values that must be above 0.
_POSITIVE = {"p_hot_counts", "p_cold_counts", "trx_k", "tsys_cold_k", "gain_counts_per_k",
             "center_freq_hz", "sample_rate_hz", "time_per_load_s", "p_cold_cal_counts",
             "noise_source_k"}
#: Longest string value: a FITS string card holds 68 characters.
_MAX_TEXT = 68


def _parse_utc_s(text: str) -> float:
    """POSIX seconds of a UTC ISO time (no offset: UTC), or ValueError."""
    t = _dt.datetime.fromisoformat(text)
    if t.tzinfo is None:
        t = t.replace(tzinfo=_dt.UTC)
    return t.timestamp()


def _is_text(value: str) -> bool:
    return 0 < len(value) <= _MAX_TEXT and all(32 <= ord(c) < 127 for c in value)


def _typed(key: str, value, kind: type, where: str):
    """One value checked against its type (str: printable ASCII; float: finite number)."""
    if kind is str:
        if not isinstance(value, str) or not _is_text(value):
            raise LoadsError(f"{where}: key {key!r} = {value!r}: expected printable ASCII text "
                             f"of 1 to {_MAX_TEXT} characters")
        return value
    if isinstance(value, bool) or not isinstance(value, numbers.Real):
        raise LoadsError(f"{where}: key {key!r} = {value!r}: expected a number")
    v = float(value)
    if not math.isfinite(v):
        raise LoadsError(f"{where}: key {key!r} = {v!r}: expected a finite number")
    return v


def check_meta(meta: dict, where: str = "meta") -> dict:
    """Check the receiver settings that go into a record; return them typed.

    Parameters
    ----------
    meta : dict
        Exactly the keys of :data:`META_KEYS`: ``gain_setting_db``, ``center_freq_hz``,
        ``sample_rate_hz`` (numbers; the two frequencies above 0) and ``telescope``,
        ``site_name`` (printable ASCII).
    where : str
        What to call ``meta`` in an error.

    Returns
    -------
    dict
        The same keys, numbers as float.

    Raises
    ------
    LoadsError
        A missing, unknown, mistyped or out-of-range key (one line naming it).
    """
    if not isinstance(meta, dict):
        raise LoadsError(f"{where}: expected a dict with keys {', '.join(META_KEYS)}")
    unknown = sorted(str(k) for k in meta if k not in META_KEYS)
    if unknown:
        raise LoadsError(f"{where}: unknown key {unknown[0]!r}; allowed: {', '.join(META_KEYS)}")
    out = {}
    for key, kind in META_KEYS.items():
        if key not in meta:
            raise LoadsError(f"{where}: key {key!r} is missing; expected {', '.join(META_KEYS)}")
        out[key] = _typed(key, meta[key], kind, where)
        if key in _POSITIVE and out[key] <= 0.0:
            raise LoadsError(f"{where}: key {key!r} = {out[key]:g}: expected above 0")
    return out


def make_record(meta: dict, *, p_hot_counts: float, p_cold_counts: float, t_hot_k: float,
                t_cold_k: float, time_per_load_s: float, time_unix_s: float,
                p_cold_cal_counts: float | None = None) -> LoadsRecord:
    """Compute a calibration record from the measured powers.

    Parameters
    ----------
    meta : dict
        Receiver settings and where (see :func:`check_meta`).
    p_hot_counts, p_cold_counts : float
        Band-averaged powers on the hot and the cold load, counts.
    t_hot_k, t_cold_k : float
        Load temperatures, K.
    time_per_load_s : float
        Integration time on each load, s.
    time_unix_s : float
        When the calibration was completed, POSIX s; gives ``time_utc`` and ``name``.
    p_cold_cal_counts : float or None
        Power on the cold load with the noise source on; None without a noise source.

    Returns
    -------
    LoadsRecord

    Raises
    ------
    LoadsError
        Any check of the formulas fails (Y <= 1, ...), or bad ``meta``.

    Notes
    -----
    Y = P_hot / P_cold; Trx = (T_hot - Y T_cold) / (Y - 1); Tsys = Trx + T_cold;
    G = (P_hot - P_cold) / (T_hot - T_cold); T_cal = (P_cold+cal - P_cold) / G.
    """
    m = check_meta(meta)
    th, tc = check_load_temperatures(t_hot_k, t_cold_k)
    dwell = _finite(time_per_load_s, "time_per_load_s")
    if dwell <= 0.0:
        raise LoadsError(f"time_per_load_s = {dwell:g} s: expected above 0 s")
    t = _finite(time_unix_s, "time_unix_s")
    y = y_factor(p_hot_counts, p_cold_counts)
    trx = receiver_temperature_k(y, th, tc)
    gain = gain_counts_per_k(p_hot_counts, p_cold_counts, th, tc)
    t_cal = None
    if p_cold_cal_counts is not None:
        t_cal = noise_source_k_from_loads(p_cold_cal_counts, p_cold_counts, gain)
        p_cold_cal_counts = float(p_cold_cal_counts)
    stamp = _dt.datetime.fromtimestamp(t, _dt.UTC).strftime("%Y%m%dT%H%M%S")
    return LoadsRecord(
        name=f"loads-{stamp}", time_utc=utc_iso(t), t_hot_k=th, t_cold_k=tc,
        p_hot_counts=float(p_hot_counts), p_cold_counts=float(p_cold_counts), y=y, trx_k=trx,
        tsys_cold_k=system_temperature_k(trx, tc), gain_counts_per_k=gain,
        gain_setting_db=m["gain_setting_db"], center_freq_hz=m["center_freq_hz"],
        sample_rate_hz=m["sample_rate_hz"], time_per_load_s=dwell, telescope=m["telescope"],
        site_name=m["site_name"], software_version=__version__,
        p_cold_cal_counts=p_cold_cal_counts, noise_source_k=t_cal)


def _record_from_dict(data, where: str) -> LoadsRecord:
    """Validate a decoded JSON object and build the record (LoadsError naming ``where``)."""
    if not isinstance(data, dict):
        raise LoadsError(f"{where}: expected a JSON object, found {type(data).__name__}")
    if data.get("format") != RECORD_FORMAT:
        raise LoadsError(f"{where}: key 'format' = {data.get('format')!r}: expected "
                         f"{RECORD_FORMAT} (a spinflip hot/cold calibration record)")
    values = {}
    for key, kind in _FIELD_KINDS.items():
        if key not in data:
            if key in _OPTIONAL:
                values[key] = None
                continue
            raise LoadsError(f"{where}: key {key!r} is missing")
        if key in _OPTIONAL and data[key] is None:
            values[key] = None
            continue
        values[key] = _typed(key, data[key], kind, where)
        if key in _POSITIVE and values[key] <= 0.0:
            raise LoadsError(f"{where}: key {key!r} = {values[key]:g}: expected above 0")
    if (values["p_cold_cal_counts"] is None) != (values["noise_source_k"] is None):
        raise LoadsError(f"{where}: keys 'p_cold_cal_counts' and 'noise_source_k' must both be "
                         "set or both be null")
    try:
        _parse_utc_s(values["time_utc"])
    except ValueError:
        raise LoadsError(f"{where}: key 'time_utc' = {values['time_utc']!r}: expected a UTC ISO "
                         "time such as 2026-12-02T15:30:00") from None
    try:
        th, tc = check_load_temperatures(values["t_hot_k"], values["t_cold_k"])
    except LoadsError as exc:
        raise LoadsError(f"{where}: {exc}") from None
    y = values["y"]
    if y <= 1.0:
        raise LoadsError(f"{where}: key 'y' = {y:g} is not above 1 (the hot load did not raise "
                         "the power): repeat the hot/cold calibration")
    if y >= th / tc:
        raise LoadsError(f"{where}: key 'y' = {y:g} is not below t_hot_k/t_cold_k = "
                         f"{th / tc:.4g} (Trx would not be positive)")
    return LoadsRecord(**values)


def save_record(record: LoadsRecord, folder) -> Path:
    """Write ``<folder>/<record.name>.json`` atomically; return its path.

    Parameters
    ----------
    record : LoadsRecord
    folder : str or Path
        Folder of the calibration records (created if missing).

    Returns
    -------
    Path
        The file written.

    Raises
    ------
    LoadsError
        The record does not pass the checks of :func:`load_record`, or a record of that name
        exists already (it is never overwritten).
    OSError
        The write failed; no partial file is left behind.

    Notes
    -----
    The house way for crash-safe files (common practice on POSIX): write ``<name>.json.tmp``
    in the same folder, fsync it, ``os.replace`` it onto ``<name>.json`` (atomic within one
    file system) and fsync the folder so the rename survives a power cut.
    """
    data = record.to_dict()
    _record_from_dict(data, f"calibration record {record.name!r}")  # never write a bad one
    if "/" in record.name or record.name.startswith("."):
        raise LoadsError(f"calibration record name {record.name!r}: expected a plain file name")
    folder = Path(folder)
    if not folder.is_dir():
        folder.mkdir(parents=True, exist_ok=True)
        fsync_dir(folder.parent)
    final = folder / f"{record.name}.json"
    if final.exists():
        raise LoadsError(f"calibration record {final} exists already; it is not overwritten")
    tmp = folder / f"{record.name}.json.tmp"
    text = json.dumps(data, indent=2, allow_nan=False) + "\n"
    try:
        with open(tmp, "w", encoding="ascii") as fh:  # "w" truncates a .tmp a crash left
            fh.write(text)
            fh.flush()
            os.fsync(fh.fileno())
        os.replace(tmp, final)
    except BaseException:
        try:
            tmp.unlink()
        except OSError:
            pass
        raise
    fsync_dir(folder)
    return final


def load_record(path) -> LoadsRecord:
    """Read and validate one calibration record.

    Parameters
    ----------
    path : str or Path
        A file written by :func:`save_record`.

    Returns
    -------
    LoadsRecord

    Raises
    ------
    LoadsError
        Unreadable file, not JSON, a missing key, a wrong type, a non-finite number, Y <= 1 or
        bad load temperatures: one line naming the file and the key.

    Notes
    -----
    Keys this version does not know are ignored (a later layout may add some); a different
    ``format`` number is refused. The derived values (y, trx_k, ...) are checked for type and
    range, not recomputed from the powers.
    """
    where = f"calibration record {path}"
    try:
        text = Path(path).read_text(encoding="utf-8")
    except (OSError, UnicodeDecodeError) as exc:
        raise LoadsError(f"{where}: cannot be read ({type(exc).__name__}: "
                         f"{getattr(exc, 'strerror', None) or exc})") from None
    try:
        data = json.loads(text)
    except json.JSONDecodeError as exc:
        raise LoadsError(f"{where}: not valid JSON ({exc.msg} at line {exc.lineno} column "
                         f"{exc.colno})") from None
    return _record_from_dict(data, where)


def latest_record(folder) -> LoadsRecord | None:
    """The newest calibration record in ``folder`` by its time, or None if there is none.

    Parameters
    ----------
    folder : str or Path
        Folder of ``loads-*.json`` records (a missing folder holds none).

    Returns
    -------
    LoadsRecord or None

    Raises
    ------
    LoadsError
        A record in the folder is damaged (the message names the file): a damaged newest record
        must not silently give way to an older one.
    """
    folder = Path(folder)
    if not folder.is_dir():
        return None
    records = [load_record(p) for p in sorted(folder.glob("loads-*.json"))]
    if not records:
        return None
    return max(records, key=lambda r: (r.time_unix_s, r.name))


def _format_age(age_s: float) -> str:
    if abs(age_s) >= 3600.0:
        return f"{age_s / 3600.0:.1f} h"
    if abs(age_s) >= 60.0:
        return f"{age_s / 60.0:.1f} min"
    return f"{age_s:.0f} s"


def check_record_age(record: LoadsRecord, now_unix_s: float, max_age_s: float) -> float:
    """Refuse a calibration record older than ``max_age_s``; return its age.

    Parameters
    ----------
    record : LoadsRecord
    now_unix_s : float
        Current time, POSIX s (the simulated time under the simulator).
    max_age_s : float
        Largest accepted age, s (configuration key ``calibration.max_record_age_s``).

    Returns
    -------
    float
        Age of the record, s.

    Raises
    ------
    LoadsError
        The record is too old, or dated more than a minute in the future (a wrong clock).
    """
    limit = _finite(max_age_s, "calibration.max_record_age_s")
    if limit <= 0.0:
        raise LoadsError(f"calibration.max_record_age_s = {limit:g} s: expected above 0 s")
    age_s = _finite(now_unix_s, "now_unix_s") - record.time_unix_s
    if age_s > limit:
        raise LoadsError(f"calibration record {record.name} is {_format_age(age_s)} old, older "
                         f"than calibration.max_record_age_s = {limit:g} s: repeat the hot/cold "
                         "calibration (spinflip loads)")
    if age_s < -_CLOCK_SLACK_S:
        raise LoadsError(f"calibration record {record.name} is dated {_format_age(-age_s)} in the "
                         "future: check the system clock (is it synchronised?)")
    return age_s


def check_record_matches(record: LoadsRecord, gain_db: float, center_freq_hz: float,
                         sample_rate_hz: float) -> None:
    """Refuse a calibration record measured with other receiver settings.

    Parameters
    ----------
    record : LoadsRecord
    gain_db : float
        Current tuner gain setting, dB: must equal the record's within 0.05 dB.
    center_freq_hz : float
        Current LO frequency, Hz: must be within :data:`MAX_CENTER_FREQ_SHIFT_HZ` (10 MHz).
    sample_rate_hz : float
        Current complex sample rate, Hz: must equal the record's within 0.1 %.

    Raises
    ------
    LoadsError
        A setting differs (one line naming it, both values and what to do).

    Notes
    -----
    A different gain changes G and, through the later stages' contribution, Trx; a different
    sample rate changes the band averaged over (and G in counts per K); Trx varies slowly
    with frequency, so a small retuning is accepted.
    """
    again = "repeat the hot/cold calibration (spinflip loads)"
    g = _finite(gain_db, "gain_db")
    if abs(g - record.gain_setting_db) > _GAIN_TOLERANCE_DB:
        raise LoadsError(f"calibration record {record.name} was measured at gain "
                         f"{record.gain_setting_db:g} dB, the receiver is now at {g:g} dB: its "
                         f"Trx and gain no longer apply; {again}")
    f = _finite(center_freq_hz, "center_freq_hz")
    if abs(f - record.center_freq_hz) > MAX_CENTER_FREQ_SHIFT_HZ:
        raise LoadsError(f"calibration record {record.name} was measured at "
                         f"{record.center_freq_hz / 1e6:.3f} MHz, the receiver is now at "
                         f"{f / 1e6:.3f} MHz (more than {MAX_CENTER_FREQ_SHIFT_HZ / 1e6:g} MHz "
                         f"away); {again}")
    r = _finite(sample_rate_hz, "sample_rate_hz")
    if abs(r - record.sample_rate_hz) > _SAMPLE_RATE_REL_TOL * record.sample_rate_hz:
        raise LoadsError(f"calibration record {record.name} was measured at "
                         f"{record.sample_rate_hz:g} samples/s, the receiver now runs at {r:g} "
                         f"samples/s: its gain no longer applies; {again}")


#: Comments for the cards of :func:`header_cards` (units included).
HEADER_CARD_COMMENTS = {
    "CALFILE": "hot/cold-load calibration record",
    "CALDATE": "UTC time of that calibration",
    "THOT": "hot load temperature, K",
    "TCOLD": "cold load temperature, K",
    "YFACTOR": "Y = P_hot / P_cold",
    "TRX": "receiver temperature from the loads, K",
    "TSYSCOLD": "system temperature on the cold sky, K",
    "CALGAIN": "receiver gain from the loads, counts/K",
    "CALGNDB": "tuner gain setting during the calibration, dB",
    "TCAL": "noise source excess temperature, K",
}


def header_cards(record: LoadsRecord) -> dict:
    """FITS header cards citing a calibration record.

    Parameters
    ----------
    record : LoadsRecord

    Returns
    -------
    dict
        Keyword (at most 8 characters) -> value (float, or printable ASCII string):
        CALFILE, CALDATE, THOT, TCOLD, YFACTOR, TRX, TSYSCOLD, CALGAIN, CALGNDB and, with a
        noise source, TCAL. Units are in :data:`HEADER_CARD_COMMENTS`.

    References
    ----------
    Pence et al. 2010 (FITS 3.0 keywords and string values).
    """
    cards = {
        "CALFILE": record.name, "CALDATE": record.time_utc,
        "THOT": float(record.t_hot_k), "TCOLD": float(record.t_cold_k),
        "YFACTOR": float(record.y), "TRX": float(record.trx_k),
        "TSYSCOLD": float(record.tsys_cold_k), "CALGAIN": float(record.gain_counts_per_k),
        "CALGNDB": float(record.gain_setting_db),
    }
    if record.noise_source_k is not None:
        cards["TCAL"] = float(record.noise_source_k)
    return cards


# ----------------------------------------------------------------------------------------------
# the guided procedure
# ----------------------------------------------------------------------------------------------
@dataclass(frozen=True)
class Step:
    """One step of the procedure, as the observer sees it.

    Attributes
    ----------
    number, total : int
        This is step ``number`` of ``total`` (from 1).
    load : str
        What is measured: "hot", "cold" or "cold+cal" (see :data:`LOADS`).
    title : str
        Short title, e.g. "Hot load".
    instruction : str
        One sentence for the observer, e.g. "Step 1 of 3: cover the feed with the absorber
        (hot load, 290.0 K), then press Enter".
    """

    number: int
    total: int
    load: str
    title: str
    instruction: str


class LoadsProcedure:
    """Guided hot/cold-load calibration, independent of where the samples come from.

    Parameters
    ----------
    measure : callable ``(load: str, seconds: float) -> float``
        Band-averaged power, counts, of ``seconds`` of samples for ``load`` = "hot", "cold" or
        "cold+cal" (the load is in front of the feed and the noise source set when it is
        called).
    prompt : callable ``(step: Step) -> None``
        Shows the step to the observer and returns when they say go (Enter on a terminal).
        Raising ``KeyboardInterrupt`` cancels the procedure.
    t_hot_k, t_cold_k : float
        Load temperatures, K (see :func:`check_load_temperatures`).
    seconds : float
        Integration time on each load, s (> 0).
    set_noise_source : callable ``(on: bool) -> None`` or None
        Switches the noise source; None: the telescope has none (no "cold+cal" step).
    clock : callable ``() -> float``
        Current time, POSIX s (the simulator passes its simulated clock).
    go_action : str
        What the observer does to go on, as said in the instructions.

    Notes
    -----
    :meth:`run` switches the noise source off before the first measurement and again when it
    ends, whether it succeeds, fails or is cancelled. It writes nothing: the caller saves the
    returned record (:func:`save_record`), so a failed or cancelled run leaves no record.
    """

    def __init__(self, measure: Callable[[str, float], float], prompt: Callable[[Step], None], *,
                 t_hot_k: float, t_cold_k: float, seconds: float,
                 set_noise_source: Callable[[bool], None] | None = None,
                 clock: Callable[[], float] = time.time, go_action: str = "press Enter"):
        self.t_hot_k, self.t_cold_k = check_load_temperatures(t_hot_k, t_cold_k)
        s = _finite(seconds, "seconds per load")
        if s <= 0.0:
            raise LoadsError(f"seconds per load = {s:g} s: expected above 0 s")
        self.seconds = s
        self._measure = measure
        self._prompt = prompt
        self._set_noise_source = set_noise_source
        self._clock = clock
        self._go = go_action

    def steps(self) -> list[Step]:
        """The steps in the order :meth:`run` performs them."""
        loads = LOADS if self._set_noise_source is not None else LOADS[:2]
        n = len(loads)
        text = {
            "hot": ("Hot load", "cover the feed with the absorber "
                    f"(hot load, {self.t_hot_k:.1f} K)"),
            "cold": ("Cold load", "remove the absorber and point the feed at the cold sky near "
                     f"the zenith (cold load, {self.t_cold_k:.1f} K)"),
            "cold+cal": ("Cold load + noise source", "keep the feed on the cold sky for a "
                         "measurement with the noise source on"),
        }
        return [Step(i, n, load, text[load][0],
                     f"Step {i} of {n}: {text[load][1]}, then {self._go}")
                for i, load in enumerate(loads, start=1)]

    def _noise_source(self, on: bool) -> None:
        if self._set_noise_source is not None:
            self._set_noise_source(on)

    def run(self, meta: dict) -> LoadsRecord:
        """Perform the steps in order and compute the calibration record.

        Parameters
        ----------
        meta : dict
            Receiver settings and where (:data:`META_KEYS`: gain_setting_db, center_freq_hz,
            sample_rate_hz, telescope, site_name); checked before the first prompt.

        Returns
        -------
        LoadsRecord
            Not saved (see :func:`save_record`).

        Raises
        ------
        LoadsError
            Bad ``meta``, a non-finite or non-positive power (naming the step), or a failed
            check of the formulas (Y <= 1, noise source without effect, ...).
        KeyboardInterrupt
            The observer cancelled at a prompt; nothing is returned.
        """
        m = check_meta(meta, "loads procedure meta")
        powers: dict[str, float] = {}
        try:
            self._noise_source(False)
            for step in self.steps():
                self._prompt(step)
                if step.load == "cold+cal":
                    self._noise_source(True)
                p = self._measure(step.load, self.seconds)
                if step.load == "cold+cal":
                    self._noise_source(False)
                what = f"step {step.number} of {step.total} ({step.title.lower()})"
                try:
                    powers[step.load] = _power(p, f"{what}: band-averaged power")
                except LoadsError as exc:
                    raise LoadsError(f"{exc}; check that the receiver delivers samples") from None
        finally:
            self._noise_source(False)
        return make_record(m, p_hot_counts=powers["hot"], p_cold_counts=powers["cold"],
                           p_cold_cal_counts=powers.get("cold+cal"), t_hot_k=self.t_hot_k,
                           t_cold_k=self.t_cold_k, time_per_load_s=self.seconds,
                           time_unix_s=self._clock())
