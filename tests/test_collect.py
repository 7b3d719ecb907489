"""``spinflip collect`` (daemon/live/collect.py): two stations relayed and archived, never mixed up.

Outside references used below:
- ZeroMQ PUB/SUB and XPUB behaviour (RFC 29/PUBSUB, from memory: an XPUB socket receives
  b"\\x01" + prefix when a subscriber subscribes; messages of one socket keep their order),
  observed with real pyzmq sockets on loopback.
- zlib's CRC-32 (the archive's per-record check) and POSIX ``flock`` semantics (two open file
  descriptions of one file cannot both hold LOCK_EX), common practice.
- CURVE keys are made with pyzmq's own ``zmq.auth.create_certificates`` and the station side
  is pyzmq's ``zmq.auth.thread.ThreadAuthenticator`` (independent of spinflip's keys module).
"""

from __future__ import annotations

import argparse
import inspect
import json
import os
import threading
import time

import numpy as np
import pytest
import zmq

from spinflip.cli import build_parser
from spinflip.daemon.live import collect, schema
from spinflip.daemon.live.collect import main_collect, parse_station, run_collect
from spinflip.daemon.live.spectrum_archive import SpectrumArchive, read_spectra

REST_HZ = 1_420_405_751.768          # HI rest frequency (Hellwig et al. 1970, from memory)
DAY = "2025-03-01"

#: what tells the two test stations apart in their content: channels, data level, object
STATION_SHAPE = {"A": (16, 10.0), "B": (24, 20.0)}


def spectrum_frames(station, row, kind="integration", day=DAY):
    """One spectrum as ``station`` (a test-side fake daemon) would publish it."""
    nchan, level = STATION_SHAPE[station]
    freq_hz = REST_HZ + (np.arange(nchan) - nchan / 2) * 5_000.0
    header = {
        "time_utc": f"{day}T22:00:{row % 60:02d}.000000Z", "kind": kind, "scan": "s1",
        "row": row, "exposure_s": 1.0, "tsys_k": 100.0, "unit": "K", "restfreq_hz": REST_HZ,
        "vframe_m_s": 0.0, "glon_deg": 30.0, "glat_deg": 0.0, "azimuth_deg": 180.0,
        "elevation_deg": 50.0, "ra_deg": 280.0, "dec_deg": -2.0, "object": f"{station}-field",
        "folded": False, "flagged_fraction": 0.0, "blanked_fraction": 0.0, "nimpulse": 0,
        "ncarrier": 0,
    }
    arrays = {
        "freq_hz": (freq_hz, "Hz"),
        "v_lsrk_km_s": (299_792.458 * (REST_HZ - freq_hz) / REST_HZ, "km/s"),
        "data": (np.full(nchan, level + row, np.float32), "K"),
        "flagged": (np.zeros(nchan, bool), ""),
        "exposure_s": (np.ones(nchan, np.float32), "s"),
    }
    return schema.encode("spectrum", header, arrays)


def status_frames(station):
    return schema.encode("status", {
        "state": "observing", "source": f"sim-{station}", "lo_hz": 1.42e9, "gain_db": 40.0,
        "sample_rate_hz": 2.4e6, "tsys_k": None, "tsys_source": "none", "samples_received": 1,
        "samples_lost": 0, "queue_depth": 0, "disk_free_bytes": 1, "uptime_s": 1.0,
        "writing": "writing",
        "held_integrations": 0, "dropped_integrations": 0, "worker_failures": {},
        "version": "0", "scan": "s1", "drops": {},
        "pointing": {"frame": "galactic", "lon_deg": 30.0, "lat_deg": 0.0, "object": "x"},
        "rfi": {"impulses": 0, "carrier_onsets": 0, "sk_cells": 0, "blanked_spectra": 0}})


def event_frames(text):
    return schema.encode("event", {"severity": "info", "text": text})


