"""``spinflip doctor``: a health check of the station before and while it runs headless.

Each check looks at one thing the daemon needs and answers with a :class:`Check`: its status
(``"ok"``, ``"warn"`` or ``"fail"``), what was found, and one line saying exactly what to run
or which file to change. :func:`run_checks` is pure apart from reading the system (sysfs, the
device nodes, the kernel clock, the output folder, a trial bind of each port); everything it
reads comes through :class:`Roots`, so tests build a fake sysfs tree and inject the rest.

The checks, in order:

==================  ===============================================================
config              :func:`spinflip.daemon.config.load` accepts the file (no file: defaults)
librtlsdr           the shared library is found and pyrtlsdr loads it
dongle              an RTL2832U dongle is on the USB bus (sysfs ``idVendor``/``idProduct``)
dvb driver          the kernel's DVB-T driver is not loaded (it would hold the dongle)
device access       this user may open ``/dev/bus/usb/BBB/DDD`` read-write
clock               the kernel says the system clock is synchronised (``adjtimex``)
disk space          hours of data the output folder's file system still takes
output folder       a file can be created in the output folder
port <endpoint>     every configured ``tcp://`` publish endpoint can be bound now
==================  ===============================================================

The hardware checks (librtlsdr, dongle, dvb driver, device access) fail only when the
configured source is ``rtlsdr``; with ``sim`` or ``replay`` their problems are warnings, since
nothing of that run needs the dongle. An unsynchronised clock likewise fails a live (``rtlsdr``)
run, whose timestamps, pointing and LSRK correction come from it, and only warns otherwise.

What the checks read from the system is :mod:`spinflip.daemon.commands.station_probes`.
"""

from __future__ import annotations

import ctypes
import ctypes.util
import errno
import grp
import os
import socket
import stat
import sys
from collections.abc import Callable
from dataclasses import dataclass
from pathlib import Path
from typing import TYPE_CHECKING

from spinflip.daemon import config as config_mod
from spinflip.daemon.commands.station_probes import (
    ClockState,
    Dongle,
    _disk_free_bytes,
    _is_spinflip_daemon,
    _load_pyrtlsdr,
    _tcp_endpoint,
    find_dongles,
    kernel_clock_state,
    port_holder,
)
from spinflip.daemon.sources.dongle import (
    DVB_MODULES,  # the kernel's DVB-T modules that claim the dongle
)

if TYPE_CHECKING:
    from rich.console import Console
    from rich.table import Table

#: Output below this much free space fails whatever the rate, bytes (100 MB).
DISK_FAIL_BYTES = 100_000_000
#: Hours of data below which the disk check fails, and below which it warns.
DISK_FAIL_H = 1.0
DISK_WARN_H = 24.0
#: Per row and channel the archive stores about three 4-byte arrays (DATA, CHANEXP, FLAGGED
#: rounded up; see storage/fits_file.py), and the journal and the FITS file hold the scan twice
#: while it is turned over; so bytes/s = 2 * 3 * 4 * channels / integration_s (an upper estimate).
ARRAYS_PER_ROW = 3
BYTES_PER_VALUE = 4
COPIES_ON_DISK = 2

#: The service's system user and group, and its configuration file (systemd/spinflip.service).
SERVICE_GROUP = "spinflip"
SERVICE_CONFIG = Path("/etc/spinflip/spinflip.toml")

FIX_LIBRARY = "sudo apt-get install librtlsdr0"
FIX_DEVICE = ("check the USB cable and the hub's power, then `lsusb` must list 0bda:2838 "
              "(or another RTL2832U id)")
FIX_BLACKLIST = "sudo cp hardware/spinflip-blacklist-dvb.conf /etc/modprobe.d/"
FIX_UDEV = ("sudo cp hardware/60-spinflip-dongle.rules /etc/udev/rules.d/ && sudo udevadm control "
            f"--reload && sudo udevadm trigger && sudo usermod -aG {SERVICE_GROUP} $USER "
            "(log in again)")
