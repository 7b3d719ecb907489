"""The hot/cold-load calibration record: one JSON file per calibration, and its checks.

A calibration (:class:`LoadsRecord`, made by :func:`make_record` from the powers measured on
the loads and the formulas of :mod:`spinflip.daemon.calibration.y_factor`) is kept as one JSON
file (:func:`save_record`, :func:`load_record`, :func:`latest_record`), checked before use
(:func:`check_record_age`, :func:`check_record_matches`) and cited in FITS headers
(:func:`header_cards`). The guided procedure that measures the powers is
:class:`spinflip.daemon.commands.loads_session.LoadsProcedure`.

Units: powers in counts, temperatures in K, frequencies in Hz, times in s, times of day in UTC.

References
----------
Pence, W. D. et al. 2010, A&A 524, A42 (FITS standard 3.0: keywords of at most 8 characters,
string values of printable ASCII).
"""

from __future__ import annotations

import dataclasses
import datetime as _dt
import json
import os
from dataclasses import dataclass
from pathlib import Path
from typing import Any

from spinflip import __version__
from spinflip.daemon.calibration.y_factor import (
    LoadsError,
    _finite,
    check_load_temperatures,
    gain_counts_per_k,
    noise_source_k_from_loads,
    receiver_temperature_k,
    system_temperature_k,
    y_factor,
)
from spinflip.daemon.storage.durable import fsync_dir, replace_atomically
from spinflip.daemon.utc import utc_iso

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


def _typed(key: str, value: object, kind: type, where: str) -> str | float:
    """One value checked against its type (str: printable ASCII; float: finite number)."""
    if kind is str:
        if not isinstance(value, str) or not _is_text(value):
            raise LoadsError(f"{where}: key {key!r} = {value!r}: expected printable ASCII text "
                             f"of 1 to {_MAX_TEXT} characters")
        return value
    return _finite(value, f"{where}: key {key!r}")


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
    out: dict[str, Any] = {}   # str or float by META_KEYS
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


def _record_from_dict(data: object, where: str) -> LoadsRecord:
    """Validate a decoded JSON object and build the record (LoadsError naming ``where``)."""
    if not isinstance(data, dict):
        raise LoadsError(f"{where}: expected a JSON object, found {type(data).__name__}")
    if data.get("format") != RECORD_FORMAT:
        raise LoadsError(f"{where}: key 'format' = {data.get('format')!r}: expected "
                         f"{RECORD_FORMAT} (a spinflip hot/cold calibration record)")
    values: dict[str, Any] = {}   # LoadsRecord's fields, each checked against its kind
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


def save_record(record: LoadsRecord, folder: str | os.PathLike[str]) -> Path:
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
    text = json.dumps(data, indent=2, allow_nan=False) + "\n"
    replace_atomically(final, text.encode("ascii"))
    return final


def load_record(path: str | os.PathLike[str]) -> LoadsRecord:
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


def latest_record(folder: str | os.PathLike[str]) -> LoadsRecord | None:
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
