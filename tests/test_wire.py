"""The ZeroMQ wire schema (daemon/live/schema/): round trips, a schema-only subscriber, refusals.

Outside references used below:
- Python's ``struct`` module (format characters "<f", "<d", "<q", "B": IEEE 754 float32 and
  float64, int64, unsigned byte, little-endian) decodes payloads independently of NumPy.
- ZeroMQ PUB/SUB prefix filtering on the first frame (RFC 29/PUBSUB, from memory), observed
  with real pyzmq sockets on loopback.
- astropy's ``u.doppler_radio`` equivalency (FITS WCS paper III radio convention) checks the
  velocity axis a subscriber rebuilds from the documented units.
"""

from __future__ import annotations

import json
import math
import re
import struct

import numpy as np
import pytest
import zmq
from astropy import units as u
from hypothesis import given, settings
from hypothesis.extra import numpy as hnp

from spinflip.daemon.live import schema
from spinflip.daemon.live.schema import WireError, decode, encode, validate_header

REST_HZ = 1_420_405_751.768          # HI rest frequency (Hellwig et al. 1970, from memory)
C_M_S = 299_792_458.0                # speed of light, SI exact
TIME = "2025-03-01T21:04:05.250000Z"


def spectrum_message(nchan=32, vframe_m_s=-12_345.0, unit="K", kind="integration"):
    """A spectrum's header and arrays as a daemon would send them (radio convention)."""
    freq_hz = REST_HZ + (np.arange(nchan) - nchan / 2) * 2_000.0
    v_lsrk_km_s = (C_M_S * (REST_HZ - freq_hz) / REST_HZ + vframe_m_s) / 1000.0
    flagged = np.zeros(nchan, bool)
    flagged[[3, 4]] = True
    header = {
        "time_utc": TIME, "kind": kind, "scan": "scan-0007", "row": 5, "exposure_s": 10.0,
        "tsys_k": 112.5, "unit": unit, "restfreq_hz": REST_HZ, "vframe_m_s": vframe_m_s,
        "glon_deg": 120.0, "glat_deg": 0.5, "azimuth_deg": 181.25, "elevation_deg": 42.0,
        "ra_deg": 3.5, "dec_deg": 62.75, "object": "G120.0+0.5", "folded": True,
        "flagged_fraction": float(flagged.mean()), "blanked_fraction": 0.01,
        "nimpulse": 3, "ncarrier": 2,
    }
    arrays = {
        "freq_hz": (freq_hz, "Hz"),
        "v_lsrk_km_s": (v_lsrk_km_s, "km/s"),
        "data": (np.linspace(-1, 40, nchan).astype(np.float32), unit),
        "flagged": (flagged, ""),
        "exposure_s": (np.where(flagged, 0.0, 10.0).astype(np.float32), "s"),
    }
    return header, arrays


def status_header():
    return {
        "time_utc": TIME, "state": "observing", "source": "sim", "lo_hz": 1_420_000_000.0,
        "gain_db": 40.2, "sample_rate_hz": 2_400_000.0, "tsys_k": None,
        "tsys_source": "noise_source", "samples_received": 123_456_789, "samples_lost": 0,
        "queue_depth": 1, "disk_free_bytes": 9_876_543_210, "uptime_s": 61.5,
        "writing": "writing", "held_integrations": 0, "dropped_integrations": 0, "worker_failures": {},
        "version": "0.1.0", "scan": None,
        "pointing": {"frame": "galactic", "lon_deg": 120.0, "lat_deg": 0.5, "object": "G120"},
        "drops": {"spectrum": 0, "status": 2}, "rfi": {"impulses": 4, "carrier_onsets": 1,
                                                       "sk_cells": 17, "blanked_spectra": 0},
    }


def progress_header():
    return {"time_utc": TIME, "scan": "scan-0007", "integration": 5,
            "integration_elapsed_s": 2.5, "integration_total_s": 10.0, "scan_elapsed_s": 52.5,
            "scan_total_s": None, "eta_s": None}


def event_header():
    return {"time_utc": TIME, "severity": "warning", "text": "carrier at 1420.1 MHz"}


def all_messages():
    h, a = spectrum_message()
    return [("spectrum", h, a), ("status", status_header(), {}),
            ("progress", progress_header(), {}), ("event", event_header(), {})]


