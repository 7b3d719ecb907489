"""The wire schema as data (the fields of each topic and their JSON types) and its checks.

The schema itself is documented in :mod:`spinflip.daemon.live.schema`.
"""

from __future__ import annotations

import datetime as _dt
import math
from dataclasses import dataclass, field
from enum import StrEnum
from typing import Any

import numpy as np

from spinflip.daemon.error_line import quoted, quoted_json
from spinflip.daemon.utc import utc_iso

#: Version of the schema in this docstring; a reader refuses any other.
SCHEMA_VERSION = 1

#: The topics (frame 0), in no particular order.
TOPICS = ("spectrum", "status", "progress", "event")

#: Payload dtypes allowed on the wire.
DTYPES = ("<f4", "<f8", "<i8", "|u1")

#: The largest ``spectrometer.channels`` the configuration allows (daemon/config.py).
MAX_CHANNELS = 65536
#: Most payload arrays in one message (a spectrum has 5; room for arrays added later).
MAX_ARRAYS = 16
#: Most dimensions of one payload array.
MAX_DIMS = 8
#: Largest header frame a reader takes, bytes (a spectrum's header is about 1 KiB).
MAX_HEADER_BYTES = 64 * 1024
#: Deepest nesting of JSON objects and arrays in a header (the schema needs 3).
MAX_DEPTH = 16
#: Largest payload of one message, bytes: MAX_CHANNELS channels x 8 bytes x MAX_ARRAYS.
MAX_PAYLOAD_BYTES = MAX_CHANNELS * 8 * MAX_ARRAYS
#: Largest ZeroMQ frame a subscriber's socket takes (``zmq.MAXMSGSIZE``), bytes: one payload
#: frame can hold at most the whole payload; 64 KiB of room for the header and CURVE framing.
MAX_FRAME_BYTES = MAX_PAYLOAD_BYTES + 64 * 1024
#: Longest error line :func:`decode` raises, characters.
MAX_ERROR_CHARS = 140


class WireError(ValueError):
    """A message that does not follow the schema (one line naming what is wrong)."""


@dataclass
class Message:
    """One decoded message.

    Attributes
    ----------
    topic : str
        One of :data:`TOPICS`.
    header : dict
        The JSON header, with the common fields and the topic's fields.
    arrays : dict[str, numpy.ndarray]
        The payload arrays by name (native byte order, writable copies); their units are in
        ``header["arrays"]`` (see :meth:`unit`).
    """

    topic: str
    header: dict
    arrays: dict = field(default_factory=dict)

    def unit(self, name: str) -> str:
        """The unit of payload array ``name`` as the header states it."""
        for desc in self.header["arrays"]:
            if desc["name"] == name:
                return desc["unit"]
        raise KeyError(name)


def now_utc_iso() -> str:
    """The current UTC time as ``YYYY-MM-DDTHH:MM:SS.ffffffZ`` (the form of ``time_utc``)."""
    return utc_iso(micro=True, zulu=True)


# ----------------------------------------------------------------------------------------------
# the schema as data: field -> allowed JSON types ("number", "integer", "string", "boolean",
# "object", "null"), with the allowed values where they are a closed set
# ----------------------------------------------------------------------------------------------
_NUM = ("number",)
_INT = ("integer",)
_STR = ("string",)
_NUM_OR_NULL = ("number", "null")
_STR_OR_NULL = ("string", "null")

_COMMON = {"schema": _INT, "topic": _STR, "time_utc": _STR, "station": _STR}

_FIELDS: dict[str, dict[str, tuple[str, ...]]] = {
    "spectrum": {
        "kind": _STR, "scan": _STR, "row": _INT, "exposure_s": _NUM, "tsys_k": _NUM_OR_NULL,
        "unit": _STR, "restfreq_hz": _NUM, "vframe_m_s": _NUM, "glon_deg": _NUM,
        "glat_deg": _NUM, "azimuth_deg": _NUM, "elevation_deg": _NUM, "ra_deg": _NUM,
        "dec_deg": _NUM, "object": _STR, "folded": ("boolean",), "flagged_fraction": _NUM,
        "blanked_fraction": _NUM, "nimpulse": _INT, "ncarrier": _INT,
    },
    "status": {
        "state": _STR, "source": _STR, "lo_hz": _NUM, "gain_db": _NUM, "sample_rate_hz": _NUM,
        "tsys_k": _NUM_OR_NULL, "tsys_source": _STR, "samples_received": _INT,
        "samples_lost": _INT, "queue_depth": _INT, "disk_free_bytes": _INT, "uptime_s": _NUM,
        "writing": _STR, "held_integrations": _INT, "dropped_integrations": _INT,
        "version": _STR, "scan": _STR_OR_NULL, "pointing": ("object",), "drops": ("object",),
        "rfi": ("object",), "worker_failures": ("object",),
    },
    "progress": {
        "scan": _STR_OR_NULL, "integration": _INT, "integration_elapsed_s": _NUM,
        "integration_total_s": _NUM, "scan_elapsed_s": _NUM, "scan_total_s": _NUM_OR_NULL,
        "eta_s": _NUM_OR_NULL,
    },
    "event": {"severity": _STR, "text": _STR},
}