def free_tcp_endpoint():
    """A loopback endpoint whose port was free a moment ago (bind to :*, read LAST_ENDPOINT)."""
    ctx = zmq.Context.instance()
    sock = ctx.socket(zmq.PUB)
    sock.bind("tcp://127.0.0.1:*")
    endpoint = sock.getsockopt_string(zmq.LAST_ENDPOINT)
    sock.close(linger=0)
    return endpoint


def bound_xpub(ctx, server_secret=None, server_public=None):
    sock = ctx.socket(zmq.XPUB)
    sock.linger = 0
    if server_secret is not None:
        sock.curve_server = True
        sock.curve_secretkey = server_secret
        sock.curve_publickey = server_public
    sock.bind("tcp://127.0.0.1:*")
    return sock, sock.getsockopt_string(zmq.LAST_ENDPOINT)


def wait_subscribed(xpub, result):
    assert xpub.poll(5000), f"the collector never subscribed: {result.get('error')!r}"
    assert xpub.recv() == b"\x01"             # subscribed to every topic


def start_collect(**kwargs):
    """run_collect in a thread; returns (thread, stop_event, result dict)."""
    stop = threading.Event()
    result = {}

    def target():
        try:
            result["report"] = run_collect(stop_event=stop, **kwargs)
        except BaseException as exc:          # pragma: no cover - shown by the assertion
            result["error"] = exc

    thread = threading.Thread(target=target, daemon=True)
    thread.start()
    return thread, stop, result


def finish(thread, stop, result):
    stop.set()
    thread.join(10)
    assert not thread.is_alive()
    assert "error" not in result, result.get("error")
    return result["report"]


