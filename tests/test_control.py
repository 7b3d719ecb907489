"""The control channel: request checking, the REP server thread, the client and ``spinflip ctl``.

Everything runs over real pyzmq sockets on loopback, bound to ``tcp://127.0.0.1:*`` (the
kernel picks a free port; the server reports it from ``LAST_ENDPOINT``). Raw requests are sent
from a DEALER socket with the empty delimiter frame a REQ socket would add, so tests can send
what a REQ client cannot (several frames, bytes that are not JSON) (ZeroMQ RFC 28/REQREP,
from memory).
"""

from __future__ import annotations

import json
import math
import socket as pysocket
import threading

import pytest
import zmq
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st

from spinflip.daemon.live import control
from spinflip.daemon.live.control import (
    COMMANDS,
    MAX_REQUEST_BYTES,
    CommandError,
    ControlError,
    ControlServer,
    ctl_main,
    request,
    validate_request,
)

#: Longest a test waits for one reply before calling the server hung, ms (not a timing check).
_HANG_MS = 5000


class Recorder:
    """Handler that records calls; echoes cmd and args; ``annotate`` text drives failures."""

    def __init__(self):
        self.calls = []

    def __call__(self, cmd, args):
        self.calls.append((cmd, args))
        text = args.get("text", "")
        if text == "boom":
            raise RuntimeError("boom\nsecond line")
        if text == "refuse":
            raise CommandError("annotate: refused by the daemon: not now")
        if text == "not a dict":
            return ["x"]
        if text == "nan":
            return {"value": float("nan")}
        if cmd == "status":
            return {"state": "observing", "tsys_k": None, "pointing": {"frame": "galactic",
                    "lon_deg": 30.0, "object": "G30 b0"}, "drops": {}, "samples_lost": 0}
        return {"cmd": cmd, "args": args}


@pytest.fixture(scope="module")
def server():
    handler = Recorder()
    srv = ControlServer("tcp://127.0.0.1:*", handler).start()
    srv.recorder = handler
    yield srv
    srv.stop()
    assert not srv.is_alive()


@pytest.fixture(scope="module")
def dealer(server):
    sock = zmq.Context.instance().socket(zmq.DEALER)
    sock.setsockopt(zmq.LINGER, 0)
    sock.connect(server.bound_endpoint)
    yield sock
    sock.close(0)


def exchange(dealer, frames):
    """Send ``frames`` as one REQ-style request; return the reply frames (fails if none)."""
    dealer.send_multipart([b""] + list(frames))
    assert dealer.poll(_HANG_MS, zmq.POLLIN), "server gave no reply"
    reply = dealer.recv_multipart()
    assert reply[0] == b"", "reply lacks the REQ/REP empty delimiter"
    return reply[1:]


def parse_reply(frames):
    """The reply dict, after checking its form: one frame, JSON object, "ok" a bool."""
    assert len(frames) == 1
    reply = json.loads(frames[0].decode("utf-8"))
    assert isinstance(reply, dict) and isinstance(reply["ok"], bool)
    if reply["ok"]:
        assert set(reply) == {"ok", "result"} and isinstance(reply["result"], dict)
    else:
        assert set(reply) == {"ok", "error"} and isinstance(reply["error"], str)
        assert "\n" not in reply["error"] and reply["error"].strip()
    return reply


def enc(obj) -> bytes:
    return json.dumps(obj).encode("utf-8")