class State(StrEnum):
    """The daemon's state, as the status message's ``state`` carries it (``str(State.IDLE)``
    and f-strings give the value, ``"idle"``)."""

    OBSERVING = "observing"
    PAUSED = "paused"
    IDLE = "idle"
    RECONNECTING = "reconnecting"
    STOPPING = "stopping"
    SLEWING = "slewing"           # a plan: the dish moving onto its next target; nothing kept
    WAITING = "waiting"           # a plan: for the observer to point, a target to rise, the
                                  # rotator to answer again, or ``resume`` after ``park``


_CHOICES = {
    ("spectrum", "kind"): ("integration", "average"),
    ("spectrum", "unit"): ("K", "count"),
    ("status", "state"): tuple(s.value for s in State),
    ("status", "writing"): ("writing", "holding", "failed"),
    ("event", "severity"): ("info", "warning", "error"),
}

_FRACTIONS = ("flagged_fraction", "blanked_fraction")

#: ``status.mount`` (optional): the pointing driver and where the dish is.
MOUNT_DRIVERS = ("none", "manual", "rotator")
MOUNT_STATES = ("idle", "slewing", "tracking", "waiting", "parking", "parked", "fault")
_MOUNT = {"driver": _STR, "state": _STR, "az_deg": _NUM_OR_NULL, "el_deg": _NUM_OR_NULL,
          "target_az_deg": _NUM_OR_NULL, "target_el_deg": _NUM_OR_NULL,
          "error_deg": _NUM_OR_NULL, "detail": _STR}
#: ``progress.plan`` (optional, null when no plan runs): where a running plan is.
PLAN_PHASES = ("slewing", "waiting", "observing", "deferred", "paused", "parked", "finished")
_PLAN = {"name": _STR, "step": _INT, "steps": _INT, "object": _STR_OR_NULL, "phase": _STR,
         "visit_elapsed_s": _NUM, "visit_total_s": _NUM_OR_NULL, "eta_s": _NUM_OR_NULL,
         "done": _INT, "abandoned": _INT, "upcoming": ("array",), "skipped": ("array",)}
#: Most entries of ``plan.upcoming`` and ``plan.skipped`` on the wire.
PLAN_LIST_MAX = 20

_POINTING = {"frame": _STR, "lon_deg": _NUM, "lat_deg": _NUM, "object": _STR}
_POINTING_FRAMES = ("galactic", "radec", "azel")
_RFI_COUNTERS = ("impulses", "carrier_onsets", "sk_cells", "blanked_spectra")

#: Arrays of a spectrum: name -> (dtype, unit); the unit of "data" is the header's "unit".
SPECTRUM_ARRAYS = {
    "freq_hz": ("<f8", "Hz"),
    "v_lsrk_km_s": ("<f8", "km/s"),
    "data": ("<f4", None),
    "flagged": ("|u1", ""),
    "exposure_s": ("<f4", "s"),
}

_ITEMSIZE = {d: np.dtype(d).itemsize for d in DTYPES}


def json_type(value: Any) -> str:
    """The schema's name of a decoded JSON value's type: ``null``, ``boolean``, ``integer``,
    ``number`` (a float), ``string``, ``object`` or ``array`` (else the Python type's name)."""
    if value is None:
        return "null"
    if isinstance(value, bool):
        return "boolean"
    if isinstance(value, int):
        return "integer"
    if isinstance(value, float):
        return "number"
    if isinstance(value, str):
        return "string"
    if isinstance(value, dict):
        return "object"
    if isinstance(value, list):
        return "array"
    return type(value).__name__


def json_type_words(value: Any) -> str:
    """A decoded JSON value's type as words for an error line: ``a number`` (integers too),
    ``a string``, ``a boolean``, ``an array``, ``an object`` or ``null``."""
    kind = json_type(value)
    kind = "number" if kind == "integer" else kind
    return {"null": "null", "array": "an array", "object": "an object", "boolean": "a boolean",
            "number": "a number", "string": "a string"}.get(kind, "an object")


def _check_type(where: str, value: Any, allowed: tuple) -> None:
    kind = json_type(value)
    ok = kind in allowed or (kind == "integer" and "number" in allowed)
    if not ok:
        raise WireError(f"{where} = {quoted_json(value)} is a JSON {kind}: expected "
                        f"{' or '.join(allowed)}")
    if kind == "number" and not math.isfinite(value):
        raise WireError(f"{where} = {value!r}: JSON numbers must be finite")