FIX_CLOCK = ("sudo timedatectl set-ntp true (systemd-timesyncd; or install chrony): a board "
             "without a real-time clock boots with a stale time")
FIX_PORT_OURS = "systemctl status spinflip (a second daemon needs other ports in [publish])"

STATUSES = ("ok", "warn", "fail")


@dataclass(frozen=True)
class Check:
    """The answer of one check.

    Parameters
    ----------
    name : str
        What was checked (one or two words).
    status : str
        ``"ok"``, ``"warn"`` or ``"fail"``.
    detail : str
        What was found.
    fix : str
        One line: the exact command to run or file to change; empty when ``status`` is ok.
    """

    name: str
    status: str
    detail: str
    fix: str = ""

    def __post_init__(self):
        if self.status not in STATUSES:
            raise ValueError(f"check status {self.status!r}: expected one of {', '.join(STATUSES)}")


# -- what the checks read: the real system, or what a test injects ----------------------------


@dataclass(frozen=True)
class Roots:
    """Everything the checks read from the system; tests replace parts of it.

    Parameters
    ----------
    sys_root, dev_root, proc_root : Path
        Where sysfs, ``/dev`` and procfs are (``/sys``, ``/dev``, ``/proc``).
    find_library : callable
        ``name -> path or None``, as :func:`ctypes.util.find_library`.
    load_binding : callable
        ``() -> str``: import pyrtlsdr and name the loaded library; raises ImportError/OSError.
    clock_state : callable
        ``() -> ClockState``.
    access : callable
        ``(path, mode) -> bool``, as :func:`os.access`.
    euid : callable
        ``() -> int``, the effective user id (0: root, where ``os.access`` always says yes).
    disk_free_bytes : callable
        ``Path -> int``, free bytes of the file system holding that path.
    service_config : Path
        The service's configuration file, mentioned when no ``--config`` is given.
    """

    sys_root: Path = Path("/sys")
    dev_root: Path = Path("/dev")
    proc_root: Path = Path("/proc")
    find_library: Callable[[str], str | None] = ctypes.util.find_library
    load_binding: Callable[[], str] = _load_pyrtlsdr
    clock_state: Callable[[], ClockState] = kernel_clock_state
    access: Callable[[str, int], bool] = os.access
    euid: Callable[[], int] = os.geteuid
    disk_free_bytes: Callable[[Path], int] = _disk_free_bytes
    service_config: Path = SERVICE_CONFIG


# -- the checks --------------------------------------------------------------------------------

def _hw_status(kind: str) -> str:
    """How bad a hardware problem is for this run: fatal only for the dongle source."""
    return "fail" if kind == "rtlsdr" else "warn"


def _only_for(kind: str) -> str:
    return "" if kind == "rtlsdr" else f" (source is {kind}: only the rtlsdr source needs it)"


def check_config(cfg_path: str | None, roots: Roots) -> tuple[Check, dict]:
    """Load and validate the configuration; on error the rest runs on the defaults."""
    if cfg_path is None:
        hint = (f"; the service's {roots.service_config} exists: add --config "
                f"{roots.service_config}" if roots.service_config.is_file() else "")
        return Check("config", "ok", f"defaults (no --config){hint}"), config_mod.load(None)
    try:
        cfg = config_mod.load(cfg_path)
    except config_mod.ConfigError as exc:
        return (Check("config", "fail", f"{exc} (other checks use the defaults)",
                      f"edit {cfg_path}: correct the key named here"), config_mod.load(None))
    return Check("config", "ok", f"{cfg_path} valid; source {cfg['source']['kind']}"), cfg