# --- requests the table accepts: (request, expected (cmd, args) given to the handler) ----------
GOOD = [
    ({"cmd": "status"}, ("status", {})),
    ({"cmd": "status", "args": {}}, ("status", {})),
    ({"cmd": "start"}, ("start", {})),
    ({"cmd": "stop"}, ("stop", {})),
    ({"cmd": "pause"}, ("pause", {})),
    ({"cmd": "resume"}, ("resume", {})),
    ({"cmd": "new_scan"}, ("new_scan", {})),
    ({"cmd": "calibrate", "args": {"method": "noise_source"}},
     ("calibrate", {"method": "noise_source"})),
    ({"cmd": "point", "args": {"frame": "galactic", "lon_deg": 30, "lat_deg": -2.5}},
     ("point", {"frame": "galactic", "lon_deg": 30.0, "lat_deg": -2.5})),
    ({"cmd": "point", "args": {"frame": "radec", "lon_deg": 83.63, "lat_deg": 22.01,
                               "object": "M1"}},
     ("point", {"frame": "radec", "lon_deg": 83.63, "lat_deg": 22.01, "object": "M1"})),
    ({"cmd": "point", "args": {"frame": "azel", "lon_deg": -360, "lat_deg": 90, "object": ""}},
     ("point", {"frame": "azel", "lon_deg": -360.0, "lat_deg": 90.0, "object": ""})),
    ({"cmd": "set_integration", "args": {"seconds": 0.5}},
     ("set_integration", {"seconds": 0.5})),
    ({"cmd": "set_integration", "args": {"seconds": 3600}},
     ("set_integration", {"seconds": 3600.0})),
    ({"cmd": "annotate", "args": {"text": "x" * 500}}, ("annotate", {"text": "x" * 500})),
    ({"cmd": "annotate", "args": {"text": "Wolken über dem Spiegel"}},
     ("annotate", {"text": "Wolken über dem Spiegel"})),
]

# --- requests refused: (raw bytes, words the one-line error must contain) ------------------------
_POINT = {"frame": "galactic", "lon_deg": 30, "lat_deg": 0}
BAD = [
    (b"", ["empty request"]),
    (b"\xff\xfe{}", ["not UTF-8"]),
    (b'{"cmd": "stat', ["not JSON"]),
    (b"status", ["not JSON"]),
    (b"[1, 2]", ["an array", "not a JSON object"]),
    (b'"status"', ["a string", "not a JSON object"]),
    (b"null", ["null", "not a JSON object"]),
    (b"[" * 5000 + b"]" * 5000, ["request"]),                     # nesting: refused, not a crash
    (b'{"cmd": "status", "cmd": "stop"}', ["'cmd'", "twice"]),
    (b'{"cmd": "status", "verbose": 1}', ["unknown key 'verbose'", "cmd, args"]),
    (b'{"args": {}}', ['no "cmd"', "status"]),
    (b'{"cmd": 3}', ['"cmd" = 3', "a number", "one of status"]),
    (b'{"cmd": "reboot"}', ["unknown command 'reboot'", "set_integration"]),
    (b'{"cmd": "status", "args": [1]}', ["status", "an array", "JSON object of arguments"]),
    (b'{"cmd": "status", "args": null}', ["status", "null", "JSON object of arguments"]),
    (enc({"cmd": "status", "args": {"now": True}}), ["status", "unknown argument 'now'", "none"]),
    (enc({"cmd": "calibrate"}), ["calibrate", "missing argument 'method'", "'noise_source'"]),
    (enc({"cmd": "calibrate", "args": {"method": "hot_load"}}),
     ["calibrate", "method = 'hot_load'", "'noise_source'"]),
    (enc({"cmd": "calibrate", "args": {"method": 1}}), ["method = 1", "a number"]),
    (enc({"cmd": "point", "args": {**_POINT, "frame": "ecliptic"}}),
     ["point", "frame = 'ecliptic'", "'galactic', 'radec', 'azel'"]),
    (enc({"cmd": "point", "args": {**_POINT, "lon_deg": "30"}}),
     ["lon_deg = '30'", "a string", "a number from -360 to 360"]),
    (enc({"cmd": "point", "args": {**_POINT, "lon_deg": True}}),
     ["lon_deg = True", "a boolean", "a number"]),
    (enc({"cmd": "point", "args": {**_POINT, "lat_deg": 90.5}}),
     ["lat_deg = 90.5", "out of range", "from -90 to 90"]),
    (enc({"cmd": "point", "args": {**_POINT, "lon_deg": 10 ** 400}}),
     ["lon_deg", "out of range"]),
    (b'{"cmd": "point", "args": {"frame": "galactic", "lon_deg": 1e999, "lat_deg": 0}}',
     ["lon_deg = inf", "finite"]),
    # NaN and Infinity are not JSON numbers (RFC 8259, section 6).
    (b'{"cmd": "set_integration", "args": {"seconds": NaN}}', ["NaN", "finite"]),
    (b'{"cmd": "set_integration", "args": {"seconds": -Infinity}}', ["-Infinity", "finite"]),
    (enc({"cmd": "point", "args": {"frame": "galactic", "lon_deg": 30}}),
     ["missing argument 'lat_deg'", "from -90 to 90"]),
    (enc({"cmd": "point", "args": {**_POINT, "object": "Cygnus\nX"}}),
     ["object", "printable ASCII"]),
    (enc({"cmd": "point", "args": {**_POINT, "object": "Schwan Ä"}}),
     ["object", "printable ASCII text of 0 to 68"]),
    (enc({"cmd": "point", "args": {**_POINT, "object": "x" * 69}}), ["69 characters"]),
    (enc({"cmd": "point", "args": {**_POINT, "az": 1}}),
     ["unknown argument 'az'", "frame, lon_deg, lat_deg, object"]),
    (enc({"cmd": "set_integration", "args": {"seconds": 0.4}}),
     ["seconds = 0.4", "out of range", "from 0.5 to 3600"]),
    (enc({"cmd": "set_integration", "args": {"seconds": 3601}}), ["seconds = 3601", "3600"]),
    (enc({"cmd": "set_integration", "args": {"seconds": [10]}}), ["an array"]),
    (enc({"cmd": "set_integration", "args": {}}), ["missing argument 'seconds'"]),
    (enc({"cmd": "annotate", "args": {"text": ""}}), ["text = ''", "1 to 500"]),
    (enc({"cmd": "annotate", "args": {"text": "y" * 501}}), ["501 characters", "1 to 500"]),
    (enc({"cmd": "annotate", "args": {"text": "bell\x07"}}), ["text", "printable"]),
    (enc({"cmd": "annotate", "args": {"text": "two\nlines"}}), ["text = 'two\\nlines'"]),
    (b'{"cmd": "annotate", "args": {"text": "\\ud800"}}', ["text", "printable"]),
    (enc({"cmd": "annotate", "args": {"text": None}}), ["text = None", "null"]),
    (enc({"cmd": "annotate", "args": {"text": "z" * (MAX_REQUEST_BYTES)}}),
     [f"{MAX_REQUEST_BYTES + 41} bytes", "too large", f"at most {MAX_REQUEST_BYTES}"]),
]


