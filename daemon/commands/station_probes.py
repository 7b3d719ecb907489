"""What ``spinflip doctor`` reads from the system: the kernel clock, USB dongles, port holders.

Pure readers of the system (no verdicts): the kernel's clock state (``adjtimex``, falling back
to ``timedatectl``), RTL2832U dongles in sysfs, the shared library through pyrtlsdr, free disk
space, and which process listens on a TCP port (procfs). The checks that judge what these
find are :mod:`spinflip.daemon.commands.doctor`.

References
----------
Linux ``adjtimex(2)`` manual page: ``adjtimex`` with ``modes = 0`` reads the kernel's clock
state; the return value ``TIME_ERROR`` (5) means "clock not synchronized"; ``STA_UNSYNC``
(0x0040) in ``status``; ``maxerror`` in microseconds, which the kernel lets grow at 500 ppm up
to 16 s and then sets ``STA_UNSYNC``. ``struct timex`` after ``<sys/timex.h>`` (glibc, musl).
Linux sysfs ABI, ``Documentation/ABI/stable/sysfs-bus-usb``: each USB device's ``idVendor``,
``idProduct``, ``busnum``, ``devnum``, ``serial``; usbfs nodes ``/dev/bus/usb/BBB/DDD``.
Linux ``proc(5)``: ``/proc/net/tcp`` and ``/proc/net/tcp6`` (local address:port in hex, state
``0A`` = LISTEN, socket inode), ``/proc/PID/fd`` links ``socket:[INODE]``, ``/proc/PID/cmdline``.
"""

from __future__ import annotations

import ctypes
import ctypes.util
import os
import shutil
import subprocess
from dataclasses import dataclass
from pathlib import Path

#: USB vendor:product ids (facts, from memory) of RTL2832U-based receivers, with a generic
#: description; ``lsusb`` names a device from the system's own USB id database. The first two
#: are the ids most SDR dongles carry; the others are DVB-T/DAB television sticks built on
#: the same chip.
_TV_STICK = "RTL2832U DVB-T/DAB television stick"
RTL2832U_USB_IDS: dict[tuple[str, str], str] = {
    ("0bda", "2832"): "RTL2832U receiver, generic id",
    ("0bda", "2838"): "RTL2832U receiver, the usual SDR dongle id",
    **{ids: _TV_STICK for ids in (
        ("0ccd", "00a9"), ("0ccd", "00b3"), ("0ccd", "00d3"), ("0ccd", "00d7"), ("0ccd", "00e0"),
        ("0458", "707f"), ("185b", "0620"), ("185b", "0650"), ("1b80", "d3a4"), ("1d19", "1101"),
        ("1d19", "1102"), ("1d19", "1103"), ("1f4d", "b803"), ("1f4d", "c803"))},
}
#: Clock states of ``adjtimex(2)``: the return value when the clock is not synchronised.
TIME_ERROR = 5
#: ``timex.status`` bit: the clock is not synchronised (``<sys/timex.h>``).
STA_UNSYNC = 0x0040
#: The kernel gives up on synchronisation when ``maxerror`` reaches 16 s (``adjtimex(2)``).
MAXERROR_UNSYNC_US = 16_000_000


@dataclass(frozen=True)
class ClockState:
    """The system clock's synchronisation as the kernel (or timedated) reports it.

    ``synced`` is None when nothing could tell; ``detail`` says what was asked and answered.
    """

    synced: bool | None
    detail: str


@dataclass(frozen=True)
class Dongle:
    """An RTL2832U dongle seen in sysfs."""

    sysfs_name: str       # e.g. "1-1.3"
    vendor: str           # hex, e.g. "0bda"
    product: str
    busnum: int | None
    devnum: int | None
    serial: str | None

    def describe(self) -> str:
        where = (f"bus {self.busnum:03d} device {self.devnum:03d}"
                 if self.busnum is not None and self.devnum is not None else self.sysfs_name)
        ser = f", serial {self.serial}" if self.serial else ""
        return f"{self.vendor}:{self.product} ({RTL2832U_USB_IDS[(self.vendor, self.product)]}) " \
               f"on {where}{ser}"


