"""CURVE keys for the daemon's ZeroMQ sockets: making them, loading them, and who may connect.

Without keys the daemon binds to loopback only. To publish beyond this computer each side gets
a CURVE key pair (a public ``NAME.key`` and a secret ``NAME.key_secret``, the certificate files
of :func:`zmq.auth.create_certificates`), and the daemon admits only the clients whose public
keys sit in its allow-list folder.

Folder layout
-------------
Daemon (``publish.keys = DIR``)::

    DIR/                       mode 0700
    DIR/server.key             public: copied to every observer
    DIR/server.key_secret      secret, mode 0600
    DIR/clients/               mode 0700, the allow-list
    DIR/clients/NAME.key       one observer's public key (their client.key, renamed)

Client (``--keys DIR``)::

    DIR/client.key             public: copied to the daemon's clients/NAME.key
    DIR/client.key_secret      secret, mode 0600
    DIR/server.key             the daemon's public key, copied here

What CURVE gives (the CurveZMQ and ZAP specifications, rfc.zeromq.org 26 and 27, from
memory): the connection is encrypted and the client proves it holds the secret key of the
public key it presents; the server's ZAP handler (here a :class:`zmq.auth.thread.
ThreadAuthenticator`) then accepts or refuses that public key. A refused client never completes
the handshake, so it sees no messages and its requests never reach the server.

Loopback needs no keys (:func:`check_bind`): only programs on this computer can connect.

References
----------
CurveZMQ (ZeroMQ RFC 26) and ZAP, the ZeroMQ Authentication Protocol (ZeroMQ RFC 27),
from memory.
pyzmq documentation, ``zmq.auth`` (certificate files and the authenticator thread).
"""

from __future__ import annotations

import ipaddress
import os
import re
import stat
import sys
import threading
import uuid
from pathlib import Path

import zmq
import zmq.auth
from zmq.auth.base import Authenticator
from zmq.auth.thread import ThreadAuthenticator

#: Mode of every secret key file: read and write by its owner only.
SECRET_FILE_MODE = 0o600
#: Mode of every key folder this module creates.
FOLDER_MODE = 0o700
#: Mode of public key files (anyone may read a public key).
PUBLIC_FILE_MODE = 0o644

SERVER_NAME = "server"
CLIENT_NAME = "client"
CLIENTS_FOLDER = "clients"
PUBLIC_SUFFIX = ".key"
SECRET_SUFFIX = ".key_secret"

#: Allowed client names: a plain file name, as it becomes ``clients/NAME.key``.
_CLIENT_NAME_RE = re.compile(r"[A-Za-z0-9][A-Za-z0-9_.-]{0,63}")


class KeysError(ValueError):
    """A key file or folder that cannot be used, or an unsafe bind (one line, exit code 2)."""


# --------------------------------------------------------------------------------------------
# key files


def create_keypair(folder: str | os.PathLike[str], name: str) -> tuple[Path, Path]:
    """Write a new CURVE key pair ``folder/name.key`` and ``folder/name.key_secret``.

    Parameters
    ----------
    folder : existing folder to write into
    name : base name of the two files (``server`` or ``client``)

    Returns
    -------
    (public_path, secret_path) : the public certificate (mode 0644) and the secret one (0600)

    Raises
    ------
    KeysError
        if either file already exists (a key is never overwritten).

    Notes
    -----
    Both files are first created empty with ``O_CREAT | O_EXCL`` and their final mode, then
    filled by :func:`zmq.auth.create_certificates` (which truncates and writes them, keeping the
    mode): the secret key is never readable by others, not even for a moment, and two runs
    cannot race to overwrite each other's keys.
    """
    folder = Path(folder)
    public_path = folder / f"{name}{PUBLIC_SUFFIX}"
    secret_path = folder / f"{name}{SECRET_SUFFIX}"
    for path in (public_path, secret_path):
        if path.exists():
            raise KeysError(f"{path} already exists: keys are never overwritten "
                            f"(move it away first if you really want new keys)")
    made = []
    try:
        for path, mode in ((secret_path, SECRET_FILE_MODE), (public_path, PUBLIC_FILE_MODE)):
            try:
                fd = os.open(path, os.O_WRONLY | os.O_CREAT | os.O_EXCL, mode)
            except FileExistsError:
                raise KeysError(f"{path} already exists: keys are never overwritten "
                                f"(move it away first if you really want new keys)") from None
            os.close(fd)
            made.append(path)
            os.chmod(path, mode)        # the umask may have removed bits from `mode`
        zmq.auth.create_certificates(folder, name)
    except BaseException:
        for path in made:
            path.unlink(missing_ok=True)
        raise
    return public_path, secret_path


