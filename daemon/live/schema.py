"""The live-data wire format of spinflip's ZeroMQ PUB socket: the schema, written down once.

This docstring is the schema. It is enough to write a subscriber in any language; nothing
below it adds rules, it only checks them.

Transport
---------
The daemon binds a ZeroMQ PUB socket (default ``tcp://127.0.0.1:5621``); a subscriber
connects a SUB socket to it and subscribes to a topic (ZeroMQ matches the first frame by
prefix; subscribe to ``""`` for every topic). No topic is a prefix of another. A PUB socket
drops messages for a subscriber that does not keep up: a subscriber sees every message it
receives whole, but may miss some (the daemon counts its own drops in ``status.drops``; gaps
in ``seq`` show all of them). A new subscription is answered at once with the latest message
of each topic, so a subscriber that joins or reconnects has the current state at once. PUB
fans out to every subscriber, so this replay reaches the subscribers already connected as
well: a replayed message carries ``"replay": true`` and its original ``seq``, and a reader
that already has that message (same topic, ``station``, ``seq`` and ``time_utc`` as the
latest one it took) ignores it. Only subscriptions that are a prefix of a topic (``""``
included) are taken; any other is ignored.

Limits: the daemon disconnects a peer that sends it a frame over 1 KiB on the data socket
(subscriptions are a few bytes); a reader refuses a header over :data:`MAX_HEADER_BYTES`
(64 KiB) or nested deeper than :data:`MAX_DEPTH` (16), more than :data:`MAX_ARRAYS` (16)
payload frames, an array of more than :data:`MAX_DIMS` (8) dimensions, or payload over
:data:`MAX_PAYLOAD_BYTES` (the largest ``spectrometer.channels``, 65536, times 8 bytes times
16 arrays: 8 MiB); ``spinflip collect`` disconnects from a station that sends a frame over
:data:`MAX_FRAME_BYTES` (its ZeroMQ socket's ``MAXMSGSIZE``) and reconnects.
``spinflip collect`` relays the messages of several stations on one PUB socket, unchanged
except for ``station``.

Frames
------
A message is one ZeroMQ multipart message of ``2 + N`` frames::

    frame 0        topic   ASCII word, one of "spectrum", "status", "progress", "event"
    frame 1        header  UTF-8 JSON object (strict JSON: no NaN or Infinity tokens)
    frames 2..N+1  payload one frame per entry of header["arrays"], in the same order

Common header fields (every topic)
----------------------------------
=============  ==========================  ===============================================
field          JSON type                   meaning
=============  ==========================  ===============================================
schema         integer                     schema version, 1 (this document). A reader
                                           refuses any other version.
topic          string                      equal to frame 0
time_utc       string                      ISO 8601 with a UTC offset, written
                                           ``YYYY-MM-DDTHH:MM:SS.ffffffZ``; readers also
                                           accept ``+00:00`` for ``Z``. For a spectrum the
                                           UTC mid-time of its integration (of the latest
                                           one, for an average), otherwise when the
                                           message was made.
seq            integer (optional)          per-topic message counter of the sending
                                           daemon, from 1; restarts with the daemon
replay         boolean (optional)          true: the message was sent before and is
                                           sent again to bring a new subscriber up to
                                           date (see Transport); absent or false: new
station        string                      "" from a daemon; the station's name when
                                           relayed by ``spinflip collect``
arrays         array of objects            one per payload frame, in frame order:
                                           ``{"name": str, "dtype": str,
                                           "shape": [int, ...], "unit": str}``
=============  ==========================  ===============================================

A reader ignores header fields and payload arrays it does not know: fields and arrays may
be added within a schema version; removing one or changing its type, unit or meaning makes
a new version.
"number" below means a JSON number (integer or decimal), "integer" a JSON number without
fraction or exponent, and "| null" that JSON ``null`` is allowed (meaning: not known).

Payload arrays
--------------
Each payload frame is the raw bytes of one array, C order (row-major, last index fastest),
no padding, no header of its own. ``dtype`` is one of

=======  ====================================================
``<f4``  IEEE 754 float32, little-endian (4 bytes)
``<f8``  IEEE 754 float64, little-endian (8 bytes)
``<i8``  two's-complement signed int64, little-endian (8 bytes)
``|u1``  unsigned byte (1 byte); booleans are sent as 0 / 1
=======  ====================================================

``shape`` is a list of non-negative integers (``[]`` is a single value) and the frame's
length in bytes is exactly ``product(shape) * itemsize``. ``unit`` is the physical unit of
the values ("" when dimensionless or boolean). Array names are unique within a message.
Unlike the header, payload floats may be NaN: no value (e.g. a channel of an average that no
integration covered; such a channel is also flagged).

Topic "spectrum": one calibrated spectrum
-----------------------------------------
==================  ==============  =========================================================
field               JSON type       meaning
==================  ==============  =========================================================
kind                string          "integration" (one integration, one row of the scan's
                                    file) or "average" (the running average of the scan's
                                    integrations so far, on the LSRK velocity grid of its
                                    first one; flagged channels carry no weight)
scan                string          the scan's name (its file is ``<scan>.fits``)
row                 integer         0-based row of the integration in the scan; for an
                                    "average", the row of the latest integration in it
exposure_s          number          effective integration time, s
tsys_k              number | null   system temperature, K
unit                string          unit of ``data``: "K" (calibrated) or "count"
restfreq_hz         number          rest frequency of the line, Hz
vframe_m_s          number          LSRK radio velocity of a body at rest relative to the
                                    telescope, m/s: v_LSRK = v_topocentric + vframe_m_s
glon_deg, glat_deg  number          galactic longitude, latitude of the pointing, deg
azimuth_deg         number          azimuth, from north through east, deg
elevation_deg       number          elevation above the horizon, deg
ra_deg, dec_deg     number          ICRS right ascension, declination, deg
object              string          name of the target
folded              boolean         true if the frequency-switched copies were folded
flagged_fraction    number          fraction (0..1) of channels flagged
blanked_fraction    number          fraction (0..1) of samples blanked as impulses
nimpulse            integer         impulses blanked in the integration
ncarrier            integer         carrier channels flagged in the integration
==================  ==============  =========================================================

Arrays, all of shape ``[nchan]`` (nchan >= 1); element i of every array belongs to channel i,
whose sky frequency is ``freq_hz[i]``:

=================  =======  ========  ============================================
name               dtype    unit      values
=================  =======  ========  ============================================
freq_hz            ``<f8``  "Hz"      topocentric sky frequency of each channel
v_lsrk_km_s        ``<f8``  "km/s"    LSRK radio velocity of each channel
data               ``<f4``  "K" or    the spectrum; its unit equals header ``unit``
                            "count"
flagged            ``|u1``  ""        1 where the channel is flagged, else 0
exposure_s         ``<f4``  "s"       per-channel exposure left after flagging
=================  =======  ========  ============================================

Topic "status": the daemon's state
----------------------------------
==================  ==============  =========================================================
state               string          "observing", "paused", "idle", "reconnecting" (the
                                    source was lost; reopening it) or "stopping"
source              string          the source of samples ("sim", "rtlsdr", "replay", ...)
lo_hz               number          local-oscillator (tuner centre) frequency, Hz
gain_db             number          tuner gain, dB
sample_rate_hz      number          complex sample rate, Hz
tsys_k              number | null   latest system temperature, K
tsys_source         string          where tsys_k comes from (e.g. "noise_source")
samples_received    integer         complex samples received since start
samples_lost        integer         complex samples lost since start
queue_depth         integer         blocks waiting between reader and DSP
disk_free_bytes     integer         free space in the output folder, bytes
writing             string          "writing"; "holding": the disk refuses writes and
                                    finished integrations wait in memory; or "failed": the
                                    writer thread is gone and the daemon is stopping
held_integrations   integer         integrations waiting in memory to be written
dropped_integrations integer        integrations dropped since start: the memory bound
                                    (output.hold_mb) was reached while holding, or one could
                                    not be written (an error event says why)
worker_failures     object          ``{thread: integer}`` unexpected failures of the
                                    daemon's threads since start ("reader", "writer",
                                    "publisher", "control", "status", "watchdog"); each is
                                    also an error event; empty when none failed
uptime_s            number          seconds since the daemon started
version             string          spinflip version
scan                string | null   the scan being written, null between scans
pointing            object          ``{"frame": string, "lon_deg": number,
                                    "lat_deg": number, "object": string}``; frame is
                                    "galactic", "radec" or "azel"
drops               object          ``{topic: integer}`` messages dropped per topic
rfi                 object          ``{"impulses", "carrier_onsets", "sk_cells",
                                    "blanked_spectra"}``, integers since start; and of
                                    the newest integration (null before the first):
                                    ``"flagged_rfi_fraction"`` number, fraction (0..1) of
                                    its channels flagged for interference (carriers,
                                    spurs, masks, channels emptied by flagging; not the
                                    DC channel); ``"uncovered_fraction"`` number,
                                    fraction (0..1) of its channels without a fold
                                    partner (flagged, but no interference; 0 unfolded);
                                    ``"uncovered_hz"`` ``[first, last]`` numbers,
                                    topocentric sky frequencies of the first and last
                                    uncovered channel (one run at a band edge), Hz, or
                                    null when none is
==================  ==============  =========================================================

No arrays (in this version).

Topic "progress": where the observation is
------------------------------------------
=====================  ==============  ====================================================
scan                   string | null   the scan, null between scans
integration            integer         0-based number of the integration being summed
integration_elapsed_s  number          time summed into it so far, s
integration_total_s    number          its full length, s
scan_elapsed_s         number          time observed in this scan, s
scan_total_s           number | null   the scan's planned length, s; null: unbounded
eta_s                  number | null   time to the scan's end, s; null: unknown
=====================  ==============  ====================================================

No arrays (in this version).

Topic "event": something an observer must see
---------------------------------------------
==========  ======  =========================================================
severity    string  "info", "warning" or "error"
text        string  one line (no line breaks)
==========  ======  =========================================================

No arrays (in this version).

Notes
-----
:func:`encode` checks a message against this schema before it leaves, :func:`decode` checks
every message it reads; both raise :class:`WireError` (a ``ValueError``) with one line.

References
----------
ZeroMQ RFC 29/PUBSUB (topic prefix matching, dropping for slow subscribers) and
RFC 23/ZMTP (multipart messages), https://rfc.zeromq.org (from memory).
RFC 8259 (JSON), RFC 3339 (the ISO 8601 profile of ``time_utc``), IEEE 754 (floats).
"""