def check_library(kind: str, roots: Roots) -> Check:
    """librtlsdr can be found by the dynamic loader and pyrtlsdr loads it."""
    found = roots.find_library("rtlsdr")
    try:
        loaded, err = roots.load_binding(), None
    except (ImportError, OSError) as exc:
        loaded, err = None, (str(exc).strip().splitlines() or [type(exc).__name__])[0]
    if loaded:
        where = f"; the dynamic loader knows {found}" if found else ""
        return Check("librtlsdr", "ok", f"pyrtlsdr loaded {loaded}{where}")
    if found and err and "No module named" in err:
        return Check("librtlsdr", _hw_status(kind),
                     f"{found} found but pyrtlsdr is not installed ({err}){_only_for(kind)}",
                     f"{sys.executable} -m pip install pyrtlsdr")
    lib = f"{found} found" if found else "librtlsdr not found by the dynamic loader"
    return Check("librtlsdr", _hw_status(kind), f"{lib}; pyrtlsdr: {err}{_only_for(kind)}",
                 FIX_LIBRARY)


def check_dongle(cfg: dict, dongles: list[Dongle], n_usb: int | None, roots: Roots) -> Check:
    """A dongle is on the bus, and the configured ``source.device`` names one of them."""
    kind, dev = cfg["source"]["kind"], cfg["source"]["device"]
    bad = _hw_status(kind)
    if n_usb is None:
        return Check("dongle", bad, f"no USB bus in sysfs ({roots.sys_root}/bus/usb/devices "
                     f"missing: a container, or no USB controller){_only_for(kind)}", FIX_DEVICE)
    if not dongles:
        return Check("dongle", bad, f"no RTL2832U dongle among {n_usb} USB device"
                     f"{'s' if n_usb != 1 else ''}{_only_for(kind)}", FIX_DEVICE)
    seen = "; ".join(d.describe() for d in dongles)
    if kind == "rtlsdr":
        if dev.isdigit() and int(dev) >= len(dongles):
            return Check("dongle", "fail", f"source.device = {dev!r} but only {len(dongles)} "
                         f"dongle{'s' if len(dongles) != 1 else ''} visible: {seen}",
                         f"set [source] device to an index below {len(dongles)} or a serial")
        serials = [d.serial for d in dongles if d.serial]
        if not dev.isdigit() and dev not in serials:
            return Check("dongle", "fail", f"source.device = {dev!r} is not the serial of a "
                         f"visible dongle: {seen}",
                         "set [source] device to one of: " + (", ".join(serials) or "0"))
    return Check("dongle", "ok", seen)


def check_dvb_driver(kind: str, roots: Roots) -> Check:
    """None of the DVB-T driver's modules is loaded (``/sys/module/<name>`` exists if it is)."""
    loaded = [m for m in DVB_MODULES if (roots.sys_root / "module" / m).exists()]
    if not loaded:
        return Check("dvb driver", "ok", "no DVB-T module loaded (" + ", ".join(DVB_MODULES) + ")")
    return Check("dvb driver", _hw_status(kind),
                 f"loaded: {', '.join(loaded)}: the television driver holds the dongle"
                 f"{_only_for(kind)}",
                 f"sudo rmmod {' '.join(loaded)} && {FIX_BLACKLIST}")


def _group_name(gid: int) -> str:
    try:
        return grp.getgrgid(gid).gr_name
    except KeyError:
        return str(gid)


def check_access(kind: str, dongles: list[Dongle], roots: Roots) -> Check:
    """The usbfs node of every visible dongle is readable and writable by this user.

    Notes
    -----
    ``os.access`` always says yes to root, so as root the node's mode and group are judged
    instead: the service user (group ``spinflip``) needs group read-write on a node of that
    group, or read-write for everyone.
    """
    bad = _hw_status(kind)
    if not dongles:
        return Check("device access", "warn", "not checked: no dongle visible",
                     "plug the dongle in, then run spinflip doctor again")
    problems, fine = [], []
    root = roots.euid() == 0
    for d in dongles:
        if d.busnum is None or d.devnum is None:
            problems.append(f"{d.sysfs_name}: sysfs gives no busnum/devnum")
            continue
        node = roots.dev_root / "bus" / "usb" / f"{d.busnum:03d}" / f"{d.devnum:03d}"
        try:
            st = node.stat()
        except OSError:
            problems.append(f"{node} missing (devtmpfs/udev did not make it)")
            continue
        mode, group = stat.S_IMODE(st.st_mode), _group_name(st.st_gid)
        desc = f"{node} (mode {mode:04o}, group {group})"
        if not root:
            if roots.access(str(node), os.R_OK | os.W_OK):
                fine.append(f"{desc} read-write")
            else:
                problems.append(f"{desc}: this user cannot open it read-write")
        elif mode & 0o006 == 0o006 or (group == SERVICE_GROUP and mode & 0o060 == 0o060):
            fine.append(f"{desc}: root, and the service group {SERVICE_GROUP} can too")
        else:
            problems.append(f"{desc}: root can open it, the service user {SERVICE_GROUP} cannot")
    if problems:
        status = "warn" if root and all("root can" in p for p in problems) else bad
        return Check("device access", status, "; ".join(problems + fine) + _only_for(kind),
                     FIX_UDEV)
    return Check("device access", "ok", "; ".join(fine))