def _check_secret_mode(path: Path) -> None:
    """Refuse a secret key file that group or others may read or write (POSIX only)."""
    if os.name != "posix":
        return
    mode = stat.S_IMODE(os.stat(path).st_mode)
    if mode & 0o077:
        raise KeysError(f"{path} is open to group or others (mode {mode:04o}): a secret key "
                        f"must be private; run chmod 600 {path}")


def _load_public(path: Path) -> bytes:
    """The Z85 public key of a certificate file, or a KeysError naming the file."""
    try:
        public, _ = zmq.auth.load_certificate(path)
    except (OSError, ValueError) as exc:
        raise KeysError(f"{path} is not a readable CURVE key file ({exc}); "
                        f"make keys with spinflip keys") from None
    return public


def _load_secret(path: Path) -> tuple[bytes, bytes]:
    """The Z85 (public, secret) keys of a secret certificate file, after the mode check."""
    _check_secret_mode(path)
    try:
        public, secret = zmq.auth.load_certificate(path)
    except (OSError, ValueError) as exc:
        raise KeysError(f"{path} is not a readable CURVE key file ({exc}); "
                        f"make keys with spinflip keys") from None
    if not secret:
        raise KeysError(f"{path} holds no secret-key: it is a public key file, not the "
                        f"{SECRET_SUFFIX} written by spinflip keys")
    return public, secret


# --------------------------------------------------------------------------------------------
# server side

#: Where libzmq looks for a context's ZAP handler (ZeroMQ RFC 27).
_ZAP_ENDPOINT = "inproc://zeromq.zap.01"


class _UnbindOnStop(Authenticator):
    """Release the ZAP endpoint at once when the authenticator stops.

    ``Authenticator.stop`` only closes the ZAP socket, and libzmq releases a closed socket's
    inproc endpoint later, in its reaper thread: a new authenticator started right after on the
    same context could then fail with "Address already in use". An explicit ``unbind`` frees
    the endpoint before ``stop`` returns. In :class:`_AllowList` this runs after
    ``ThreadAuthenticator.stop`` has joined the thread that used the socket.
    """

    def stop(self) -> None:
        if self.zap_socket is not None:
            try:
                self.zap_socket.unbind(_ZAP_ENDPOINT)
            except zmq.ZMQError:
                pass
        super().stop()


class _AllowList(ThreadAuthenticator, _UnbindOnStop):
    """ThreadAuthenticator whose stop frees the ZAP endpoint synchronously.

    Its control pipe gets a name never used before: ``ThreadAuthenticator`` names it after
    ``id(self)``, which a new authenticator can inherit from a just-stopped one whose pipe
    endpoint libzmq has not released yet.
    """

    def __init__(self, context: zmq.Context):
        super().__init__(context)
        self.pipe_endpoint = f"inproc://spinflip.keys.zap-pipe.{uuid.uuid4().hex}"