# ----------------------------------------------------------------------------------------------
# a subscriber written from the module docstring alone (no schema.decode, no NumPy dtypes)
# ----------------------------------------------------------------------------------------------
# dtype -> struct format character (the docstring's dtype table; Python struct documentation)
STRUCT_CODE = {"<f4": "f", "<f8": "d", "<i8": "q", "|u1": "B"}
STRUCT_SIZE = {"<f4": 4, "<f8": 8, "<i8": 8, "|u1": 1}


def schema_only_decode(frames):
    topic = frames[0].decode("ascii")
    header = json.loads(frames[1].decode("utf-8"))
    assert header["schema"] == 1 and header["topic"] == topic
    arrays = {}
    for desc, frame in zip(header["arrays"], frames[2:], strict=True):
        n = math.prod(desc["shape"])
        assert len(frame) == n * STRUCT_SIZE[desc["dtype"]]
        values = struct.unpack(f"<{n}{STRUCT_CODE[desc['dtype']]}", frame)
        arrays[desc["name"]] = (np.array(values).reshape(desc["shape"]), desc["unit"])
    return topic, header, arrays


@pytest.fixture
def pubsub():
    """An XPUB (a PUB that reports subscriptions) and a SUB on loopback, subscribed to all."""
    ctx = zmq.Context()
    pub = ctx.socket(zmq.XPUB)
    pub.linger = 0
    pub.bind("tcp://127.0.0.1:*")
    sub = ctx.socket(zmq.SUB)
    sub.linger = 0
    sub.setsockopt(zmq.SUBSCRIBE, b"")
    sub.connect(pub.getsockopt_string(zmq.LAST_ENDPOINT))
    assert pub.poll(5000), "the subscription never reached the publisher"
    assert pub.recv() == b"\x01"          # XPUB: subscribe message for the empty prefix
    yield pub, sub
    pub.close()
    sub.close()
    ctx.term()


def receive(sock, timeout_ms=5000):
    assert sock.poll(timeout_ms), "no message within the time limit"
    return sock.recv_multipart()


def test_every_topic_round_trips_over_real_sockets(pubsub):
    pub, sub = pubsub
    for topic, header, arrays in all_messages():
        pub.send_multipart(encode(topic, header, arrays))
        msg = decode(receive(sub))
        assert msg.topic == topic
        for key, value in header.items():
            assert msg.header[key] == value, key
        assert msg.header["schema"] == schema.SCHEMA_VERSION and msg.header["station"] == ""
        assert list(msg.arrays) == list(arrays)
        for name, (arr, unit) in arrays.items():
            np.testing.assert_array_equal(msg.arrays[name], np.asarray(arr, dtype=float))
            assert msg.unit(name) == unit
        if topic == "spectrum":
            assert msg.arrays["data"].dtype == np.float32
            assert msg.arrays["freq_hz"].dtype == np.float64
            assert msg.arrays["flagged"].dtype == np.uint8


def test_schema_alone_is_enough_for_a_subscriber_with_units(pubsub):
    pub, sub = pubsub
    for topic, header, arrays in all_messages():
        pub.send_multipart(encode(topic, header, arrays))
        got_topic, got, arrs = schema_only_decode(receive(sub))
        assert got_topic == topic
        if topic == "spectrum":
            freq, freq_unit = arrs["freq_hz"]
            vel, vel_unit = arrs["v_lsrk_km_s"]
            data, data_unit = arrs["data"]
            flagged, flag_unit = arrs["flagged"]
            chanexp, exp_unit = arrs["exposure_s"]
            assert (freq_unit, vel_unit, data_unit, flag_unit, exp_unit) == \
                ("Hz", "km/s", got["unit"], "", "s")
            # documented: v_LSRK = v_topocentric + vframe_m_s, radio convention.
            # Reference: astropy u.doppler_radio (FITS WCS paper III).
            v_topo = (freq * u.Hz).to(u.km / u.s, u.doppler_radio(got["restfreq_hz"] * u.Hz))
            expect = v_topo.value + got["vframe_m_s"] / 1000.0
            np.testing.assert_allclose(vel, expect, atol=1e-6)
            assert abs(vel).max() < 100 and abs(freq / 1e6 - 1420.4).max() < 0.1
            assert set(np.unique(flagged)) <= {0, 1}
            assert got["flagged_fraction"] == pytest.approx(flagged.mean())
            assert (chanexp <= got["exposure_s"]).all() and (chanexp[flagged == 1] == 0).all()
            np.testing.assert_allclose(data, arrays["data"][0], rtol=0, atol=0)
        elif topic == "status":
            assert got["sample_rate_hz"] == 2.4e6 and got["lo_hz"] == 1.42e9
            assert got["tsys_k"] is None and got["pointing"]["lon_deg"] == 120.0
            assert arrs == {}
        elif topic == "progress":
            assert got["integration_elapsed_s"] <= got["integration_total_s"]
            assert got["scan_total_s"] is None
        else:
            assert got["severity"] == "warning" and "\n" not in got["text"]