def _check_schema(value: Any) -> None:
    _check_type("header.schema", value, _INT)
    if value > SCHEMA_VERSION:
        raise WireError(f"header.schema = {value} is newer than this reader understands "
                        f"({SCHEMA_VERSION}): update spinflip")
    if value != SCHEMA_VERSION:
        raise WireError(f"header.schema = {value}: expected {SCHEMA_VERSION}")


def _check_fields(where: str, obj: dict, spec: dict) -> None:
    for key, allowed in spec.items():
        if key not in obj:
            raise WireError(f"{where} lacks the field {key!r} ({' or '.join(allowed)})")
        _check_type(f"{where}.{key}", obj[key], allowed)


def _check_time_utc(value: str) -> None:
    try:
        t = _dt.datetime.fromisoformat(value)
    except ValueError:
        raise WireError(f"header.time_utc = {quoted_json(value)} is not an ISO 8601 time") from None
    if t.utcoffset() != _dt.timedelta(0):
        raise WireError(f"header.time_utc = {quoted_json(value)} is not UTC: end it with Z or +00:00")


def _check_array_list(descs: Any) -> None:
    if not isinstance(descs, list):
        raise WireError(f"header.arrays = {quoted_json(descs)} is a JSON {json_type(descs)}: "
                        "expected an array of {name, dtype, shape, unit} objects")
    if len(descs) > MAX_ARRAYS:
        raise WireError(f"header.arrays lists {len(descs)} arrays: at most {MAX_ARRAYS}")
    names = set()
    for i, d in enumerate(descs):
        where = f"header.arrays[{i}]"
        if not isinstance(d, dict):
            raise WireError(f"{where} = {quoted_json(d)} is a JSON {json_type(d)}: expected an "
                            "object {name, dtype, shape, unit}")
        _check_fields(where, d, {"name": _STR, "dtype": _STR, "shape": ("array",),
                                 "unit": _STR})
        if not d["name"]:
            raise WireError(f"{where}.name is empty")
        if d["name"] in names:
            raise WireError(f"{where}.name = {quoted(d['name'])} appears twice: names are "
                            "unique")
        names.add(d["name"])
        if d["dtype"] not in DTYPES:
            raise WireError(f"{where}.dtype = {quoted_json(d['dtype'])}: allowed are "
                            f"{', '.join(DTYPES)}")
        if len(d["shape"]) > MAX_DIMS:
            raise WireError(f"{where}.shape has {len(d['shape'])} dimensions: at most "
                            f"{MAX_DIMS}")
        for n in d["shape"]:
            if json_type(n) != "integer" or n < 0:
                raise WireError(f"{where}.shape = {quoted_json(d['shape'])}: expected a list of "
                                "non-negative integers")


def _check_spectrum_arrays(header: dict) -> None:
    descs = {d["name"]: d for d in header["arrays"]}
    nchan = None
    for name, (dtype, unit) in SPECTRUM_ARRAYS.items():
        if name not in descs:
            raise WireError(f"spectrum lacks the array {name!r} ({dtype}, shape [nchan])")
        d = descs[name]
        want_unit = header["unit"] if unit is None else unit
        if d["dtype"] != dtype:
            raise WireError(f"spectrum array {name!r} has dtype {d['dtype']}: expected {dtype}")
        if d["unit"] != want_unit:
            raise WireError(f"spectrum array {name!r} has unit {d['unit']!r}: expected "
                            f"{want_unit!r}")
        if len(d["shape"]) != 1 or d["shape"][0] < 1:
            raise WireError(f"spectrum array {name!r} has shape {quoted_json(d['shape'])}: expected "
                            "[nchan] with nchan >= 1")
        if nchan is None:
            nchan = d["shape"][0]
        elif d["shape"][0] != nchan:
            raise WireError(f"spectrum array {name!r} has {d['shape'][0]} channels, "
                            f"freq_hz has {nchan}: all arrays have the same length")