@pytest.mark.parametrize("obj, expected", GOOD)
def test_validate_accepts_good_requests(obj, expected):
    cmd, args = validate_request(enc(obj))
    assert (cmd, args) == expected
    assert all(type(v) is float for k, v in args.items()
               if COMMANDS[cmd].args[k].kind == "number")


@pytest.mark.parametrize("raw, words", BAD)
def test_validate_refuses_with_one_line(raw, words):
    with pytest.raises(CommandError) as info:
        validate_request(raw)
    text = str(info.value)
    assert "\n" not in text and len(text) < 400
    for word in words:
        assert word in text


def test_size_limit_is_inclusive():
    # Whitespace after the object is allowed JSON (RFC 8259, section 2), so pad to the limit.
    raw = b'{"cmd": "status"}'
    assert validate_request(raw.ljust(MAX_REQUEST_BYTES)) == ("status", {})
    with pytest.raises(CommandError, match="too large"):
        validate_request(raw.ljust(MAX_REQUEST_BYTES + 1))


def test_commands_table_is_complete():
    # The command set of issue5_shared.md, each with a one-line description.
    assert set(COMMANDS) == {"status", "start", "stop", "pause", "resume", "new_scan",
                             "calibrate", "point", "set_integration", "annotate", "plan", "skip", "abort", "park",
                             "pointed"}
    for spec in COMMANDS.values():
        assert spec.doc and "\n" not in spec.doc
        for arg in spec.args.values():
            assert arg.kind in ("number", "text") and arg.doc


@pytest.mark.parametrize("obj, expected", GOOD)
def test_server_passes_good_requests_to_handler(server, obj, expected):
    reply = request(server.bound_endpoint, obj["cmd"], obj.get("args"))
    assert reply["ok"] is True
    assert server.recorder.calls[-1] == expected
    if expected[0] != "status":
        assert reply["result"] == {"cmd": expected[0], "args": expected[1]}