def test_topic_is_the_first_frame_so_prefix_subscriptions_select_it():
    ctx = zmq.Context()
    pub = ctx.socket(zmq.XPUB)
    sub = ctx.socket(zmq.SUB)
    try:
        pub.bind("tcp://127.0.0.1:*")
        sub.setsockopt(zmq.SUBSCRIBE, b"status")
        sub.connect(pub.getsockopt_string(zmq.LAST_ENDPOINT))
        assert pub.poll(5000) and pub.recv() == b"\x01status"
        for topic, header, arrays in all_messages()[::-1] + all_messages():
            pub.send_multipart(encode(topic, header, arrays))
        first = decode(receive(sub))
        assert sub.poll(5000)
        second = decode(sub.recv_multipart(copy=False))     # zmq.Frame objects work too
        assert first.topic == second.topic == "status"
        assert not sub.poll(200)          # nothing else came through the filter
    finally:
        pub.close(linger=0)
        sub.close(linger=0)
        ctx.term()


def test_no_topic_is_a_prefix_of_another():
    # else a SUB for one would also receive the other (ZeroMQ prefix matching)
    for a in schema.TOPICS:
        for b in schema.TOPICS:
            assert a == b or not b.startswith(a)


def test_the_docstring_names_every_required_field_and_array():
    doc = schema.__doc__
    sections = re.split(r'^Topic "(\w+)"', doc, flags=re.M)
    by_topic = dict(zip(sections[1::2], sections[2::2], strict=True))
    assert set(by_topic) == set(schema.TOPICS)
    for topic, fields in schema._FIELDS.items():
        for name in fields:
            assert re.search(rf"\b{name}\b", by_topic[topic]), (topic, name)
    for name, (dtype, unit) in schema.SPECTRUM_ARRAYS.items():
        line = next(ln for ln in by_topic["spectrum"].splitlines()
                    if ln.startswith(name + " ") and "``" in ln)      # the arrays table
        assert dtype in line and (unit is None or f'"{unit}"' in line), line
    for dtype in schema.DTYPES:
        assert f"``{dtype}``" in doc


@settings(max_examples=40, deadline=None)
@given(hnp.arrays(hnp.floating_dtypes(sizes=(32, 64), endianness="?"),
                  hnp.array_shapes(min_dims=0, max_dims=3, max_side=5)))
def test_any_float_array_round_trips_bit_for_bit(arr):
    # includes NaN payloads, infinities, negative zero and big-endian input
    frames = encode("event", event_header(), {"x": (arr, "K")})
    got = decode(frames).arrays["x"]
    assert got.shape == arr.shape and got.dtype.itemsize == arr.dtype.itemsize
    assert got.dtype.isnative
    want = arr.astype(arr.dtype.newbyteorder("<"))
    assert got.astype("<" + got.dtype.str[1:]).tobytes() == want.tobytes()


def test_int_and_bool_arrays_and_numpy_scalars():
    frames = encode("event", {**event_header(), "extra": np.int32(7), "f": np.float32(0.5)},
                    {"i": (np.arange(6, dtype=np.int16).reshape(2, 3), ""),
                     "b": (np.array([True, False]), "")})
    msg = decode(frames)
    assert msg.header["extra"] == 7 and msg.header["f"] == 0.5
    assert [d["dtype"] for d in msg.header["arrays"]] == ["<i8", "|u1"]
    np.testing.assert_array_equal(msg.arrays["i"], np.arange(6).reshape(2, 3))
    assert struct.unpack("<6q", frames[2]) == tuple(range(6))
    np.testing.assert_array_equal(msg.arrays["b"], [1, 0])


def test_unknown_fields_and_arrays_are_allowed_and_kept():
    h = {**event_header(), "added_later": {"nested": [1, 2]}}
    assert decode(encode("event", h)).header["added_later"] == {"nested": [1, 2]}
    header, arrays = spectrum_message()
    extra = {**arrays, "tsys_k": (np.full(32, 110.0, np.float32), "K")}
    msg = decode(encode("spectrum", header, extra))
    assert msg.unit("tsys_k") == "K" and msg.arrays["tsys_k"][0] == np.float32(110.0)