# ----------------------------------------------------------------------------------------------
# two stations, relayed and archived
# ----------------------------------------------------------------------------------------------
def test_two_stations_relayed_and_archived_without_mixing(tmp_path):
    ctx = zmq.Context()
    pub = {}
    try:
        pub["A"], ep_a = bound_xpub(ctx)
        pub["B"], ep_b = bound_xpub(ctx)
        archive_dir = tmp_path / "archive"
        for _attempt in range(5):
            # the free port may be taken by another process before the collector binds it
            relay_ep = free_tcp_endpoint()
            thread, stop, result = start_collect(
                stations=[("A", ep_a), ("B", ep_b)], relay_endpoint=relay_ep,
                archive_dir=archive_dir, keys_dir=None, duration_s=None)
            if pub["A"].poll(5000):
                break
            thread.join(5)
            assert "cannot bind" in repr(result.get("error")), result
        wait_subscribed(pub["A"], result)
        wait_subscribed(pub["B"], result)
        # only now: the relay is bound before the collector connects to the stations, and a
        # connect to a port nobody listens on yet could take that port for itself
        relayed = ctx.socket(zmq.SUB)
        relayed.linger = 0
        relayed.setsockopt(zmq.SUBSCRIBE, b"")
        relayed.connect(relay_ep)

        sent = {"A": {}, "B": {}}                  # row -> frames, integrations only
        counts = {"A": 0, "B": 0}
        bad_b = 0
        got = []                                   # decoded relayed messages

        def drain(timeout_ms=20):
            while relayed.poll(timeout_ms):
                frames = relayed.recv_multipart()
                got.append((frames, schema.decode(frames)))
                timeout_ms = 0

        deadline = time.monotonic() + 8.0
        row = 0
        while time.monotonic() < deadline:
            for name in ("A", "B"):
                frames = spectrum_frames(name, row)
                sent[name][row] = frames
                pub[name].send_multipart(frames)
                counts[name] += 1
            pub["A"].send_multipart(spectrum_frames("A", row, kind="average"))
            pub["A"].send_multipart(status_frames("A"))
            counts["A"] += 2
            pub["B"].send_multipart([b"spectra", b"{}"])    # not per schema: refused, counted
            bad_b += 1
            counts["B"] += 1
            row += 1
            drain()
            seen = [m.header["station"] for _f, m in got if m.topic == "spectrum"]
            if seen.count("A") >= 3 and seen.count("B") >= 3:
                break
        # a last event per station: once both are relayed, everything before them was handled
        for name in ("A", "B"):
            pub[name].send_multipart(event_frames(f"end of {name}"))
            counts[name] += 1
        while time.monotonic() < deadline + 5.0:
            drain()
            ends = {m.header["station"] for _f, m in got
                    if m.topic == "event" and m.header["text"].startswith("end of")}
            if ends == {"A", "B"}:
                break
        report = finish(thread, stop, result)
    finally:
        for sock in pub.values():
            sock.close()
        ctx.destroy(linger=0)

    # every relayed message is labelled with the station whose socket sent it
    assert got
    for frames, msg in got:
        station = msg.header["station"]
        assert station in ("A", "B")
        if msg.topic == "spectrum":
            nchan, level = STATION_SHAPE[station]
            assert msg.header["object"] == f"{station}-field"
            assert msg.arrays["data"].shape == (nchan,)
            np.testing.assert_array_equal(msg.arrays["data"], level + msg.header["row"])
            if msg.header["kind"] == "integration":
                original = sent[station][msg.header["row"]]
                assert frames[2:] == original[2:]          # payload unchanged, bit for bit
                assert msg.header["time_utc"] == json.loads(original[1])["time_utc"]
        elif msg.topic == "status":
            assert msg.header["source"] == f"sim-{station}"
        elif msg.topic == "event":
            assert msg.header["text"] == f"end of {station}"

    # counts: everything each station sent after the subscription reached the collector
    a, b = report.stations["A"], report.stations["B"]
    assert (a.received, b.received) == (counts["A"], counts["B"])
    assert a.decode_errors == 0 and b.decode_errors == bad_b and "'spectra' is unknown" in \
        b.last_error
    assert a.by_topic == {"spectrum": 2 * row, "status": row, "event": 1}
    assert b.by_topic == {"spectrum": row, "event": 1}
    assert (a.relayed, b.relayed) == (counts["A"], counts["B"] - bad_b)
    assert (a.archived, b.archived) == (row, row)         # integrations only, no averages
    assert "decode errors" in a.line() and a.line().startswith("A (tcp://127.0.0.1:")

    # the archive: one folder per station holding that station's integrations, all of them
    for name in ("A", "B"):
        files = sorted((archive_dir / name).glob("spectra-*.jsonl"))
        assert [f.name for f in files] == ["spectra-20250301.jsonl"]
        spectra = read_spectra(files[0])
        assert [m.header["row"] for m in spectra] == list(range(row))
        nchan, level = STATION_SHAPE[name]
        for m in spectra:
            assert m.header["station"] == name and m.header["kind"] == "integration"
            assert m.header["object"] == f"{name}-field"
            np.testing.assert_array_equal(m.arrays["data"], np.full(nchan, level + m.header["row"],
                                                                    np.float32))
            assert m.unit("freq_hz") == "Hz" and m.arrays["freq_hz"].dtype == np.float64


# ----------------------------------------------------------------------------------------------
# the archive on its own: format, torn tails, CRC, day files, lock
# ----------------------------------------------------------------------------------------------
def relabel(frames, station):
    msg = schema.decode(frames)
    return schema.encode("spectrum", {**msg.header, "station": station},
                       {d["name"]: (msg.arrays[d["name"]], d["unit"])
                        for d in msg.header["arrays"]})


def test_archive_format_is_the_documented_one(tmp_path):
    arch = SpectrumArchive(tmp_path)
    frames = relabel(spectrum_frames("A", 0), "A")
    path = arch.append("A", frames)
    arch.close()
    line = json.loads(path.read_text().splitlines()[0])
    payload = b"".join(frames[2:])
    import zlib
    assert line["bin_offset"] == 0 and line["bin_bytes"] == len(payload)
    assert line["crc32"] == zlib.crc32(payload)
    assert line["header"] == json.loads(frames[1])
    assert path.with_suffix(".bin").read_bytes() == payload
    assert line["received_utc"].endswith("Z")