class _Timex(ctypes.Structure):
    """``struct timex`` of ``<sys/timex.h>`` (glibc / musl, ``long``-sized fields)."""

    _fields_ = [("modes", ctypes.c_uint), ("offset", ctypes.c_long), ("freq", ctypes.c_long),
                ("maxerror", ctypes.c_long), ("esterror", ctypes.c_long),
                ("status", ctypes.c_int), ("constant", ctypes.c_long),
                ("precision", ctypes.c_long), ("tolerance", ctypes.c_long),
                ("time_sec", ctypes.c_long), ("time_usec", ctypes.c_long),
                ("tick", ctypes.c_long), ("ppsfreq", ctypes.c_long), ("jitter", ctypes.c_long),
                ("shift", ctypes.c_int), ("stabil", ctypes.c_long), ("jitcnt", ctypes.c_long),
                ("calcnt", ctypes.c_long), ("errcnt", ctypes.c_long), ("stbcnt", ctypes.c_long),
                ("tai", ctypes.c_int), ("_padding", ctypes.c_int * 11),
                ("_spare", ctypes.c_byte * 64)]   # room if a libc's struct is larger


def kernel_clock_state() -> ClockState:
    """Ask the kernel with ``adjtimex`` (``modes = 0``: read only); else ask timedated.

    Returns
    -------
    ClockState
        ``synced`` False when adjtimex returns ``TIME_ERROR`` (5), or ``STA_UNSYNC`` is set, or
        ``maxerror`` has reached 16 s; True for any other clock state (``TIME_OK`` 0 to
        ``TIME_WAIT`` 4: synchronised, perhaps with a leap second pending).

    Notes
    -----
    Reading needs no privilege (``adjtimex(2)``). When the call is not available (another
    C library, a sandbox refusing it), ``timedatectl show -p NTPSynchronized --value`` answers
    ``yes``/``no``; when neither works, ``synced`` is None.
    """
    try:
        libc = ctypes.CDLL(None, use_errno=True)
        tx = _Timex()
        tx.modes = 0
        state = libc.adjtimex(ctypes.byref(tx))
        if state < 0:
            raise OSError(ctypes.get_errno(), os.strerror(ctypes.get_errno()))
    except (OSError, AttributeError) as exc:
        return _timedatectl_state(f"adjtimex failed ({exc})")
    unsync = state == TIME_ERROR or bool(tx.status & STA_UNSYNC) or tx.maxerror >= MAXERROR_UNSYNC_US
    how = (f"kernel adjtimex: state {state}{' (TIME_ERROR)' if state == TIME_ERROR else ''}, "
           f"status 0x{tx.status & 0xFFFF:04x}, max error {tx.maxerror / 1e6:.3g} s")
    return ClockState(not unsync, how)


def _timedatectl_state(why: str) -> ClockState:
    try:
        out = subprocess.run(["timedatectl", "show", "-p", "NTPSynchronized", "--value"],
                             capture_output=True, text=True, timeout=5)
    except (OSError, subprocess.SubprocessError) as exc:
        return ClockState(None, f"{why}; timedatectl not usable ({exc})")
    answer = out.stdout.strip()
    if out.returncode != 0 or answer not in ("yes", "no"):
        err = (out.stderr.strip().splitlines() or ["no answer"])[-1]
        return ClockState(None, f"{why}; timedatectl: {err}")
    return ClockState(answer == "yes", f"timedatectl NTPSynchronized={answer} ({why})")


def _load_pyrtlsdr() -> str:
    """Import pyrtlsdr (it loads librtlsdr with ctypes) and name the library it loaded."""
    import rtlsdr
    lib = getattr(rtlsdr, "librtlsdr", None)
    if lib is None:
        raise ImportError("pyrtlsdr is in client-only mode (RTLSDR_CLIENT_MODE set)")
    return str(getattr(lib, "_name", "librtlsdr"))