def test_now_utc_iso_is_a_utc_time():
    import datetime as dt
    text = schema.now_utc_iso()
    t = dt.datetime.fromisoformat(text)
    assert text.endswith("Z") and t.utcoffset() == dt.timedelta(0)
    validate_header("event", {**event_header(), "schema": 1, "topic": "event",
                              "station": "", "arrays": [], "time_utc": text})


# ----------------------------------------------------------------------------------------------
# refusals: one line naming what is wrong
# ----------------------------------------------------------------------------------------------
def good_frames(topic="spectrum"):
    topic, header, arrays = {t: (t, h, a) for t, h, a in all_messages()}[topic]
    return encode(topic, header, arrays)


def with_header(frames, change):
    header = json.loads(frames[1])
    change(header)
    return [frames[0], json.dumps(header).encode(), *frames[2:]]


def _drop(key):
    return lambda h: h.pop(key)


def _set(key, value):
    return lambda h: h.__setitem__(key, value)


def _set_array(i, key, value):
    return lambda h: h["arrays"][i].__setitem__(key, value)


MALFORMED = [
    ("one frame", lambda f: f[:1], r"at least 2 frames"),
    ("no frames", lambda f: [], r"at least 2 frames"),
    ("topic not ascii", lambda f: ["spéctrum".encode(), *f[1:]], r"not ASCII"),
    ("unknown topic", lambda f: [b"spectra", *f[1:]], r"'spectra' is unknown.*spectrum"),
    ("header not utf-8", lambda f: [f[0], b"\xff\xfe{}", *f[2:]], r"not UTF-8"),
    ("header not json", lambda f: [f[0], b"{oops", *f[2:]], r"not JSON"),
    ("header a list", lambda f: [f[0], b"[1, 2]", *f[2:]], r"JSON array: expected an object"),
    ("NaN token", lambda f: with_header(f, _set("tsys_k", float("nan"))), r"NaN"),
    ("newer schema", lambda f: with_header(f, _set("schema", 2)),
     r"schema = 2 is newer.*\(1\): update spinflip"),
    ("older schema", lambda f: with_header(f, _set("schema", 0)), r"schema = 0: expected 1"),
    ("schema missing", lambda f: with_header(f, _drop("schema")), r"lacks the field 'schema'"),
    ("header topic differs", lambda f: with_header(f, _set("topic", "status")),
     r"differs from the topic frame"),
    ("time not utc", lambda f: with_header(f, _set("time_utc", "2025-03-01T21:04:05+01:00")),
     r"not UTC"),
    ("time naive", lambda f: with_header(f, _set("time_utc", "2025-03-01T21:04:05")),
     r"not UTC"),
    ("time garbage", lambda f: with_header(f, _set("time_utc", "yesterday")),
     r"not an ISO 8601"),
    ("missing field", lambda f: with_header(f, _drop("vframe_m_s")),
     r"lacks the field 'vframe_m_s'"),
    ("row as string", lambda f: with_header(f, _set("row", "5")),
     r"header.row = \"5\" is a JSON string: expected integer"),
    ("row as bool", lambda f: with_header(f, _set("row", True)), r"header.row = true"),
    ("row as float", lambda f: with_header(f, _set("row", 5.0)), r"expected integer"),
    ("seq not an integer", lambda f: with_header(f, _set("seq", "7")), r"header.seq"),
    ("bad kind", lambda f: with_header(f, _set("kind", "sum")),
     r"kind = \"sum\": allowed are integration, average"),
    ("fraction > 1", lambda f: with_header(f, _set("flagged_fraction", 1.5)), r"fraction 0..1"),
    ("arrays missing", lambda f: with_header(f, _drop("arrays")), r"lacks the field 'arrays'"),
    ("too few payload frames", lambda f: f[:-1], r"lists 5 arrays but 4 payload frames"),
    ("too many payload frames", lambda f: [*f, b"1234"], r"lists 5 arrays but 6"),
    ("payload too short", lambda f: [*f[:2], f[2][:-1], *f[3:]],
     r"'freq_hz' has 255 bytes: shape \[32\] of <f8 needs 256"),
    ("dtype not allowed", lambda f: with_header(f, _set_array(2, "dtype", ">f4")),
     r"dtype = \">f4\": allowed are <f4, <f8, <i8, \|u1"),
    ("negative shape", lambda f: with_header(f, _set_array(0, "shape", [-32])),
     r"non-negative integers"),
    ("duplicate name", lambda f: with_header(f, _set_array(1, "name", "freq_hz")),
     r"appears twice"),
    ("data unit differs", lambda f: with_header(f, _set("unit", "count")),
     r"'data' has unit 'K': expected 'count'"),
    ("data as float64", lambda f: with_header(f, _set_array(2, "dtype", "<f8")),
     r"'data' has dtype <f8: expected <f4"),
]