def check_clock(kind: str, roots: Roots) -> Check:
    """The system clock is synchronised (NTP/chrony), as the kernel says."""
    state = roots.clock_state()
    if state.synced is None:
        return Check("clock", "warn", f"cannot tell: {state.detail}", FIX_CLOCK)
    if state.synced:
        return Check("clock", "ok", f"synchronised: {state.detail}")
    live = kind == "rtlsdr"
    return Check("clock", "fail" if live else "warn",
                 f"not synchronised: {state.detail}"
                 + ("; timestamps, pointing and the LSRK correction of the data follow it" if live
                    else f" (source is {kind})"), FIX_CLOCK)


def archive_rate_bytes_s(cfg: dict) -> float:
    """Bytes per second the configured run writes: 2 copies * 3 arrays * 4 B * channels / t_int.

    An upper estimate (see :data:`ARRAYS_PER_ROW`): each integration of ``integration_s``
    seconds adds a row of ``channels`` values to the journal, and the FITS file holds the same
    rows again until the journal is removed.
    """
    n_chan = cfg["spectrometer"]["channels"]
    t_int_s = cfg["spectrometer"]["integration_s"]
    return COPIES_ON_DISK * ARRAYS_PER_ROW * BYTES_PER_VALUE * n_chan / t_int_s


def _existing_parent(path: Path) -> Path:
    path = path.absolute()
    while not path.exists() and path != path.parent:
        path = path.parent
    return path


def _span(hours: float) -> str:
    if hours >= 48:
        return f"{hours / 24:.0f} days"
    if hours >= 2:
        return f"{hours:.0f} h"
    return f"{hours * 60:.0f} min"


def check_disk(cfg: dict, out_dir: Path, roots: Roots) -> Check:
    """Hours of data the output folder's file system still takes at the configured rate.

    Notes
    -----
    hours left = free bytes / (bytes/s of :func:`archive_rate_bytes_s`) / 3600 s/h.
    Fails below :data:`DISK_FAIL_H` or :data:`DISK_FAIL_BYTES`, warns below :data:`DISK_WARN_H`.
    """
    where = _existing_parent(out_dir)
    try:
        free_bytes = int(roots.disk_free_bytes(where))
    except OSError as exc:
        return Check("disk space", "fail", f"cannot read free space of {where}: {exc}",
                     "set [output] dir (or --out) to a mounted, readable folder")
    rate_bytes_s = archive_rate_bytes_s(cfg)
    hours_left = free_bytes / rate_bytes_s / 3600.0
    spec = cfg["spectrometer"]
    detail = (f"{free_bytes / 1e9:.3g} GB free in {where}: {_span(hours_left)} at "
              f"{rate_bytes_s / 1e3:.3g} kB/s ({spec['channels']} channels every "
              f"{spec['integration_s']:g} s)")
    fix = f"free space on the disk of {where}, or set [output] dir (or --out) on a bigger disk"
    if free_bytes < DISK_FAIL_BYTES or hours_left < DISK_FAIL_H:
        return Check("disk space", "fail", detail + " (needs 100 MB and 1 h at least)", fix)
    if hours_left < DISK_WARN_H:
        return Check("disk space", "warn", detail + " (less than a day)", fix)
    return Check("disk space", "ok", detail)