class ServerSecurity:
    """CURVE server keys of the daemon and the allow-list of client public keys.

    Parameters
    ----------
    folder : the daemon's keys folder (``publish.keys``)
    public_key, secret_key : the server's Z85-encoded key pair
    clients_dir : folder of allowed client public keys (``folder/clients``)
    client_names : names of the allowed clients (``clients/NAME.key``), sorted

    Notes
    -----
    One ZAP authenticator runs per ZeroMQ context (libzmq looks for the ZAP handler at
    ``inproc://zeromq.zap.01`` of the socket's own context). :meth:`apply` starts it for the
    socket's context if :meth:`start` was not called, so a CURVE server socket never runs
    without the allow-list: without a ZAP handler libzmq would admit any client key.
    Call :meth:`stop` before terminating the context: the authenticator's sockets belong to it
    and ``Context.term()`` waits for them.

    The allow-list is read when the authenticator starts; keys added later take effect at
    the next start of the daemon.
    """

    def __init__(self, folder: Path, public_key: bytes, secret_key: bytes, clients_dir: Path,
                 client_names: tuple[str, ...]):
        self.folder = Path(folder)
        self.public_key = public_key
        self._secret_key = secret_key
        self.clients_dir = Path(clients_dir)
        self.client_names = tuple(client_names)
        self._lock = threading.Lock()
        self._authenticators: list[tuple[zmq.Context, _AllowList]] = []

    def __repr__(self) -> str:  # never print the secret key
        return (f"ServerSecurity(folder={str(self.folder)!r}, "
                f"clients={list(self.client_names)!r})")

    @classmethod
    def from_config(cls, publish_cfg: dict) -> ServerSecurity | None:
        """The daemon's keys from the ``[publish]`` section, or None when ``keys`` is "".

        Parameters
        ----------
        publish_cfg : the validated ``[publish]`` section (``keys``: folder or "")

        Returns
        -------
        ServerSecurity, or None for no keys

        Raises
        ------
        KeysError
            missing folder or files, a secret file readable by others, a file that is not a
            key.
        """
        keys = publish_cfg.get("keys", "")
        if not keys:
            return None
        folder = Path(keys).expanduser()
        if not folder.is_dir():
            raise KeysError(f"publish.keys = {keys} is not a folder: make the daemon's keys "
                            f"with spinflip keys {keys}")
        secret_path = folder / f"{SERVER_NAME}{SECRET_SUFFIX}"
        if not secret_path.is_file():
            raise KeysError(f"publish.keys = {keys} has no {secret_path.name}: make the "
                            f"daemon's keys with spinflip keys {keys}")
        public, secret = _load_secret(secret_path)
        clients_dir = folder / CLIENTS_FOLDER
        if not clients_dir.is_dir():
            raise KeysError(f"publish.keys = {keys} has no {CLIENTS_FOLDER}/ folder: make it "
                            f"(mkdir -m 700 {clients_dir}) and copy each observer's client.key "
                            f"into it as NAME.key")
        names = []
        for path in sorted(clients_dir.glob(f"*{PUBLIC_SUFFIX}")):
            _load_public(path)          # a broken file is named now, not silently ignored
            names.append(path.name[: -len(PUBLIC_SUFFIX)])
        return cls(folder, public, secret, clients_dir, tuple(names))

    def apply(self, socket: zmq.Socket) -> None:
        """Make ``socket`` a CURVE server with these keys (before it binds).

        Also starts the allow-list authenticator for the socket's context (see Notes of the
        class).
        """
        self.start(socket.context)
        socket.curve_secretkey = self._secret_key
        socket.curve_publickey = self.public_key
        socket.curve_server = True

    def start(self, context: zmq.Context) -> None:
        """Run the ZAP authenticator allowing only the ``clients/`` keys in ``context``.

        Idempotent: a second call for the same context does nothing.
        """
        with self._lock:
            if any(ctx is context for ctx, _ in self._authenticators):
                return
            auth = _AllowList(context)
            auth.configure_curve(domain="*", location=str(self.clients_dir))
            auth.start()
            self._authenticators.append((context, auth))

    def stop(self) -> None:
        """Stop every authenticator this object started; safe to call more than once."""
        with self._lock:
            running, self._authenticators = self._authenticators, []
        for _, auth in running:
            auth.stop()


# --------------------------------------------------------------------------------------------
# client side


