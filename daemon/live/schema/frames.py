"""Building the frames of a wire message (:func:`encode`) and reading them (:func:`decode`),
both checked against the schema (:mod:`spinflip.daemon.live.schema`).
"""

from __future__ import annotations

import json
import math
from collections.abc import Iterable
from typing import Any, NoReturn

import numpy as np

from spinflip.daemon.error_line import one_line, quoted, quoted_json
from spinflip.daemon.live.schema.fields import (
    _ITEMSIZE,
    MAX_ARRAYS,
    MAX_DEPTH,
    MAX_ERROR_CHARS,
    MAX_HEADER_BYTES,
    MAX_PAYLOAD_BYTES,
    SCHEMA_VERSION,
    TOPICS,
    Message,
    WireError,
    _check_schema,
    json_type,
    now_utc_iso,
    validate_header,
)


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


def _to_json_value(obj: object) -> Any:
    """``json.dumps`` default: NumPy scalars as their Python values."""
    if isinstance(obj, np.generic):
        return obj.item()
    raise TypeError(f"{type(obj).__name__} is not JSON")


def _find_nonfinite(obj: object, path: str = "header") -> str | None:
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
def _refuse_constant(name: str) -> NoReturn:
    raise WireError(f"header holds the token {name}, which strict JSON does not allow")


def _depth(value: Any) -> int:
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


def decode(frames: Iterable[Any]) -> Message:
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


def _decode(frames: Iterable[Any]) -> Message:
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
    for d, frame in zip(descs, frames[2:], strict=True):
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
