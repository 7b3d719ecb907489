"""CURVE keys: key files and their modes, the allow-list on real sockets, safe binds.

Outside references used below:
- CurveZMQ (ZeroMQ RFC 26) and ZAP (ZeroMQ RFC 27), from memory: a CURVE server asks its ZAP
  handler about each client public key; a refused client never completes the handshake
  (libzmq reports it to a socket monitor as HANDSHAKE_FAILED_AUTH with the ZAP status code
  400), and a client without keys cannot talk to a CURVE server at all;
- POSIX file modes (0600 owner read/write, 0700 owner-only folder): common practice for key
  files, as ssh does for its private keys (from memory);
- loopback addresses 127.0.0.0/8 and ::1: RFC 1122 section 3.2.1.3 and RFC 4291 section 2.5.3
  (from memory); Python's ``ipaddress`` agrees.

All sockets bind to ``tcp://127.0.0.1:*`` (a free port chosen by the system). "Receives
nothing" is checked by polling for a bounded time while messages keep flowing to a listed
subscriber on the same socket, so the messages demonstrably exist.
"""

from __future__ import annotations

import os
import shutil
import stat
import time

import pytest
import zmq
from zmq.utils.monitor import recv_monitor_message

from spinflip.daemon.live.keys import (
    ClientSecurity,
    KeysError,
    ServerSecurity,
    check_bind,
    create_keypair,
    keys_main,
)

QUIET_S = 1.5          # how long an unlisted client is watched for anything arriving
DEADLINE_S = 10.0      # generous bound for a listed client's first message (not asserted)


def _mode(path) -> int:
    return stat.S_IMODE(os.stat(path).st_mode)


@pytest.fixture(scope="module")
def keyring(tmp_path_factory):
    """Daemon keys with client "alice" allowed; "mallory" has keys but is not listed."""
    root = tmp_path_factory.mktemp("keys")
    daemon_dir = root / "daemon"
    observers = root / "observers"
    assert keys_main(daemon_dir) == 0
    for name in ("alice", "mallory"):
        assert keys_main(observers, name) == 0
        shutil.copy(daemon_dir / "server.key", observers / name / "server.key")
    shutil.copy(observers / "alice" / "client.key", daemon_dir / "clients" / "alice.key")
    return {"daemon": daemon_dir, "alice": observers / "alice",
            "mallory": observers / "mallory"}


@pytest.fixture
def context():
    ctx = zmq.Context()
    yield ctx
    ctx.destroy(linger=0)


def _socket(ctx, kind, security=None):
    sock = ctx.socket(kind)
    sock.linger = 0
    if security is not None:
        security.apply(sock)
    return sock


def _auth_failures(monitor, until_s) -> list[int]:
    """ZAP refusals (event values) seen on a monitor socket until time ``until_s``."""
    values = []
    while time.monotonic() < until_s:
        if monitor.poll(50):
            event = recv_monitor_message(monitor)
            if event["event"] == zmq.EVENT_HANDSHAKE_FAILED_AUTH:
                values.append(event["value"])
    return values


# --- CURVE on real sockets ----------------------------------------------------------------

def test_pub_delivers_only_to_listed_clients(keyring, context):
    security = ServerSecurity.from_config({"keys": str(keyring["daemon"])})
    assert security.client_names == ("alice",)
    security.start(context)
    security.start(context)     # idempotent: a second ZAP handler on this context would fail
    try:
        pub = _socket(context, zmq.PUB, security)
        pub.bind("tcp://127.0.0.1:*")
        endpoint = pub.LAST_ENDPOINT.decode()
        monitor = pub.get_monitor_socket(zmq.EVENT_HANDSHAKE_FAILED_AUTH)
        subs = {}
        for name, sec in (("alice", ClientSecurity.from_dir(keyring["alice"])),
                          ("mallory", ClientSecurity.from_dir(keyring["mallory"])),
                          ("bare", None)):
            sub = _socket(context, zmq.SUB, sec)
            sub.subscribe(b"")
            sub.connect(endpoint)
            subs[name] = sub

        got = {name: [] for name in subs}
        deadline = time.monotonic() + DEADLINE_S
        quiet_until = None
        n = 0
        while time.monotonic() < deadline:
            pub.send_multipart([b"status", str(n).encode()])
            n += 1
            for name, sub in subs.items():
                while sub.poll(0):
                    got[name].append(sub.recv_multipart())
            if got["alice"] and quiet_until is None:
                quiet_until = time.monotonic() + QUIET_S   # now watch the others
            if quiet_until is not None and time.monotonic() > quiet_until:
                break
            time.sleep(0.02)
        refusals = _auth_failures(monitor, time.monotonic() + 0.2)

        assert got["alice"] and got["alice"][0][0] == b"status"
        assert got["mallory"] == []          # unlisted key: refused by the allow-list
        assert got["bare"] == []             # no keys: no CURVE handshake possible
        # RFC 27: the ZAP handler answered mallory's key with status 400 (refused)
        assert 400 in refusals
        pub.disable_monitor()
        monitor.close()
    finally:
        security.stop()
        security.stop()             # safe twice