def check_output_writable(out_dir: Path) -> Check:
    """A probe file can be created (and removed) in the output folder, or in the parent the
    daemon would create it in."""
    where = _existing_parent(out_dir)
    note = "" if where == out_dir.absolute() else f" ({out_dir} does not exist yet: the daemon creates it)"
    probe = where / f".spinflip-doctor-{os.getpid()}"
    fix = f"sudo chown {SERVICE_GROUP}: {where} (or set [output] dir / --out to a writable folder)"
    if not where.is_dir():
        return Check("output folder", "fail", f"{where} is not a folder{note}", fix)
    try:
        fd = os.open(probe, os.O_CREAT | os.O_EXCL | os.O_WRONLY, 0o600)
        os.close(fd)
        os.unlink(probe)
    except OSError as exc:
        return Check("output folder", "fail",
                     f"{where}: cannot create a file ({exc.strerror or exc}){note}", fix)
    return Check("output folder", "ok", f"{where} writable{note}")


def check_port(key: str, endpoint: str, roots: Roots) -> Check:
    """The endpoint ``publish.<key>`` can be bound now: a TCP socket without SO_REUSEADDR is
    bound to its address and closed again."""
    name = f"port {key}"
    try:
        parsed = _tcp_endpoint(endpoint)
    except ValueError as exc:
        return Check(name, "fail", str(exc), f"correct publish.{key} in the config")
    if parsed is None:
        return Check(name, "ok", f"{endpoint}: not TCP, nothing to bind in advance")
    host, port_text = parsed
    if port_text in ("*", "0", "!"):
        return Check(name, "ok", f"{endpoint}: any free port, chosen at bind")
    if not port_text.isdigit() or not 0 < int(port_text) < 65536:
        return Check(name, "fail", f"{endpoint}: port {port_text!r} is not 1-65535",
                     f"correct publish.{key} in the config")
    port = int(port_text)
    any_host = host in ("*", "")      # ZeroMQ's wildcard: every IPv4 interface
    try:
        family, _, _, _, addr = socket.getaddrinfo(
            None if any_host else host, port, socket.AF_INET if any_host else socket.AF_UNSPEC,
            socket.SOCK_STREAM, 0, socket.AI_PASSIVE)[0]
    except socket.gaierror as exc:
        return Check(name, "fail", f"{endpoint}: host {host!r} does not resolve ({exc.strerror})",
                     f"set publish.{key} to an address of this machine, e.g. tcp://127.0.0.1:{port}")
    sock = socket.socket(family, socket.SOCK_STREAM)
    try:
        sock.setsockopt(socket.SOL_SOCKET, socket.SO_REUSEADDR, 0)
        sock.bind(addr)
    except OSError as exc:
        if exc.errno == errno.EADDRINUSE:
            return _port_taken(name, key, endpoint, port, roots)
        if exc.errno == errno.EADDRNOTAVAIL:
            return Check(name, "fail", f"{endpoint}: {host} is not an address of this machine",
                         f"set publish.{key} to an address of this machine, e.g. "
                         f"tcp://127.0.0.1:{port}")
        if exc.errno == errno.EACCES:
            return Check(name, "fail", f"{endpoint}: port {port} needs privilege to bind",
                         f"set publish.{key} to a port above 1023")
        return Check(name, "fail", f"{endpoint}: cannot bind ({exc.strerror or exc})",
                     f"set publish.{key} to another endpoint")
    finally:
        sock.close()
    return Check(name, "ok", f"{endpoint} free")


