"""A client of the rotator daemon ``rotctld``'s TCP line protocol (one request at a time).

The protocol, as the Hamlib ``rotctld(1)`` manual page describes it (Hamlib 4.5.4, sections
DESCRIPTION and PROTOCOL; read on this machine, the error codes from memory of Hamlib's
``rig.h``): a command is one line; a "get" command is answered by its values, one per line, or
on error by the single line ``RPRT x`` with ``x`` a negative Hamlib error code; a command that
returns nothing is answered by ``RPRT x``, ``0`` on success. The three plain commands used here:

==========  ============================  ==========================================
``p``       get_pos                       two lines: azimuth, elevation (deg)
``P a e``   set_pos Azimuth Elevation     ``RPRT 0``; negative: refused (e.g. outside
                                          the rotator's limits: ``RPRT -1``)
``S``       stop                          ``RPRT 0``
==========  ============================  ==========================================

An unknown command gets no answer at all, and a badly spaced one more than one; so numbers
are always written by this module (``%.2f``), and every read is bounded by ``answer_s``.

Every failure is a :class:`~spinflip.daemon.mount.base.MountError` with one line naming the
endpoint and what went wrong; the connection is then dropped and made again by the next
request.
"""

from __future__ import annotations

import math
import socket
import threading
import time

from spinflip.daemon.config import split_host_port
from spinflip.daemon.error_line import one_line, quoted
from spinflip.daemon.mount.base import AzEl, MountError

#: Hamlib's error codes (``enum rig_errcode_e`` in ``rig.h``; from memory), negated in RPRT.
HAMLIB_ERRORS = {
    1: "invalid parameter", 2: "invalid configuration", 3: "memory shortage",
    4: "function not implemented", 5: "communication timed out", 6: "I/O error",
    7: "internal Hamlib error", 8: "protocol error", 9: "command rejected by the rotator",
    10: "argument truncated", 11: "function not available", 12: "VFO not targetable",
    13: "bus error", 14: "bus busy (collision)", 15: "invalid argument", 16: "invalid VFO",
    17: "argument out of domain",
}

#: Longest answer line accepted, bytes (a position is a few characters).
MAX_LINE_BYTES = 256


def rprt_meaning(code: int) -> str:
    """``RPRT -n`` in words: ``"RPRT -1 (invalid parameter)"``."""
    meaning = HAMLIB_ERRORS.get(-code)
    return f"RPRT {code}" + (f" ({meaning})" if meaning else "")