def test_archive_survives_a_torn_tail_and_checks_crc(tmp_path):
    arch = SpectrumArchive(tmp_path)
    for row in range(2):
        path = arch.append("A", relabel(spectrum_frames("A", row), "A"))
    arch.close()
    # a crash while writing the third: payload bytes written, its line torn
    with open(path.with_suffix(".bin"), "ab") as fh:
        fh.write(b"\x00" * 100)
    with open(path, "ab") as fh:
        fh.write(b'{"bin_offset": 9999, "bin_by')
    assert [m.header["row"] for m in read_spectra(path)] == [0, 1]
    arch = SpectrumArchive(tmp_path)
    arch.append("A", relabel(spectrum_frames("A", 2), "A"))
    arch.close()
    spectra = read_spectra(path)
    assert [m.header["row"] for m in spectra] == [0, 1, 2]
    np.testing.assert_array_equal(spectra[2].arrays["data"], 12.0)
    lines = path.read_bytes().split(b"\n")
    assert lines[-1] == b"" and all(json.loads(ln) for ln in lines[:-1])   # torn line cut off
    # a damaged payload is found by its CRC
    with open(path.with_suffix(".bin"), "r+b") as fh:
        fh.seek(10)
        fh.write(b"\xff")
    with pytest.raises(ValueError, match=r"line 1: payload at byte 0 .*fails its CRC"):
        read_spectra(path)


def test_archive_keeps_a_repeated_spectrum_once_also_after_a_restart(tmp_path):
    # a daemon re-sends its latest message when a subscriber (re)joins (daemon/live/publisher.py)
    first, second = (relabel(spectrum_frames("A", r), "A") for r in (0, 1))
    arch = SpectrumArchive(tmp_path)
    assert arch.append("A", first) is not None
    assert arch.append("A", first) is None
    assert arch.append("A", second) is not None
    arch.close()
    arch = SpectrumArchive(tmp_path)                      # the collector restarted
    assert arch.append("A", second) is None
    path = arch.append("A", relabel(spectrum_frames("A", 2), "A"))
    arch.close()
    assert [m.header["row"] for m in read_spectra(path)] == [0, 1, 2]


def test_archive_starts_a_file_per_utc_day_and_is_locked(tmp_path):
    arch = SpectrumArchive(tmp_path)
    arch.append("B", relabel(spectrum_frames("B", 0, day="2025-03-01"), "B"))
    arch.append("B", relabel(spectrum_frames("B", 1, day="2025-03-02"), "B"))
    with pytest.raises(ValueError, match=r"being written by another spinflip collect"):
        SpectrumArchive(tmp_path).append("B", relabel(spectrum_frames("B", 2, day="2025-03-02"),
                                                      "B"))
    arch.close()
    names = sorted(p.name for p in (tmp_path / "B").iterdir())
    assert names == ["spectra-20250301.bin", "spectra-20250301.jsonl",
                     "spectra-20250302.bin", "spectra-20250302.jsonl"]
    assert [m.header["row"] for m in read_spectra(tmp_path / "B" / "spectra-20250302.jsonl")] \
        == [1]


# ----------------------------------------------------------------------------------------------
# user errors: one line each
# ----------------------------------------------------------------------------------------------
def test_parse_station_accepts_good_specs():
    assert parse_station("dish1=tcp://192.168.1.20:5621") == ("dish1", "tcp://192.168.1.20:5621")
    assert parse_station("roof.horn-2=tcp://pi.local:5621") == ("roof.horn-2",
                                                                "tcp://pi.local:5621")
    assert parse_station("v6=tcp://[fe80::1]:5621")[1] == "tcp://[fe80::1]:5621"
    assert parse_station("lab=ipc:///run/spinflip/data") == ("lab", "ipc:///run/spinflip/data")