@pytest.mark.parametrize("what,damage,pattern", MALFORMED, ids=[m[0] for m in MALFORMED])
def test_malformed_messages_are_refused_with_one_line(what, damage, pattern):
    with pytest.raises(WireError) as info:
        decode(damage(good_frames()))
    text = str(info.value)
    assert isinstance(info.value, ValueError)
    assert text and "\n" not in text and len(text) < 200, text
    assert re.search(pattern, text), text


@pytest.mark.parametrize("topic,change,pattern", [
    ("status", _set("state", "sleeping"), r"allowed are observing, paused, idle, reconnecting, stopping"),
    ("status", lambda h: h["pointing"].pop("lat_deg"), r"header.pointing lacks.*lat_deg"),
    ("status", lambda h: h["pointing"].__setitem__("frame", "ecliptic"), r"pointing.frame"),
    ("status", lambda h: h["rfi"].__setitem__("sk_cells", 1.5), r"header.rfi.sk_cells"),
    ("status", lambda h: h["drops"].__setitem__("spectrum", "many"), r"header.drops.spectrum"),
    ("status", _set("scan", 7), r"header.scan = 7 .*string or null"),
    ("progress", _set("eta_s", "soon"), r"header.eta_s"),
    ("event", _set("text", "two\nlines"), r"one line"),
    ("event", _set("severity", "fatal"), r"allowed are info, warning, error"),
])
def test_other_topics_are_checked_too(topic, change, pattern):
    frames = with_header(good_frames(topic), change)
    with pytest.raises(WireError, match=pattern):
        decode(frames)


def test_encode_refuses_what_the_schema_does_not_allow():
    header, arrays = spectrum_message()
    with pytest.raises(WireError, match=r"header.glon_deg is NaN or infinite"):
        encode("spectrum", {**header, "glon_deg": float("nan")}, arrays)
    with pytest.raises(WireError, match=r"'data' has dtype <f8: expected <f4"):
        encode("spectrum", header, {**arrays, "data": (arrays["data"][0].astype(float), "K")})
    with pytest.raises(WireError, match=r"dtype float16"):
        encode("event", event_header(), {"x": (np.zeros(2, np.float16), "")})
    with pytest.raises(WireError, match=r"lacks the array 'flagged'"):
        encode("spectrum", header, {k: v for k, v in arrays.items() if k != "flagged"})
    with pytest.raises(WireError, match=r"expected a tuple"):
        encode("event", event_header(), {"x": np.zeros(2)})
    with pytest.raises(WireError, match=r"'bogus' is unknown"):
        encode("bogus", {})
    with pytest.raises(WireError, match=r"header schema = 2"):
        encode("event", {**event_header(), "schema": 2})
    # a spectrum whose channels disagree in number
    short = {**arrays, "flagged": (arrays["flagged"][0][:-1], "")}
    with pytest.raises(WireError, match=r"'flagged' has 31 channels, freq_hz has 32"):
        encode("spectrum", header, short)


@pytest.mark.parametrize("rfi_extra, fragment", [
    ({"flagged_rfi_fraction": 1.5}, "header.rfi.flagged_rfi_fraction = 1.5: expected a fraction"),
    ({"uncovered_fraction": "a third"}, "header.rfi.uncovered_fraction"),
    ({"uncovered_hz": [1.4e9]}, "header.rfi.uncovered_hz"),
    ({"worker_failures_bad": None}, None),
])
def test_status_fractions_of_the_newest_row_are_checked(rfi_extra, fragment):
    """The rfi fractions and the uncovered range (issue 12, item 11) are typed on the wire."""
    header = status_header()
    good = dict(header["rfi"], flagged_rfi_fraction=0.0, uncovered_fraction=1 / 3,
                uncovered_hz=[1.4196e9, 1.4200e9])
    assert schema.decode(schema.encode("status", dict(header, rfi=good))).header["rfi"] == good
    bad = dict(good, **rfi_extra)
    if fragment is None:                          # an unknown extra key is passed over
        schema.decode(schema.encode("status", dict(header, rfi=bad)))
        return
    with pytest.raises(schema.WireError, match=re.escape(fragment)):
        schema.decode(schema.encode("status", dict(header, rfi=bad)))