class ClientSecurity:
    """CURVE client keys of an observer (``watch``, ``ctl``, collect) and the daemon's key.

    Parameters
    ----------
    folder : the client's keys folder
    server_key : the daemon's Z85 public key
    public_key, secret_key : the client's Z85 key pair
    """

    def __init__(self, folder: Path, server_key: bytes, public_key: bytes, secret_key: bytes):
        self.folder = Path(folder)
        self.server_key = server_key
        self.public_key = public_key
        self._secret_key = secret_key

    def __repr__(self) -> str:  # never print the secret key
        return f"ClientSecurity(folder={str(self.folder)!r})"

    @classmethod
    def from_dir(cls, keys_dir: str | os.PathLike[str]) -> ClientSecurity:
        """Load ``client.key_secret`` and the daemon's ``server.key`` from ``keys_dir``.

        Raises
        ------
        KeysError
            missing folder or files (saying how to make or copy them), a secret file readable
            by others, a file that is not a key.
        """
        folder = Path(keys_dir).expanduser()
        if not folder.is_dir():
            raise KeysError(f"--keys {keys_dir} is not a folder: make client keys with "
                            f"spinflip keys DIR --client NAME and pass --keys DIR/NAME")
        secret_path = folder / f"{CLIENT_NAME}{SECRET_SUFFIX}"
        if not secret_path.is_file():
            raise KeysError(f"--keys {keys_dir} has no {secret_path.name}: make client keys "
                            f"with spinflip keys DIR --client NAME and pass --keys DIR/NAME")
        server_path = folder / f"{SERVER_NAME}{PUBLIC_SUFFIX}"
        if not server_path.is_file():
            raise KeysError(f"--keys {keys_dir} has no {server_path.name}: copy the daemon's "
                            f"server.key (from its publish.keys folder) to {server_path}")
        public, secret = _load_secret(secret_path)
        return cls(folder, _load_public(server_path), public, secret)

    def apply(self, socket: zmq.Socket) -> None:
        """Make ``socket`` a CURVE client of the daemon (before it connects)."""
        socket.curve_serverkey = self.server_key
        socket.curve_publickey = self.public_key
        socket.curve_secretkey = self._secret_key


# --------------------------------------------------------------------------------------------
# binding


def _is_local(endpoint: str, key: str) -> bool:
    """True when only programs on this computer can reach a socket bound to ``endpoint``.

    ``ipc://`` and ``inproc://`` are local. For ``tcp://HOST:PORT`` (and ``ws``/``wss``) the
    host is local when it is ``localhost``, an address of 127.0.0.0/8, ``::1`` or an
    IPv4-mapped loopback address. ``*``, 0.0.0.0, ``::``, other addresses and any other name
    (a host name, an interface name) count as not local: a name is not resolved here, so it
    is not trusted. Other transports (pgm, epgm, udp, ...) are not local.
    """
    transport, sep, address = endpoint.partition("://")
    transport = transport.lower()
    if not sep or not transport:
        raise KeysError(f"{key} = {endpoint} is not a ZeroMQ endpoint: use tcp://HOST:PORT, "
                        f"ipc://PATH or inproc://NAME")
    if transport in ("ipc", "inproc"):
        return True
    if transport not in ("tcp", "ws", "wss"):
        return False
    if transport != "tcp":
        address = address.split("/", 1)[0]          # ws://HOST:PORT/PATH
    host, colon, port = address.rpartition(":")
    if not colon or not host or not port:
        raise KeysError(f"{key} = {endpoint} is not a ZeroMQ endpoint: use tcp://HOST:PORT, "
                        f"ipc://PATH or inproc://NAME")
    if host.startswith("[") and host.endswith("]"):
        host = host[1:-1]
    if host.lower().rstrip(".") == "localhost":
        return True
    try:
        ip = ipaddress.ip_address(host)
    except ValueError:
        return False                                  # "*", a host or interface name
    if isinstance(ip, ipaddress.IPv6Address) and ip.ipv4_mapped is not None:
        ip = ip.ipv4_mapped
    return ip.is_loopback