def _disk_free_bytes(path: Path) -> int:
    return shutil.disk_usage(path).free


def _read(path: Path) -> str | None:
    try:
        return path.read_text(errors="replace").strip()
    except OSError:
        return None


def _int_or_none(text: str | None) -> int | None:
    try:
        return int(text) if text is not None else None
    except ValueError:
        return None


def find_dongles(sys_root: Path) -> tuple[list[Dongle], int | None]:
    """RTL2832U dongles among ``<sys_root>/bus/usb/devices/*``.

    Returns
    -------
    dongles : list of Dongle
        Sorted by bus and device number.
    n_usb : int or None
        How many USB devices sysfs lists (interfaces not counted); None if sysfs has no USB bus.
    """
    base = sys_root / "bus" / "usb" / "devices"
    if not base.is_dir():
        return [], None
    dongles, n_usb = [], 0
    for dev in sorted(base.iterdir()):
        vendor = _read(dev / "idVendor")
        if vendor is None:          # an interface (1-1:1.0), not a device
            continue
        n_usb += 1
        product = (_read(dev / "idProduct") or "").lower()
        vendor = vendor.lower()
        if (vendor, product) not in RTL2832U_USB_IDS:
            continue
        dongles.append(Dongle(dev.name, vendor, product, _int_or_none(_read(dev / "busnum")),
                              _int_or_none(_read(dev / "devnum")), _read(dev / "serial") or None))
    dongles.sort(key=lambda d: (d.busnum or 0, d.devnum or 0, d.sysfs_name))
    return dongles, n_usb


def _tcp_endpoint(endpoint: str) -> tuple[str, str] | None:
    """``tcp://host:port`` -> (host, port); None for other transports."""
    if not endpoint.startswith("tcp://"):
        return None
    rest = endpoint[len("tcp://"):]
    host, sep, port = rest.rpartition(":")
    if not sep:
        raise ValueError(f"endpoint {endpoint!r}: expected tcp://HOST:PORT")
    if host.startswith("[") and host.endswith("]"):
        host = host[1:-1]
    return host, port


def _listening_inodes(proc_root: Path, port: int) -> set[str]:
    """Socket inodes bound to ``port`` in ``/proc/net/tcp`` and ``tcp6`` (``proc(5)``)."""
    inodes = set()
    for table in ("tcp", "tcp6"):
        try:
            lines = (proc_root / "net" / table).read_text().splitlines()[1:]
        except OSError:
            continue
        for line in lines:
            f = line.split()
            if len(f) < 10:
                continue
            try:
                local_port = int(f[1].rpartition(":")[2], 16)
            except ValueError:
                continue
            if local_port == port and f[9] != "0":
                inodes.add(f[9])
    return inodes


def port_holder(proc_root: Path, port: int) -> tuple[int, list[str]] | None:
    """The process holding a TCP ``port``: (pid, argv), or None if it cannot be found."""
    links = {f"socket:[{i}]" for i in _listening_inodes(proc_root, port)}
    if not links:
        return None
    for pid_dir in proc_root.iterdir():
        if not pid_dir.name.isdigit():
            continue
        try:
            fds = list((pid_dir / "fd").iterdir())
        except OSError:
            continue
        for fd in fds:
            try:
                target = os.readlink(fd)
            except OSError:
                continue
            if target in links:
                try:
                    argv = (pid_dir / "cmdline").read_bytes().split(b"\0")
                except OSError:
                    argv = []
                return int(pid_dir.name), [a.decode(errors="replace") for a in argv if a]
    return None


def _is_spinflip_daemon(argv: list[str]) -> bool:
    """argv of ``spinflip run|demo`` (the script, or ``python -m spinflip.cli``)."""
    for i, arg in enumerate(argv):
        if os.path.basename(arg) == "spinflip" or arg in ("spinflip.cli", "spinflip.daemon.cli"):
            return any(a in ("run", "demo") for a in argv[i + 1:])
    return False