@pytest.mark.parametrize("text,pattern", [
    ("dish1", r"'dish1': expected NAME=ENDPOINT"),
    ("=tcp://h:1", r"name '' must be 1 to 32"),
    ("../x=tcp://h:1", r"name '\.\./x' must be"),
    (".hidden=tcp://h:1", r"name '\.hidden' must be"),
    ("a b=tcp://h:1", r"name 'a b' must be"),
    ("x" * 33 + "=tcp://h:1", r"must be 1 to 32"),
    ("a=tcp://host", r"station a 'tcp://host': expected tcp://HOST:PORT"),
    ("a=tcp://host:70000", r"port 70000 is outside 1..65535"),
    ("a=http://host:80", r"expected tcp://HOST:PORT"),
    ("a=inproc://x", r"expected tcp://HOST:PORT .* or ipc://PATH"),
])
def test_parse_station_refuses_bad_specs_in_one_line(text, pattern):
    with pytest.raises(ValueError, match=pattern) as info:
        parse_station(text)
    assert "\n" not in str(info.value)


@pytest.mark.parametrize("kwargs,pattern", [
    (dict(stations=[]), r"at least one station"),
    (dict(stations=[("a", "tcp://h:1"), ("a", "tcp://h:2")]), r"'a' is given twice"),
    (dict(stations=[("a", "tcp://h:1"), ("b", "tcp://h:1")]),
     r"tcp://h:1 is given for both a and b"),
    (dict(relay_endpoint="tcp://0.0.0.0:5631"), r"--relay tcp://0.0.0.0:5631 binds beyond"),
    (dict(relay_endpoint="tcp://*:5631"), r"--relay 'tcp://\*:5631': expected tcp://HOST:PORT"),
    (dict(relay_endpoint="tcp://192.168.1.5:5631"), r"binds beyond this computer"),
    (dict(duration_s=0), r"--duration 0: expected a positive"),
    (dict(duration_s=float("inf")), r"--duration inf"),
    (dict(keys_dir="/nonexistent/keys"), r"--keys /nonexistent/keys: no such folder"),
])
def test_run_collect_refuses_bad_arguments(kwargs, pattern):
    args = dict(stations=[("a", "tcp://127.0.0.1:1")], relay_endpoint=None, archive_dir=None,
                keys_dir=None, duration_s=1.0, stop_event=threading.Event())
    args.update(kwargs)
    with pytest.raises(ValueError, match=pattern) as info:
        run_collect(**args)
    assert "\n" not in str(info.value)


@pytest.mark.parametrize("endpoint,local", [
    ("tcp://127.0.0.1:5631", True), ("tcp://127.4.5.6:1", True), ("tcp://localhost:1", True),
    ("tcp://[::1]:1", True), ("ipc:///tmp/x", True), ("tcp://10.0.0.1:1", False),
    ("tcp://[::]:1", False), ("tcp://example.org:1", False),
])
def test_relay_only_on_this_computer(endpoint, local):
    # loopback is 127.0.0.0/8 and ::1 (RFC 1122 section 3.2.1.3, RFC 4291 section 2.5.3)
    assert collect._is_local(endpoint) is local


def test_main_collect_runs_for_its_duration_and_reports(tmp_path, capsys):
    ctx = zmq.Context()
    try:
        silent, endpoint = bound_xpub(ctx)
        args = argparse.Namespace(stations=[f"quiet={endpoint}"], relay=None,
                                  archive=str(tmp_path / "arch"), keys=None, duration=0.3)
        assert main_collect(**vars(args)) == 0
    finally:
        silent.close()
        ctx.term()
    out, err = capsys.readouterr()
    assert f"quiet ({endpoint}): 0 messages (none), 0 relayed, 0 spectra archived, " \
        "0 decode errors" in out
    assert "nothing received from quiet" in err