def check_bind(endpoint: str, security: ServerSecurity | None, allow_insecure: bool, *,
               key: str = "publish.data") -> str | None:
    """Decide whether the daemon may bind ``endpoint`` with or without keys.

    Parameters
    ----------
    endpoint : the ZeroMQ endpoint to bind
    security : the daemon's :class:`ServerSecurity`, or None for no keys
    allow_insecure : ``publish.allow_insecure``
    key : configuration key the endpoint came from, for the messages (``publish.data`` or
        ``publish.control``)

    Returns
    -------
    None when the bind is fine (loopback, or keys given); a warning line when it binds beyond
    this computer without keys and ``allow_insecure`` is set (the daemon prints it at every
    start).

    Raises
    ------
    KeysError
        binding beyond this computer with neither keys nor ``allow_insecure``; an endpoint that
        cannot be parsed.
    """
    local = _is_local(endpoint, key)
    if local or security is not None:
        return None
    if not allow_insecure:
        raise KeysError(f"{key} = {endpoint} binds beyond this computer: give publish.keys "
                        f"(spinflip keys) or set publish.allow_insecure = true")
    return (f"warning: {key} = {endpoint} binds beyond this computer without keys "
            f"(publish.allow_insecure = true): anyone who can reach it can connect; "
            f"give publish.keys (spinflip keys) to allow only your observers")


# --------------------------------------------------------------------------------------------
# spinflip keys DIR [--client NAME]


def _make_folder(path: Path) -> None:
    """Create ``path`` (and missing parents) with mode 0700; an existing folder is left as is."""
    if path.is_dir():
        return
    if path.exists():
        raise KeysError(f"{path} exists and is not a folder: give a folder for the keys")
    path.mkdir(mode=FOLDER_MODE, parents=True)
    os.chmod(path, FOLDER_MODE)                      # the umask may have removed bits


def _server_keys(folder: Path) -> list[str]:
    _make_folder(folder)
    public, secret = create_keypair(folder, SERVER_NAME)
    clients = folder / CLIENTS_FOLDER
    _make_folder(clients)
    return [
        f"made the daemon's keys in {folder}:",
        f"  {public}  public: copy it into each observer's keys folder",
        f"  {secret}  secret (mode 600): never copy it",
        f"  {clients}/  the allow-list: one NAME.key per observer "
        f"(spinflip keys DIR --client NAME makes them)",
        f"set publish.keys = \"{folder}\" in the [publish] section of the configuration",
    ]


def _client_keys(folder: Path, name: str) -> list[str]:
    if not _CLIENT_NAME_RE.fullmatch(name):
        raise KeysError(f"--client {name!r} is not a usable name: use 1 to 64 letters, digits, "
                        f"'_', '.' or '-', starting with a letter or digit")
    _make_folder(folder)
    client_dir = folder / name
    _make_folder(client_dir)
    public, secret = create_keypair(client_dir, CLIENT_NAME)
    return [
        f"made the keys of client {name} in {client_dir}:",
        f"  {public}  public",
        f"  {secret}  secret (mode 600): stays with the observer",
        "two steps before it can connect:",
        f"  1. copy {public} into the daemon's keys folder as clients/{name}.key "
        f"(the allow-list), then restart the daemon",
        f"  2. copy the daemon's server.key into {client_dir}/",
        f"then connect with --keys {client_dir}",
    ]


def keys_main(folder: str | os.PathLike[str], role: str | None = None) -> int:
    """``spinflip keys DIR [--client NAME]``: make the daemon's or a client's key pair.

    Parameters
    ----------
    folder : DIR; created with mode 0700 if missing
    role : None for the daemon (``DIR/server.key``, ``DIR/server.key_secret`` and the empty
        allow-list ``DIR/clients/``), or a client NAME (``DIR/NAME/client.key`` and
        ``DIR/NAME/client.key_secret``)

    Returns
    -------
    exit code: 0 when made (what was made and what to do next printed on stdout); 2 when
    refused, with one line on stderr (existing keys are never overwritten, bad client name).
    """
    folder = Path(folder).expanduser()
    try:
        lines = _server_keys(folder) if role is None else _client_keys(folder, role)
    except KeysError as exc:
        print(f"spinflip keys: {exc}", file=sys.stderr)
        return 2
    print("\n".join(lines))
    return 0