def _port_taken(name: str, key: str, endpoint: str, port: int, roots: Roots) -> Check:
    holder = port_holder(roots.proc_root, port)
    if holder is not None and _is_spinflip_daemon(holder[1]):
        return Check(name, "warn", f"{endpoint} held by the running spinflip daemon (pid "
                     f"{holder[0]}): expected while it runs", FIX_PORT_OURS)
    if holder is not None:
        who = f"pid {holder[0]} ({' '.join(holder[1])[:60] or '?'})"
    else:
        who = "a process this user cannot see (a running spinflip daemon holds its own ports)"
    return Check(name, "fail", f"{endpoint} already in use by {who}",
                 f"stop that process (`systemctl status spinflip` if it is ours) or set "
                 f"another port in [publish] {key}")


def run_checks(cfg_path: str | None, roots: Roots | None = None, *,
               out_dir: str | None = None) -> list[Check]:
    """Every check of the station, in a fixed order.

    Parameters
    ----------
    cfg_path : str or None
        The configuration file (None: the defaults).
    roots : Roots, optional
        What to read from the system (default: the real one).
    out_dir : str, optional
        Output folder overriding ``[output] dir`` (as ``spinflip run --out`` does).

    Returns
    -------
    list of Check
        config, librtlsdr, dongle, dvb driver, device access, clock, disk space, output
        folder, then one ``port <key>`` per configured publish endpoint.
    """
    roots = roots or Roots()
    cfg_check, cfg = check_config(cfg_path, roots)
    kind = cfg["source"]["kind"]
    out = Path(out_dir if out_dir is not None else cfg["output"]["dir"]).expanduser()
    dongles, n_usb = find_dongles(roots.sys_root)
    checks = [cfg_check, check_library(kind, roots), check_dongle(cfg, dongles, n_usb, roots),
              check_dvb_driver(kind, roots), check_access(kind, dongles, roots),
              check_clock(kind, roots), check_disk(cfg, out, roots), check_output_writable(out)]
    for key in ("data", "control"):
        if cfg["publish"][key]:
            checks.append(check_port(key, cfg["publish"][key], roots))
    return checks


def verdict(checks: list[Check]) -> tuple[int, str]:
    """Exit code (0: nothing failed, 1: something failed) and a one-line verdict."""
    fails = [c.name for c in checks if c.status == "fail"]
    warns = [c.name for c in checks if c.status == "warn"]
    if fails:
        return 1, (f"{len(fails)} check{'s' if len(fails) != 1 else ''} failed ("
                   f"{', '.join(fails)}): fix {'them' if len(fails) != 1 else 'it'} before "
                   "running headless")
    if warns:
        return 0, (f"ready, with {len(warns)} warning{'s' if len(warns) != 1 else ''} ("
                   f"{', '.join(warns)})")
    return 0, f"ready: all {len(checks)} checks pass"


_STYLE = {"ok": "green", "warn": "yellow", "fail": "bold red"}


def render(checks: list[Check]) -> Table:
    """A rich Table of the checks (check, status, found, fix)."""
    from rich.table import Table
    from rich.text import Text
    table = Table(title="spinflip doctor", show_lines=False, expand=False)
    table.add_column("check", no_wrap=True)
    table.add_column("status", no_wrap=True)
    table.add_column("found", overflow="fold")
    table.add_column("fix", overflow="fold")
    for c in checks:
        table.add_row(Text(c.name), Text(c.status, style=_STYLE[c.status]), Text(c.detail),
                      Text(c.fix))    # Text: no rich markup ("[publish]" is a section name)
    return table


def doctor_main(config_path: str | None, console: Console | None = None, roots: Roots | None = None, *,
                out_dir: str | None = None) -> int:
    """Run every check, print the table and the verdict; 0 if nothing failed, else 1.

    Parameters
    ----------
    config_path : str or None
        As ``spinflip run --config``.
    console : rich.console.Console, optional
        Where to print (default: a new Console on standard output).
    roots : Roots, optional
        What to read from the system (tests).
    out_dir : str, optional
        As ``spinflip run --out``.
    """
    from rich.text import Text
    if console is None:
        from rich.console import Console
        console = Console()
    checks = run_checks(config_path, roots, out_dir=out_dir)
    code, line = verdict(checks)
    console.print(render(checks))
    console.print(Text(line, style="bold red" if code else "bold green"))
    return code