class RotctldClient:
    """One TCP connection to ``rotctld``, made on the first request and again after a failure.

    Parameters
    ----------
    endpoint : str
        ``host:port`` (``rotator.endpoint``).
    answer_s : float
        Longest wait for connecting and for a whole answer, s (``rotator.answer_s``).

    Thread-safe: requests are serialised by a lock, so each answer is read by its asker.
    """

    def __init__(self, endpoint: str, answer_s: float) -> None:
        hp = split_host_port(endpoint)
        if hp is None:
            raise MountError(f"rotator endpoint {quoted(endpoint)}: expected host:port")
        self.endpoint = endpoint
        self.host, self.port = hp
        self.answer_s = float(answer_s)
        self._lock = threading.Lock()
        self._sock: socket.socket | None = None
        self._buf = b""

    # -- the three commands ------------------------------------------------------------------
    def get_position(self) -> AzEl:
        """``p``: where the rotator is, deg."""
        lines = self._request("p", 2)
        try:
            az, el = float(lines[0]), float(lines[1])
        except ValueError:
            az = el = math.nan
        if not (math.isfinite(az) and math.isfinite(el)):
            self._drop()
            raise self._error(f"unparseable answer to 'p': {quoted(' | '.join(lines))} "
                              "(expected two numbers, azimuth and elevation)")
        return AzEl(az, el)

    def set_position(self, az_deg: float, el_deg: float) -> None:
        """``P az el``: command a position, deg; raises on a negative ``RPRT``."""
        if not (math.isfinite(az_deg) and math.isfinite(el_deg)):
            raise self._error(f"refusing to command a position that is not a number: "
                              f"az {az_deg!r} el {el_deg!r}")
        self._expect_ok(f"P {az_deg:.2f} {el_deg:.2f}")

    def stop(self) -> None:
        """``S``: stop both axes."""
        self._expect_ok("S")

    def close(self) -> None:
        with self._lock:
            self._drop()

    # -- the line protocol -------------------------------------------------------------------
    def _error(self, what: str) -> MountError:
        return MountError(one_line(f"rotator at {self.endpoint}: {what}"))

    def _expect_ok(self, command: str) -> None:
        (line,) = self._request(command, 1)
        code = self._rprt(line)
        if code is None:
            self._drop()
            raise self._error(f"unparseable answer to {command!r}: {quoted(line)} "
                              "(expected RPRT 0)")
        if code != 0:
            raise self._error(f"refused {command!r}: {rprt_meaning(code)}")

    @staticmethod
    def _rprt(line: str) -> int | None:
        head, _, code = line.partition(" ")
        if head != "RPRT":
            return None
        try:
            return int(code)
        except ValueError:
            return None

    def _request(self, command: str, n_lines: int) -> list[str]:
        """Send ``command``, read ``n_lines`` lines (or one ``RPRT -n`` line) within answer_s."""
        with self._lock:
            deadline = time.monotonic() + self.answer_s
            sock = self._connect()
            if not self._drain(sock):                 # closed by the far end since: once more
                self._drop()
                sock = self._connect()
            try:
                sock.sendall(command.encode("ascii") + b"\n")
                lines = [self._readline(sock, deadline, command)]
                code = self._rprt(lines[0])
                if n_lines > 1 and code is not None:       # a get answered by an error
                    raise self._error(f"refused {command!r}: {rprt_meaning(code)}")
                while len(lines) < n_lines:
                    lines.append(self._readline(sock, deadline, command))
            except MountError:
                self._drop()
                raise
            except OSError as exc:
                self._drop()
                raise self._error(f"connection lost during {command!r}: "
                                  f"{exc.strerror or exc}") from None
            return lines

    def _connect(self) -> socket.socket:
        if self._sock is not None:
            return self._sock
        try:
            sock = socket.create_connection((self.host, self.port), timeout=self.answer_s)
        except ConnectionRefusedError:
            raise self._error("connection refused (is rotctld running there?)") from None
        except TimeoutError:
            raise self._error(f"no connection within {self.answer_s:g} s") from None
        except OSError as exc:
            raise self._error(f"cannot connect: {exc.strerror or exc}") from None
        sock.setsockopt(socket.IPPROTO_TCP, socket.TCP_NODELAY, 1)
        self._sock, self._buf = sock, b""
        return sock

    def _drain(self, sock: socket.socket) -> bool:
        """Throw away what arrived unasked (a late answer); False when the far end has closed
        the connection (rotctld restarted since the last request)."""
        self._buf = b""
        sock.setblocking(False)
        try:
            while True:
                if not sock.recv(4096):
                    return False
        except (BlockingIOError, InterruptedError):
            return True
        except OSError:
            return False
        finally:
            if self._sock is sock:
                sock.settimeout(self.answer_s)

    def _readline(self, sock: socket.socket, deadline: float, command: str) -> str:
        while b"\n" not in self._buf:
            left = deadline - time.monotonic()
            if left <= 0:
                raise self._error(f"no answer to {command!r} within {self.answer_s:g} s")
            sock.settimeout(left)
            try:
                data = sock.recv(4096)
            except TimeoutError:
                raise self._error(f"no answer to {command!r} within {self.answer_s:g} s") from None
            if not data:
                raise self._error(f"connection closed by rotctld during {command!r}")
            self._buf += data
            if len(self._buf) > MAX_LINE_BYTES and b"\n" not in self._buf:
                raise self._error(f"unparseable answer to {command!r}: a line longer than "
                                  f"{MAX_LINE_BYTES} bytes")
        raw, _, self._buf = self._buf.partition(b"\n")
        return raw.decode("ascii", "replace").strip()

    def _drop(self) -> None:
        if self._sock is not None:
            try:
                self._sock.close()
            except OSError:
                pass
            self._sock, self._buf = None, b""