from __future__ import annotations

import datetime as _dt
import json
import math
from dataclasses import dataclass, field
from typing import Any

import numpy as np

from spinflip.daemon.error_line import one_line, quoted, quoted_json
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

_FIELDS = {
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

_CHOICES = {
    ("spectrum", "kind"): ("integration", "average"),
    ("spectrum", "unit"): ("K", "count"),
    ("status", "state"): ("observing", "paused", "idle", "reconnecting", "stopping"),
    ("status", "writing"): ("writing", "holding", "failed"),
    ("event", "severity"): ("info", "warning", "error"),
}

_FRACTIONS = ("flagged_fraction", "blanked_fraction")

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


def _check_type(where: str, value, allowed: tuple) -> None:
    kind = json_type(value)
    ok = kind in allowed or (kind == "integer" and "number" in allowed)
    if not ok:
        raise WireError(f"{where} = {quoted_json(value)} is a JSON {kind}: expected "
                        f"{' or '.join(allowed)}")
    if kind == "number" and not math.isfinite(value):
        raise WireError(f"{where} = {value!r}: JSON numbers must be finite")


def _check_schema(value) -> None:
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


def _check_array_list(descs) -> None:
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
    if topic == "event" and ("\n" in header["text"] or "\r" in header["text"]):
        raise WireError(f"header.text = {quoted_json(header['text'])}: expected one line")


# ----------------------------------------------------------------------------------------------
# encode
# ----------------------------------------------------------------------------------------------
def _wire_dtype(name: str, arr: np.ndarray) -> str:
    """The wire dtype of an array: float32/float64 as they are, bool and uint8 as |u1, any
    signed integer widened to <i8; anything else refused."""
    kind, size = arr.dtype.kind, arr.dtype.itemsize
    if kind == "f" and size in (4, 8):
        return "<f4" if size == 4 else "<f8"
    if kind == "b" or (kind == "u" and size == 1):
        return "|u1"
    if kind == "i":
        return "<i8"
    raise WireError(f"array {name!r} has dtype {arr.dtype}: send float32, float64, a signed "
                    "integer, uint8 or bool")


def _to_json_value(obj):
    """``json.dumps`` default: NumPy scalars as their Python values."""
    if isinstance(obj, np.generic):
        return obj.item()
    raise TypeError(f"{type(obj).__name__} is not JSON")


def _find_nonfinite(obj, path="header"):
    if isinstance(obj, (float, np.floating)) and not math.isfinite(obj):
        return path
    if isinstance(obj, dict):
        for k, v in obj.items():
            hit = _find_nonfinite(v, f"{path}.{k}")
            if hit:
                return hit
    if isinstance(obj, (list, tuple)):
        for i, v in enumerate(obj):
            hit = _find_nonfinite(v, f"{path}[{i}]")
            if hit:
                return hit
    return None


def encode(topic: str, header: dict, arrays: dict | None = None) -> list[bytes]:
    """Build the frames of one message and check them against the schema.

    Parameters
    ----------
    topic : str
        One of :data:`TOPICS`.
    header : dict
        The topic's fields (see the module docstring). ``schema`` and ``topic`` are filled in
        (if given they must agree), ``time_utc`` defaults to :func:`now_utc_iso`, ``station``
        to ``""``; ``arrays`` is always rebuilt from the ``arrays`` argument. NumPy scalars
        are allowed and sent as plain JSON numbers. The dict itself is not modified.
    arrays : dict[str, tuple[numpy.ndarray, str]], optional
        Payload: name -> (array, unit), in frame order. float32 goes as ``<f4``, float64 as
        ``<f8``, bool and uint8 as ``|u1``, any signed integer as ``<i8``.

    Returns
    -------
    list[bytes]
        ``[topic, header, payload...]``, ready for ``socket.send_multipart``.

    Raises
    ------
    WireError
        The message would not follow the schema (one line), e.g. a missing field, NaN in
        the header (JSON has none: send null where the schema allows it), or a spectrum
        array of the wrong dtype.
    """
    if topic not in TOPICS:
        raise WireError(f"topic {topic!r} is unknown: expected one of {', '.join(TOPICS)}")
    if not isinstance(header, dict):
        raise WireError(f"header is a {type(header).__name__}: expected a dict")
    for key, want in (("schema", SCHEMA_VERSION), ("topic", topic)):
        if key in header and header[key] != want:
            raise WireError(f"header {key} = {header[key]!r} but this message is {want!r}")
    out = {"schema": SCHEMA_VERSION, "topic": topic,
           "time_utc": header["time_utc"] if "time_utc" in header else now_utc_iso(),
           "station": header.get("station", "")}
    out.update((k, v) for k, v in header.items() if k not in out and k != "arrays")
    descs, payload = [], []
    for name, item in (arrays or {}).items():
        if not (isinstance(item, tuple) and len(item) == 2 and isinstance(item[1], str)):
            raise WireError(f"array {name!r}: expected a tuple (numpy array, unit string)")
        arr = np.asarray(item[0])
        dtype = _wire_dtype(name, arr)
        wire = np.asarray(arr, dtype=np.dtype(dtype), order="C")   # C order, little-endian
        descs.append({"name": name, "dtype": dtype, "shape": list(wire.shape),
                      "unit": item[1]})
        payload.append(wire.tobytes())
    out["arrays"] = descs
    bad = _find_nonfinite(out)
    if bad:
        raise WireError(f"{bad} is NaN or infinite, which JSON cannot carry: send a finite "
                        "number, or null where the schema allows it")
    try:
        text = json.dumps(out, default=_to_json_value, allow_nan=False, ensure_ascii=False,
                          separators=(",", ":"))
    except TypeError as exc:
        raise WireError(f"header holds a value JSON cannot carry: {exc}") from None
    # check exactly what goes on the wire (NumPy scalars are plain numbers by now)
    validate_header(topic, json.loads(text))
    return [topic.encode("ascii"), text.encode("utf-8"), *payload]


# ----------------------------------------------------------------------------------------------
# decode
# ----------------------------------------------------------------------------------------------
def _refuse_constant(name: str):
    raise WireError(f"header holds the token {name}, which strict JSON does not allow")


def _depth(value) -> int:
    """How deeply JSON objects and arrays nest in ``value`` (0 for a scalar), without recursion;
    stops counting past :data:`MAX_DEPTH`."""
    deepest, stack = 0, [(value, 1)]
    while stack:
        item, level = stack.pop()
        if isinstance(item, (dict, list)):
            deepest = max(deepest, level)
            if level > MAX_DEPTH:
                return level
            stack.extend((v, level + 1) for v in (item.values() if isinstance(item, dict)
                                                  else item))
    return deepest


def decode(frames) -> Message:
    """Read one message, checking it against the schema.

    Parameters
    ----------
    frames : sequence of bytes-like
        The frames of one multipart message (``socket.recv_multipart()``; ``bytes``,
        ``zmq.Frame`` or anything with the buffer protocol).

    Returns
    -------
    Message
        Topic, header (as sent) and arrays (NumPy copies in native byte order, shaped).

    Raises
    ------
    WireError
        One line naming what is not per schema: the frame count, a topic that is not ASCII
        or not known, a header that is not a UTF-8 JSON object, another schema version (a
        newer one with "update spinflip"), a missing or mistyped field, a payload frame whose
        length does not match its entry in ``arrays``, or a dtype not allowed.
    """
    try:
        return _decode(frames)
    except WireError as exc:
        raise WireError(one_line(str(exc), MAX_ERROR_CHARS)) from None
    except RecursionError:
        raise WireError(f"header nests too deeply: at most {MAX_DEPTH} levels") from None
    except (ValueError, TypeError, OverflowError, MemoryError) as exc:
        # e.g. an integer longer than Python converts (ValueError): refused, never raised on
        raise WireError(one_line(f"message not usable: {type(exc).__name__}: {exc}", MAX_ERROR_CHARS)) \
            from None


def _decode(frames) -> Message:
    frames = list(frames)
    if len(frames) < 2:
        raise WireError(f"a message has at least 2 frames (topic, header), got {len(frames)}")
    raw_topic = bytes(memoryview(frames[0])[:64])
    if memoryview(frames[0]).nbytes > 32:
        raise WireError(f"topic frame {raw_topic[:40]!r}... is too long: expected one of "
                        f"{', '.join(TOPICS)}")
    try:
        topic = raw_topic.decode("ascii")
    except UnicodeDecodeError:
        raise WireError(f"topic frame {raw_topic[:40]!r} is not ASCII") from None
    if topic not in TOPICS:
        raise WireError(f"topic {topic[:40]!r} is unknown: expected one of {', '.join(TOPICS)}")
    if len(frames) - 2 > MAX_ARRAYS:
        raise WireError(f"{topic} message has {len(frames) - 2} payload frames: at most "
                        f"{MAX_ARRAYS}")
    header_bytes = memoryview(frames[1]).nbytes
    if header_bytes > MAX_HEADER_BYTES:
        raise WireError(f"{topic} header of {header_bytes} bytes: at most {MAX_HEADER_BYTES}")
    payload_bytes = sum(memoryview(f).nbytes for f in frames[2:])
    if payload_bytes > MAX_PAYLOAD_BYTES:
        raise WireError(f"{topic} payload of {payload_bytes} bytes: at most "
                        f"{MAX_PAYLOAD_BYTES}")
    try:
        text = bytes(memoryview(frames[1])).decode("utf-8")
    except UnicodeDecodeError as exc:
        raise WireError(f"{topic} header is not UTF-8 ({exc.reason} at byte {exc.start})") \
            from None
    try:
        header = json.loads(text, parse_constant=_refuse_constant)
    except json.JSONDecodeError as exc:
        raise WireError(f"{topic} header is not JSON: {exc.msg} at character {exc.pos}") \
            from None
    if not isinstance(header, dict):
        raise WireError(f"{topic} header is a JSON {json_type(header)}: expected an object")
    if _depth(header) > MAX_DEPTH:
        raise WireError(f"{topic} header nests too deeply: at most {MAX_DEPTH} levels")
    # the version first, so that a newer schema is reported as such and not as a missing field
    if "schema" in header:
        _check_schema(header["schema"])
    validate_header(topic, header)
    descs = header["arrays"]
    if len(frames) - 2 != len(descs):
        raise WireError(f"{topic} header lists {len(descs)} arrays but {len(frames) - 2} "
                        "payload frames follow")
    arrays = {}
    for d, frame in zip(descs, frames[2:]):
        buf = memoryview(frame).cast("B")
        count = math.prod(d["shape"])
        want = count * _ITEMSIZE[d["dtype"]]
        if buf.nbytes != want:
            raise WireError(f"{topic} array {quoted(d['name'])} has {buf.nbytes} bytes: shape "
                            f"{quoted_json(d['shape'])} of {d['dtype']} needs "
                            f"{want if want < 10 ** 30 else 'more'}")
        dt = np.dtype(d["dtype"])
        arr = np.frombuffer(buf, dtype=dt, count=count).reshape(d["shape"])
        arrays[d["name"]] = arr.astype(dt.newbyteorder("="), copy=True)
    return Message(topic=topic, header=header, arrays=arrays)