@pytest.mark.parametrize("raw, words", BAD)
def test_server_refuses_with_error_reply(server, dealer, raw, words):
    ncalls, nerrors = len(server.recorder.calls), server.errors
    reply = parse_reply(exchange(dealer, [raw]))
    assert reply["ok"] is False
    for word in words:
        assert word in reply["error"]
    assert len(server.recorder.calls) == ncalls          # the handler never saw it
    assert server.errors == nerrors + 1


@pytest.mark.parametrize("frames", [
    [enc({"cmd": "status"}), b""],
    [enc({"cmd": "status"}), enc({"cmd": "stop"})],
    [b"", b"", b""],
])
def test_server_refuses_extra_frames(server, dealer, frames):
    reply = parse_reply(exchange(dealer, frames))
    assert reply["ok"] is False
    assert f"{len(frames)} frames" in reply["error"] and "exactly one" in reply["error"]


def test_server_refuses_oversize_request(server, dealer):
    raw = b'{"cmd": "status", "args": {"pad": "' + b"p" * MAX_REQUEST_BYTES + b'"}}'
    reply = parse_reply(exchange(dealer, [raw]))
    assert reply["ok"] is False and "too large" in reply["error"]
    assert str(MAX_REQUEST_BYTES) in reply["error"]


def test_handler_command_error_is_refusal(server):
    reply = request(server.bound_endpoint, "annotate", {"text": "refuse"})
    assert reply == {"ok": False, "error": "annotate: refused by the daemon: not now"}


@pytest.mark.parametrize("text, words", [
    ("boom", ["internal error: RuntimeError: boom second line"]),
    ("not a dict", ["internal error", "list", "not dict"]),
    ("nan", ["internal error", "ValueError"]),          # result not writable as JSON
])
def test_handler_crash_gives_error_and_server_lives(server, text, words):
    before = server.internal_errors
    reply = request(server.bound_endpoint, "annotate", {"text": text})
    assert reply["ok"] is False
    for word in words:
        assert word in reply["error"]
    assert "\n" not in reply["error"]
    assert server.internal_errors == before + 1
    assert server.is_alive()
    assert request(server.bound_endpoint, "status")["ok"] is True


def test_counters_count_requests_and_errors(server):
    requests, errors = server.requests, server.errors
    request(server.bound_endpoint, "status")
    request(server.bound_endpoint, "reboot")
    assert server.requests == requests + 2
    assert server.errors == errors + 1


# --- property-based fuzzing --------------------------------------------------------------------
_json_values = st.recursive(
    st.none() | st.booleans() | st.integers() | st.floats() | st.text(max_size=20),
    lambda inner: st.lists(inner, max_size=4) | st.dictionaries(st.text(max_size=8), inner,
                                                                max_size=4),
    max_leaves=12)
_arg_names = sorted({name for spec in COMMANDS.values() for name in spec.args})
_arg_values = (_json_values | st.floats(-400, 400) | st.integers(-400, 4000)
               | st.sampled_from(["galactic", "radec", "azel", "noise_source", "M31", ""]))


def _valid_value(arg):
    """Values the table allows for one argument (so that fuzzing also reaches the handler)."""
    if arg.kind == "number":
        return (st.floats(arg.lo, arg.hi)
                | st.integers(math.ceil(arg.lo), math.floor(arg.hi)))
    if arg.choices:
        return st.sampled_from(arg.choices)
    return st.text(st.characters(min_codepoint=32, max_codepoint=126),
                   min_size=arg.min_chars, max_size=min(arg.max_chars, 30))


@st.composite
def _command_dicts(draw, valid=False):
    cmd = draw(st.sampled_from(sorted(COMMANDS)))
    obj = {"cmd": cmd}
    if valid or draw(st.booleans()):                  # every argument, each valid ...
        obj["args"] = {name: draw(_valid_value(arg)) for name, arg in COMMANDS[cmd].args.items()
                       if arg.required or draw(st.booleans())}
        if not valid and draw(st.booleans()):         # ... then one key set to anything
            obj["args"][draw(st.sampled_from(_arg_names) | st.text(max_size=6))] = \
                draw(_arg_values)
    elif draw(st.booleans()):
        obj["args"] = draw(st.dictionaries(st.sampled_from(_arg_names) | st.text(max_size=6),
                                           _arg_values, max_size=5))
    if not valid and draw(st.integers(0, 9)) == 0:
        obj[draw(st.text(max_size=5))] = draw(_json_values)
    return obj