def test_rep_answers_only_listed_clients(keyring, context):
    security = ServerSecurity.from_config({"keys": str(keyring["daemon"])})
    try:
        rep = _socket(context, zmq.REP, security)      # apply() starts the allow-list itself
        rep.bind("tcp://127.0.0.1:*")
        endpoint = rep.LAST_ENDPOINT.decode()
        mallory = _socket(context, zmq.REQ, ClientSecurity.from_dir(keyring["mallory"]))
        mallory.connect(endpoint)
        mallory.send(b"from mallory")                  # queued: the handshake never completes
        alice = _socket(context, zmq.REQ, ClientSecurity.from_dir(keyring["alice"]))
        alice.connect(endpoint)
        alice.send(b"from alice")

        seen = []
        deadline = time.monotonic() + DEADLINE_S
        while time.monotonic() < deadline and not seen:
            if rep.poll(50):
                seen.append(rep.recv())
                rep.send(b"reply to " + seen[-1])
        assert seen == [b"from alice"]
        assert alice.poll(int(DEADLINE_S * 1000)) and alice.recv() == b"reply to from alice"

        # the server never sees mallory's request, and mallory never gets a reply
        assert not rep.poll(int(QUIET_S * 1000))
        assert not mallory.poll(0)
    finally:
        security.stop()


def test_start_again_after_stop(keyring, context):
    security = ServerSecurity.from_config({"keys": str(keyring["daemon"])})
    security.start(context)
    security.stop()
    security.start(context)     # the old ZAP handler is gone, so a new one can bind
    security.stop()


def test_wrong_server_key_gets_nothing(keyring, context, tmp_path):
    """A client holding another daemon's server.key cannot complete the handshake."""
    other = tmp_path / "other"
    assert keys_main(other) == 0
    client_dir = tmp_path / "alice_confused"
    client_dir.mkdir()
    shutil.copy(keyring["alice"] / "client.key_secret", client_dir)
    shutil.copy(other / "server.key", client_dir / "server.key")
    security = ServerSecurity.from_config({"keys": str(keyring["daemon"])})
    try:
        rep = _socket(context, zmq.REP, security)
        rep.bind("tcp://127.0.0.1:*")
        req = _socket(context, zmq.REQ, ClientSecurity.from_dir(client_dir))
        req.connect(rep.LAST_ENDPOINT.decode())
        req.send(b"hello")
        assert not rep.poll(int(QUIET_S * 1000))
    finally:
        security.stop()


# --- loading keys ----------------------------------------------------------------------------

def test_secret_readable_by_others_is_refused(tmp_path):
    daemon_dir = tmp_path / "daemon"
    assert keys_main(daemon_dir) == 0
    secret = daemon_dir / "server.key_secret"
    os.chmod(secret, 0o644)
    with pytest.raises(KeysError, match="chmod 600") as info:
        ServerSecurity.from_config({"keys": str(daemon_dir)})
    assert str(secret) in str(info.value) and "\n" not in str(info.value)

    assert keys_main(tmp_path / "obs", "bob") == 0
    client_secret = tmp_path / "obs" / "bob" / "client.key_secret"
    shutil.copy(daemon_dir / "server.key", tmp_path / "obs" / "bob")
    os.chmod(client_secret, 0o640)
    with pytest.raises(KeysError, match=f"chmod 600 {client_secret}"):
        ClientSecurity.from_dir(tmp_path / "obs" / "bob")
    os.chmod(client_secret, 0o600)
    assert ClientSecurity.from_dir(tmp_path / "obs" / "bob").server_key


def test_no_keys_means_no_security():
    assert ServerSecurity.from_config({"keys": "", "allow_insecure": False}) is None


def test_missing_pieces_are_named(tmp_path):
    with pytest.raises(KeysError, match="spinflip keys"):
        ServerSecurity.from_config({"keys": str(tmp_path / "nowhere")})
    assert keys_main(tmp_path / "d") == 0
    (tmp_path / "d" / "clients").rmdir()
    with pytest.raises(KeysError, match="clients/"):
        ServerSecurity.from_config({"keys": str(tmp_path / "d")})
    (tmp_path / "d" / "clients").mkdir()
    (tmp_path / "d" / "clients" / "broken.key").write_text("not a key\n")
    with pytest.raises(KeysError, match="broken.key"):
        ServerSecurity.from_config({"keys": str(tmp_path / "d")})

    assert keys_main(tmp_path / "o", "carol") == 0          # server.key not copied yet
    with pytest.raises(KeysError, match="copy the daemon's server.key"):
        ClientSecurity.from_dir(tmp_path / "o" / "carol")
    with pytest.raises(KeysError, match="client.key_secret"):
        ClientSecurity.from_dir(tmp_path / "d")              # the daemon's folder by mistake