def test_main_collect_bad_input_exits_2_with_one_line(capsys):
    args = argparse.Namespace(stations=["dish1=tcp://h:1", "oops"], relay=None, archive=None,
                              keys=None, duration=None)
    assert main_collect(**vars(args)) == 2
    err = capsys.readouterr().err
    assert err.count("\n") == 1 and err.startswith("spinflip collect: station 'oops'")


def test_cli_collect_options_match_main_collect():
    """The one command line's collect options are main_collect's parameters, by name."""
    args = build_parser().parse_args(["collect", "a=tcp://h:1", "b=ipc:///x", "--relay",
                                      "tcp://127.0.0.1:5631", "--archive", "D", "--keys", "K",
                                      "--duration", "2.5"])
    assert set(inspect.signature(main_collect).parameters) == \
        {"stations", "relay", "archive", "keys", "duration"}
    assert (args.stations, args.relay, args.archive, args.keys, args.duration) == \
        (["a=tcp://h:1", "b=ipc:///x"], "tcp://127.0.0.1:5631", "D", "K", 2.5)


# ----------------------------------------------------------------------------------------------
# CURVE: each station with its own server key (DIR/NAME/) or the shared one (DIR)
# ----------------------------------------------------------------------------------------------
def test_collect_with_curve_keys(tmp_path):
    from zmq.auth import create_certificates, load_certificate
    from zmq.auth.thread import ThreadAuthenticator

    def keypair(folder, name):
        folder.mkdir(parents=True, exist_ok=True)
        public, secret = create_certificates(folder, name)
        os.chmod(secret, 0o600)
        return load_certificate(secret)

    # the client's folder: DIR for station B (shared), DIR/A for station A (its own server)
    keys = tmp_path / "keys"
    allowed = tmp_path / "allowed"
    servers = {}
    allowed.mkdir()
    for name, folder in (("A", keys / "A"), ("B", keys)):
        keypair(folder, "client")
        (allowed / f"client-{name}.key").write_bytes((folder / "client.key").read_bytes())
        servers[name] = keypair(tmp_path / f"server-{name}", "server")
        (folder / "server.key").write_bytes((tmp_path / f"server-{name}" / "server.key")
                                            .read_bytes())

    ctx = zmq.Context()
    auth = ThreadAuthenticator(ctx)
    auth.start()
    pub = {}
    try:
        auth.configure_curve(domain="*", location=str(allowed))
        pub["A"], ep_a = bound_xpub(ctx, servers["A"][1], servers["A"][0])
        pub["B"], ep_b = bound_xpub(ctx, servers["B"][1], servers["B"][0])
        thread, stop, result = start_collect(
            stations=[("A", ep_a), ("B", ep_b)], relay_endpoint=None,
            archive_dir=tmp_path / "arch", keys_dir=keys, duration_s=None)
        for name in ("A", "B"):
            wait_subscribed(pub[name], result)  # only an allowed, correctly keyed client gets here
            pub[name].send_multipart(spectrum_frames(name, 0))
            pub[name].send_multipart(event_frames("done"))
        deadline = time.monotonic() + 5.0
        while time.monotonic() < deadline:    # wait for the archive to hold both spectra
            files = list((tmp_path / "arch").glob("*/spectra-*.jsonl"))
            if len(files) == 2 and all(f.stat().st_size for f in files):
                break
            time.sleep(0.02)
        report = finish(thread, stop, result)
    finally:
        for sock in pub.values():
            sock.close()
        auth.stop()
        ctx.destroy(linger=0)
    for name in ("A", "B"):
        assert report.stations[name].archived == 1
        (m,) = read_spectra(tmp_path / "arch" / name / "spectra-20250301.jsonl")
        assert m.header["station"] == name and m.header["object"] == f"{name}-field"