def _to_bytes(obj) -> bytes:
    return json.dumps(obj).encode("utf-8", "surrogatepass")


_messages = st.one_of(
    st.lists(st.binary(max_size=200), min_size=1, max_size=1),                 # random bytes
    _json_values.map(lambda v: [_to_bytes(v)]),                                  # random JSON
    _command_dicts().map(lambda d: [_to_bytes(d)]),                              # near-commands
    _command_dicts(valid=True).map(lambda d: [_to_bytes(d)]),                    # good commands
    st.lists(st.binary(max_size=50) | _command_dicts().map(_to_bytes),
             min_size=2, max_size=4),                                            # multi-frame
)


@settings(max_examples=300, deadline=None, database=None,
          suppress_health_check=[HealthCheck.function_scoped_fixture, HealthCheck.too_slow])
@given(frames=_messages)
def test_fuzz_every_request_gets_one_well_formed_reply(server, dealer, frames):
    reply = parse_reply(exchange(dealer, frames))
    # The reply agrees with the checker run here on the same bytes.
    try:
        cmd, args = validate_request(frames[0]) if len(frames) == 1 else (None, None)
    except CommandError:
        cmd = None
    if cmd is None:
        assert reply["ok"] is False
    elif cmd == "annotate" and args["text"] in ("boom", "refuse", "not a dict", "nan"):
        assert reply["ok"] is False
    elif cmd == "status":
        assert reply["ok"] is True and reply["result"]["state"] == "observing"
    else:
        assert reply == {"ok": True, "result": {"cmd": cmd, "args": args}}
    assert dealer.poll(0, zmq.POLLIN) == 0, "more than one reply"


def test_server_alive_after_fuzzing(server, dealer):
    assert server.is_alive()
    reply = parse_reply(exchange(dealer, [b'{"cmd": "status"}']))
    assert reply["ok"] is True and reply["result"]["state"] == "observing"
    assert request(server.bound_endpoint, "status")["ok"] is True


# --- server life cycle -------------------------------------------------------------------------
def _unused_port() -> int:
    """A loopback TCP port that nobody listens on (bound by the kernel, then released)."""
    with pysocket.socket(pysocket.AF_INET, pysocket.SOCK_STREAM) as s:
        s.bind(("127.0.0.1", 0))
        return s.getsockname()[1]


def test_security_applied_before_bind():
    seen = []

    class FakeSecurity:
        def apply(self, sock):
            seen.append((sock.type, sock.getsockopt(zmq.LAST_ENDPOINT)))

    srv = ControlServer("tcp://127.0.0.1:*", lambda c, a: {}, security=FakeSecurity()).start()
    try:
        assert seen == [(zmq.ROUTER, b"")]       # applied once, to the ROUTER socket, unbound yet
        assert request(srv.bound_endpoint, "start") == {"ok": True, "result": {}}
    finally:
        srv.stop()
    assert not srv.is_alive()


@pytest.mark.parametrize("endpoint", ["nonsense", "tcp://127.0.0.1:notaport"])
def test_bad_endpoint_is_one_line_control_error(endpoint):
    with pytest.raises(ControlError) as info:
        ControlServer(endpoint, lambda c, a: {}).start()
    assert "\n" not in str(info.value) and endpoint in str(info.value)


def test_endpoint_in_use_is_control_error(server):
    with pytest.raises(ControlError, match="cannot be bound"):
        ControlServer(server.bound_endpoint, lambda c, a: {}).start()
    assert server.is_alive()


# --- client ------------------------------------------------------------------------------------
def test_request_times_out_with_one_line():
    endpoint = f"tcp://127.0.0.1:{_unused_port()}"
    with pytest.raises(ControlError) as info:
        request(endpoint, "status", timeout_s=0.2)
    text = str(info.value)
    assert text == f"no reply from {endpoint} within 0.2 s: is spinflip run going?"