def validate_header(topic: str, header: dict) -> None:
    """Check a complete header (as on the wire) against the schema of its topic.

    Parameters
    ----------
    topic : str
        The message's topic (frame 0).
    header : dict
        The decoded JSON header, including the common fields ``schema``, ``topic``,
        ``time_utc``, ``station`` and ``arrays``.

    Raises
    ------
    WireError
        One line naming the first field that is missing, of the wrong JSON type or outside
        its allowed values. Fields the schema does not name are allowed (and ignored).

    Notes
    -----
    Does not look at payload frames; :func:`decode` checks those against ``arrays``.
    """
    if topic not in TOPICS:
        raise WireError(f"topic {topic!r} is unknown: expected one of {', '.join(TOPICS)}")
    if not isinstance(header, dict):
        raise WireError(f"header is a JSON {json_type(header)}: expected an object")
    _check_fields("header", header, _COMMON)
    _check_schema(header["schema"])
    if "seq" in header:
        _check_type("header.seq", header["seq"], _INT)
    if "replay" in header:
        _check_type("header.replay", header["replay"], ("boolean",))
    if header["topic"] != topic:
        raise WireError(f"header.topic = {header['topic']!r} differs from the topic frame "
                        f"{topic!r}")
    _check_time_utc(header["time_utc"])
    if "arrays" not in header:
        raise WireError("header lacks the field 'arrays' (array)")
    _check_array_list(header["arrays"])
    _check_fields("header", header, _FIELDS[topic])
    for (t, key), allowed in _CHOICES.items():
        if t == topic and header[key] not in allowed:
            raise WireError(f"header.{key} = {quoted_json(header[key])}: allowed are "
                            f"{', '.join(allowed)}")
    if topic == "spectrum":
        for key in _FRACTIONS:
            if not 0.0 <= header[key] <= 1.0:
                raise WireError(f"header.{key} = {header[key]!r}: expected a fraction 0..1")
        _check_spectrum_arrays(header)
    if topic == "status":
        _check_fields("header.pointing", header["pointing"], _POINTING)
        if header["pointing"]["frame"] not in _POINTING_FRAMES:
            raise WireError(f"header.pointing.frame = {quoted_json(header['pointing']['frame'])}: "
                            f"allowed are {', '.join(_POINTING_FRAMES)}")
        for name, count in header["drops"].items():
            _check_type(f"header.drops.{name}", count, _INT)
        for name, count in header["worker_failures"].items():
            _check_type(f"header.worker_failures.{name}", count, _INT)
        _check_fields("header.rfi", header["rfi"], {k: _INT for k in _RFI_COUNTERS})
        rfi = header["rfi"]
        for key in ("flagged_rfi_fraction", "uncovered_fraction"):    # of the newest row
            if key in rfi:
                _check_type(f"header.rfi.{key}", rfi[key], _NUM_OR_NULL)
                if rfi[key] is not None and not 0.0 <= rfi[key] <= 1.0:
                    raise WireError(f"header.rfi.{key} = {rfi[key]!r}: expected a fraction 0..1")
        band = rfi.get("uncovered_hz")
        if band is not None and not (isinstance(band, list) and len(band) == 2 and all(
                isinstance(f, (int, float)) and not isinstance(f, bool) for f in band)):
            raise WireError(f"header.rfi.uncovered_hz = {quoted_json(band)}: expected [first, last] "
                            "sky frequencies in Hz, or null")
    if topic == "spectrum" and "pointing_error_deg" in header:
        _check_type("header.pointing_error_deg", header["pointing_error_deg"], _NUM_OR_NULL)
    if topic == "status" and "mount" in header:
        _check_mount(header["mount"])
    if topic == "progress" and header.get("plan") is not None:
        _check_plan(header["plan"])
    if topic == "event" and ("\n" in header["text"] or "\r" in header["text"]):
        raise WireError(f"header.text = {quoted_json(header['text'])}: expected one line")


def _check_choice(where: str, value: str, allowed: tuple[str, ...]) -> None:
    if value not in allowed:
        raise WireError(f"{where} = {quoted_json(value)}: allowed are {', '.join(allowed)}")


def _check_mount(mount: Any) -> None:
    """``status.mount``: the pointing driver's object."""
    _check_type("header.mount", mount, ("object",))
    _check_fields("header.mount", mount, _MOUNT)
    _check_choice("header.mount.driver", mount["driver"], MOUNT_DRIVERS)
    _check_choice("header.mount.state", mount["state"], MOUNT_STATES)


def _check_plan(plan: Any) -> None:
    """``progress.plan``: a running plan's object, with its lists of upcoming and skipped
    visits (``{"object", "start_utc"}`` and ``{"object", "reason"}``)."""
    _check_type("header.plan", plan, ("object",))
    _check_fields("header.plan", plan, _PLAN)
    _check_choice("header.plan.phase", plan["phase"], PLAN_PHASES)
    for key, fields in (("upcoming", {"object": _STR, "start_utc": _STR}),
                        ("skipped", {"object": _STR, "reason": _STR})):
        items = plan[key]
        if len(items) > PLAN_LIST_MAX:
            raise WireError(f"header.plan.{key} lists {len(items)} visits: at most "
                            f"{PLAN_LIST_MAX}")
        for i, item in enumerate(items):
            _check_type(f"header.plan.{key}[{i}]", item, ("object",))
            _check_fields(f"header.plan.{key}[{i}]", item, fields)