# --- spinflip keys DIR [--client NAME] --------------------------------------------------------

def test_keys_main_server_modes_and_no_overwrite(tmp_path, capsys):
    folder = tmp_path / "daemon"
    assert keys_main(folder) == 0
    out = capsys.readouterr().out
    assert "publish.keys" in out
    assert _mode(folder) == 0o700
    assert _mode(folder / "clients") == 0o700
    assert _mode(folder / "server.key_secret") == 0o600
    assert not _mode(folder / "server.key") & 0o022          # public: nobody else may write
    assert list((folder / "clients").iterdir()) == []

    before = (folder / "server.key_secret").read_bytes()
    assert keys_main(folder) == 2
    err = capsys.readouterr().err
    assert err.count("\n") == 1 and "already exists" in err
    assert (folder / "server.key_secret").read_bytes() == before


def test_keys_main_client_modes_steps_and_no_overwrite(tmp_path, capsys):
    folder = tmp_path / "observers"
    assert keys_main(folder, "laptop") == 0
    out = capsys.readouterr().out
    client_dir = folder / "laptop"
    assert "clients/laptop.key" in out                  # step 1: the allow-list
    assert "server.key" in out and str(client_dir) in out   # step 2: the daemon's key
    assert _mode(client_dir) == 0o700
    assert _mode(client_dir / "client.key_secret") == 0o600
    assert (client_dir / "client.key").is_file()
    assert not (folder / "server.key").exists()        # a client run makes no server keys

    before = (client_dir / "client.key_secret").read_bytes()
    assert keys_main(folder, "laptop") == 2
    err = capsys.readouterr().err
    assert err.count("\n") == 1 and "client.key" in err
    assert (client_dir / "client.key_secret").read_bytes() == before

    for bad in ("../escape", ".hidden", "a/b", ""):
        assert keys_main(folder, bad) == 2
        assert "--client" in capsys.readouterr().err
    assert not (tmp_path / "escape").exists()


def test_create_keypair_pairs_match_and_refuses_overwrite(tmp_path):
    public, secret = create_keypair(tmp_path, "x")
    pub_from_public = zmq.auth.load_certificate(public)[0]
    pub_from_secret, sec = zmq.auth.load_certificate(secret)
    assert pub_from_public == pub_from_secret and sec
    # the secret key derives the public one (Curve25519; libzmq's zmq_curve_public)
    assert zmq.curve_public(sec) == pub_from_public
    with pytest.raises(KeysError, match="already exists"):
        create_keypair(tmp_path, "x")


# --- check_bind --------------------------------------------------------------------------------

LOCAL = ["tcp://127.0.0.1:5621", "tcp://127.3.4.5:5621", "tcp://localhost:5621",
         "tcp://[::1]:5621", "tcp://::1:5621", "tcp://[::ffff:127.0.0.1]:5621",
         "ipc:///tmp/spinflip.sock", "inproc://data"]
BEYOND = ["tcp://0.0.0.0:5621", "tcp://*:5621", "tcp://[::]:5621", "tcp://192.168.1.5:5621",
          "tcp://telescope.example.org:5621", "tcp://eth0:5621", "epgm://eth0;239.1.1.1:5621"]


@pytest.mark.parametrize("endpoint", LOCAL)
def test_check_bind_loopback_needs_nothing(endpoint):
    assert check_bind(endpoint, None, False) is None


@pytest.mark.parametrize("endpoint", BEYOND)
def test_check_bind_beyond_needs_keys_or_opt_in(endpoint, keyring):
    with pytest.raises(KeysError) as info:
        check_bind(endpoint, None, False)
    assert str(info.value) == (f"publish.data = {endpoint} binds beyond this computer: give "
                               f"publish.keys (spinflip keys) or set "
                               f"publish.allow_insecure = true")
    security = ServerSecurity.from_config({"keys": str(keyring["daemon"])})
    assert check_bind(endpoint, security, False) is None
    assert check_bind(endpoint, security, True) is None
    warning = check_bind(endpoint, None, True)
    assert warning.startswith("warning: ") and endpoint in warning and "\n" not in warning
    assert "without keys" in warning


def test_check_bind_names_the_key_and_rejects_garbage():
    with pytest.raises(KeysError, match=r"^publish.control = tcp://0.0.0.0:5622 binds"):
        check_bind("tcp://0.0.0.0:5622", None, False, key="publish.control")
    for bad in ("127.0.0.1:5621", "tcp://5621", "tcp://:5621"):
        with pytest.raises(KeysError, match="not a ZeroMQ endpoint"):
            check_bind(bad, None, True)