def test_request_refuses_nan_before_sending():
    with pytest.raises(CommandError, match="cannot be sent as JSON"):
        request("tcp://127.0.0.1:1", "set_integration", {"seconds": float("nan")})


def test_request_rejects_malformed_reply():
    rep = zmq.Context.instance().socket(zmq.REP)
    rep.setsockopt(zmq.LINGER, 0)
    rep.bind("tcp://127.0.0.1:*")
    endpoint = rep.getsockopt(zmq.LAST_ENDPOINT).decode()

    def answer():
        if rep.poll(_HANG_MS):
            rep.recv()
            rep.send(b'{"ok": "yes"}')

    t = threading.Thread(target=answer)
    t.start()
    try:
        with pytest.raises(ControlError, match="not a control reply"):
            request(endpoint, "status", timeout_s=_HANG_MS / 1000)
    finally:
        t.join()
        rep.close(0)


# --- spinflip ctl ------------------------------------------------------------------------------
def test_parse_words_numbers_and_text():
    assert control.parse_words(["point", "frame=radec", "lon_deg=83", "lat_deg=22.5",
                                "object=1234"]) == (
        "point", {"frame": "radec", "lon_deg": 83, "lat_deg": 22.5, "object": "1234"})
    assert control.parse_words(["annotate", "text=a=b"]) == ("annotate", {"text": "a=b"})


def test_ctl_ok_prints_key_values(server, capsys):
    code = ctl_main(server.bound_endpoint, ["status"], None, 3.0)
    out, err = capsys.readouterr()
    assert code == 0 and err == ""
    assert out == ("state=observing tsys_k=null pointing.frame=galactic pointing.lon_deg=30.0 "
                   'pointing.object="G30 b0" drops={} samples_lost=0\n')


def test_ctl_passes_numbers_as_numbers(server, capsys):
    code = ctl_main(server.bound_endpoint, ["set_integration", "seconds=20"], None, 3.0)
    out, _ = capsys.readouterr()
    assert code == 0
    assert server.recorder.calls[-1] == ("set_integration", {"seconds": 20.0})
    assert out == "cmd=set_integration args.seconds=20.0\n"


@pytest.mark.parametrize("words, words_in_error", [
    (["reboot"], ["unknown command 'reboot'"]),
    ([], ["no command given"]),
    (["set_integration", "seconds=0.1"], ["seconds = 0.1", "0.5 to 3600"]),
    (["set_integration", "seconds=abc"], ["seconds = 'abc'", "a string"]),
    (["set_integration", "seconds=nan"], ["finite"]),
    (["set_integration", "seconds"], ["not KEY=VALUE"]),
    (["set_integration", "seconds=1", "seconds=2"], ["given twice"]),
    (["status", "now=1"], ["unknown argument 'now'"]),
])
def test_ctl_refused_locally_exit_2(server, capsys, words, words_in_error):
    ncalls = len(server.recorder.calls)
    code = ctl_main(server.bound_endpoint, words, None, 3.0)
    out, err = capsys.readouterr()
    assert code == 2 and out == ""
    assert err.startswith("error: ") and err.count("\n") == 1
    for word in words_in_error:
        assert word in err
    assert len(server.recorder.calls) == ncalls


def test_ctl_refused_by_daemon_exit_2(server, capsys):
    code = ctl_main(server.bound_endpoint, ["annotate", "text=refuse"], None, 3.0)
    out, err = capsys.readouterr()
    assert code == 2 and out == ""
    assert err == "error: annotate: refused by the daemon: not now\n"


def test_ctl_no_daemon_exit_1(capsys):
    endpoint = f"tcp://127.0.0.1:{_unused_port()}"
    code = ctl_main(endpoint, ["status"], None, 0.2)
    out, err = capsys.readouterr()
    assert code == 1 and out == ""
    assert err == f"error: no reply from {endpoint} within 0.2 s: is spinflip run going?\n"


def test_stop_ends_thread_and_frees_endpoint():
    srv = ControlServer("tcp://127.0.0.1:*", lambda c, a: {}).start()
    endpoint = srv.bound_endpoint
    srv.stop()
    assert not srv.is_alive()
    with pytest.raises(ControlError):
        request(endpoint, "status", timeout_s=0.2)
