"""``spinflip doctor``: each check against a fake station built in tmp_path, and the real machine.

Outside references used below:
- Linux sysfs ABI (Documentation/ABI/stable/sysfs-bus-usb, from memory): a USB device's folder
  under /sys/bus/usb/devices holds idVendor, idProduct (4 hex digits), busnum, devnum and
  serial; its usbfs node is /dev/bus/usb/BBB/DDD with both numbers zero-padded to 3 digits;
  a loaded kernel module has a folder /sys/module/<name>.
- adjtimex(2) manual page: TIME_ERROR = 5 "clock not synchronized", STA_UNSYNC = 0x0040;
  <sys/timex.h> of glibc and musl for struct timex, 208 bytes on LP64 Linux (from memory).
- proc(5): /proc/net/tcp lists local address:port in hex and the socket inode; /proc/PID/fd
  links read "socket:[INODE]"; /proc/PID/cmdline is NUL-separated.
- RTL2832U USB ids 0bda:2832 and 0bda:2838: the usual ids of these dongles (from memory).
- Thresholds (fail < 1 h or < 100 MB, warn < 24 h) and the rate estimate are the issue's spec.

Tests run as root here, where os.access always says yes: the access check is injected.
"""

from __future__ import annotations

import ctypes
import io
import os
import socket
from pathlib import Path

import numpy as np
import pytest
from rich.console import Console

from spinflip.daemon.commands import doctor, station_probes
from spinflip.daemon.commands.doctor import (
    Check,
    Roots,
    archive_rate_bytes_s,
    doctor_main,
    run_checks,
)
from spinflip.daemon.commands.station_probes import ClockState, find_dongles

SERIAL = "HF3-0001"


# -- a fake station ------------------------------------------------------------------------------

def add_usb(sys_root: Path, name: str, vendor: str, product: str, bus: int, dev: int,
            serial: str | None = None) -> None:
    d = sys_root / "bus" / "usb" / "devices" / name
    d.mkdir(parents=True)
    for key, value in (("idVendor", vendor), ("idProduct", product), ("busnum", str(bus)),
                       ("devnum", str(dev))):
        (d / key).write_text(value + "\n")
    if serial:
        (d / "serial").write_text(serial + "\n")
    (sys_root / "bus" / "usb" / "devices" / f"{name}:1.0").mkdir()   # an interface: no ids


def add_node(dev_root: Path, bus: int, dev: int, mode: int = 0o660) -> Path:
    node = dev_root / "bus" / "usb" / f"{bus:03d}" / f"{dev:03d}"
    node.parent.mkdir(parents=True, exist_ok=True)
    node.write_bytes(b"")
    node.chmod(mode)
    return node


def station(tmp_path: Path, dongle: bool = True, **over) -> Roots:
    """A healthy station: root hub plus one dongle on bus 1 device 4, everything else good."""
    sys_root, dev_root = tmp_path / "sys", tmp_path / "dev"
    if not sys_root.exists():                                   # built once per test
        (sys_root / "module" / "usbcore").mkdir(parents=True)
        add_usb(sys_root, "usb1", "1d6b", "0002", 1, 1)         # a root hub, not a dongle
    if dongle and not (dev_root / "bus").exists():
        add_usb(sys_root, "1-1.3", "0bda", "2838", 1, 4, SERIAL)
        add_node(dev_root, 1, 4)
    roots = dict(sys_root=sys_root, dev_root=dev_root, proc_root=Path("/proc"),
                 find_library=lambda name: "/usr/lib/aarch64-linux-gnu/librtlsdr.so.0",
                 load_binding=lambda: "librtlsdr.so.0",
                 clock_state=lambda: ClockState(True, "fake kernel: TIME_OK"),
                 access=lambda path, mode: True, euid=lambda: 1000,
                 disk_free_bytes=lambda path: 10**12, service_config=tmp_path / "absent.toml")
    roots.update(over)
    return Roots(**roots)


def write_config(tmp_path: Path, kind: str = "rtlsdr", extra: str = "",
                 publish: tuple[str, str] = ("", "")) -> str:
    out = tmp_path / "data"
    out.mkdir(exist_ok=True)
    path = tmp_path / "hf3.toml"
    path.write_text(f'[site]\nname = "Heron Ridge"\ntelescope = "HRFS-3"\n'
                    f'[source]\nkind = "{kind}"\n'
                    f'[output]\ndir = "{out}"\n'
                    f'[publish]\ndata = "{publish[0]}"\ncontrol = "{publish[1]}"\n' + extra)
    return str(path)


def by_name(checks: list[Check]) -> dict[str, Check]:
    return {c.name: c for c in checks}


def text_console() -> tuple[Console, io.StringIO]:
    buf = io.StringIO()
    return Console(file=buf, width=220, color_system=None), buf


# -- the whole station ---------------------------------------------------------------------------

def test_healthy_station_passes_every_check(tmp_path):
    roots = station(tmp_path)
    checks = run_checks(write_config(tmp_path), roots)
    assert [c.name for c in checks] == ["config", "librtlsdr", "dongle", "dvb driver",
                                        "device access", "clock", "disk space", "output folder"]
    assert {c.status for c in checks} == {"ok"}, [c for c in checks if c.status != "ok"]
    assert all(c.fix == "" for c in checks)
    found = by_name(checks)["dongle"].detail
    assert "0bda:2838" in found and "bus 001 device 004" in found and SERIAL in found
    console, buf = text_console()
    assert doctor_main(write_config(tmp_path), console=console, roots=roots) == 0
    out = buf.getvalue()
    for header in ("check", "status", "found", "fix"):
        assert header in out
    assert "ready: all 8 checks pass" in out


def test_check_rejects_unknown_status():
    with pytest.raises(ValueError, match="check status 'bad'"):
        Check("x", "bad", "")


# -- 1 librtlsdr -----------------------------------------------------------------------------------

def _no_binding():
    raise ImportError("Error loading librtlsdr. Make sure librtlsdr is in your path")


@pytest.mark.parametrize("kind, status", [("rtlsdr", "fail"), ("sim", "warn"), ("replay", "warn")])
def test_missing_library_fails_only_for_the_dongle_source(tmp_path, kind, status):
    cfg = write_config(tmp_path, kind=kind)
    roots = station(tmp_path, find_library=lambda name: None, load_binding=_no_binding)
    lib = by_name(run_checks(cfg, roots))["librtlsdr"]
    assert lib.status == status
    assert lib.fix == "sudo apt-get install librtlsdr0"
    assert "not found" in lib.detail
    console, _ = text_console()
    assert doctor_main(cfg, console=console, roots=roots) == (1 if status == "fail" else 0)


def test_library_found_but_binding_missing_says_pip(tmp_path):
    def no_module():
        raise ImportError("No module named 'rtlsdr'")
    roots = station(tmp_path, load_binding=no_module)
    lib = by_name(run_checks(write_config(tmp_path), roots))["librtlsdr"]
    assert lib.status == "fail" and "pip install pyrtlsdr" in lib.fix


# -- 2 dongle visible ------------------------------------------------------------------------------

@pytest.mark.parametrize("kind, status, code", [("rtlsdr", "fail", 1), ("sim", "warn", 0)])
def test_no_dongle(tmp_path, kind, status, code):
    roots = station(tmp_path, dongle=False)
    cfg = write_config(tmp_path, kind=kind)
    checks = by_name(run_checks(cfg, roots))
    assert checks["dongle"].status == status
    assert "no RTL2832U dongle among 1 USB device" in checks["dongle"].detail
    assert "lsusb" in checks["dongle"].fix and "cable" in checks["dongle"].fix
    assert checks["device access"].status == "warn"          # nothing to check
    console, _ = text_console()
    assert doctor_main(cfg, console=console, roots=roots) == code


def test_dongle_ids_from_sysfs(tmp_path):
    sys_root = tmp_path / "sys"
    add_usb(sys_root, "1-1", "0BDA", "2832", 3, 17)            # sysfs writes lower case; be lenient
    add_usb(sys_root, "1-2", "0bda", "8153", 3, 18)            # another device with the same vendor id (a network adapter)
    add_usb(sys_root, "2-1", "0bda", "2838", 2, 5, "00000001")
    dongles, n_usb = find_dongles(sys_root)
    assert n_usb == 3                                          # interfaces are not devices
    assert [(d.vendor, d.product, d.busnum, d.devnum, d.serial) for d in dongles] == [
        ("0bda", "2838", 2, 5, "00000001"), ("0bda", "2832", 3, 17, None)]
    assert ("0bda", "2832") in station_probes.RTL2832U_USB_IDS and ("0bda", "2838") in station_probes.RTL2832U_USB_IDS


def test_configured_serial_or_index_not_visible(tmp_path):
    roots = station(tmp_path)
    cfg = write_config(tmp_path)
    text = Path(cfg).read_text()
    Path(cfg).write_text(text.replace('kind = "rtlsdr"', 'kind = "rtlsdr"\ndevice = "HF3-9999"'))
    dongle = by_name(run_checks(cfg, roots))["dongle"]
    assert dongle.status == "fail" and "'HF3-9999'" in dongle.detail and SERIAL in dongle.fix
    Path(cfg).write_text(text.replace('kind = "rtlsdr"', 'kind = "rtlsdr"\ndevice = "1"'))
    dongle = by_name(run_checks(cfg, roots))["dongle"]
    assert dongle.status == "fail" and "only 1 dongle visible" in dongle.detail


# -- 3 DVB driver --------------------------------------------------------------------------------

def test_dvb_driver_loaded_fails_with_rmmod_and_blacklist(tmp_path):
    roots = station(tmp_path)
    for name in ("dvb_usb_rtl28xxu", "rtl2832"):
        (roots.sys_root / "module" / name).mkdir()
    dvb = by_name(run_checks(write_config(tmp_path), roots))["dvb driver"]
    assert dvb.status == "fail"
    assert "dvb_usb_rtl28xxu, rtl2832" in dvb.detail
    assert dvb.fix.startswith("sudo rmmod dvb_usb_rtl28xxu rtl2832 && ")
    assert "hardware/spinflip-blacklist-dvb.conf /etc/modprobe.d/" in dvb.fix


# -- 4 permissions -------------------------------------------------------------------------------

def test_device_node_without_permission(tmp_path):
    asked = []

    def access(path, mode):
        asked.append((path, mode))
        return False
    roots = station(tmp_path, access=access)
    node = roots.dev_root / "bus" / "usb" / "001" / "004"
    node.chmod(0o000)
    cfg = write_config(tmp_path)
    acc = by_name(run_checks(cfg, roots))["device access"]
    assert asked == [(str(node), os.R_OK | os.W_OK)]          # the node that sysfs named
    assert acc.status == "fail" and str(node) in acc.detail and "mode 0000" in acc.detail
    for part in ("hardware/60-spinflip-dongle.rules /etc/udev/rules.d/", "udevadm control --reload",
                 "udevadm trigger", "usermod -aG spinflip $USER"):
        assert part in acc.fix
    console, _ = text_console()
    assert doctor_main(cfg, console=console, roots=roots) == 1


def test_device_node_missing(tmp_path):
    roots = station(tmp_path)
    (roots.dev_root / "bus" / "usb" / "001" / "004").unlink()
    acc = by_name(run_checks(write_config(tmp_path), roots))["device access"]
    assert acc.status == "fail" and "missing" in acc.detail


def test_as_root_the_node_mode_decides_for_the_service_user(tmp_path):
    roots = station(tmp_path, euid=lambda: 0, access=lambda p, m: pytest.fail("not asked as root"))
    node = roots.dev_root / "bus" / "usb" / "001" / "004"
    node.chmod(0o600)          # owner root only: the spinflip service user cannot open it
    acc = by_name(run_checks(write_config(tmp_path), roots))["device access"]
    assert acc.status == "warn" and "service user spinflip cannot" in acc.detail
    assert "60-spinflip-dongle.rules" in acc.fix
    node.chmod(0o666)
    assert by_name(run_checks(write_config(tmp_path), roots))["device access"].status == "ok"


# -- 5 clock ---------------------------------------------------------------------------------------

@pytest.mark.parametrize("kind, status", [("rtlsdr", "fail"), ("sim", "warn")])
def test_clock_unsynchronised(tmp_path, kind, status):
    roots = station(tmp_path, clock_state=lambda: ClockState(False, "fake kernel: TIME_ERROR"))
    clock = by_name(run_checks(write_config(tmp_path, kind=kind), roots))["clock"]
    assert clock.status == status and "TIME_ERROR" in clock.detail
    assert "sudo timedatectl set-ntp true" in clock.fix


def test_clock_unknown_warns(tmp_path):
    roots = station(tmp_path, clock_state=lambda: ClockState(None, "no adjtimex, no timedatectl"))
    clock = by_name(run_checks(write_config(tmp_path), roots))["clock"]
    assert clock.status == "warn" and "cannot tell" in clock.detail


def test_kernel_clock_state_on_this_machine():
    # struct timex is 208 bytes on LP64 Linux (glibc/musl <sys/timex.h>); ours may be larger
    # (spare room), never smaller, or the kernel would write past it.
    if ctypes.sizeof(ctypes.c_long) == 8:
        assert ctypes.sizeof(station_probes._Timex) >= 208
    state = station_probes.kernel_clock_state()
    assert state.synced in (True, False, None)
    if state.detail.startswith("kernel adjtimex"):
        assert state.synced is not None
        if "(TIME_ERROR)" in state.detail:                    # adjtimex(2): 5 = unsynchronised
            assert state.synced is False


# -- 6 disk space ----------------------------------------------------------------------------------

def test_rate_estimate_formula():
    cfg = doctor.config_mod.load(None)
    cfg["spectrometer"].update(channels=1024, integration_s=10.0)
    # 2 copies (journal + FITS) * 3 arrays * 4 bytes * 1024 channels / 10 s (the spec)
    assert archive_rate_bytes_s(cfg) == pytest.approx(2 * 3 * 4 * 1024 / 10.0)


def test_rate_estimate_covers_what_the_archive_writes(tmp_path):
    """Bytes per row on disk (journal + FITS) measured with the archive itself stay below the
    estimate: the doctor must not promise more hours than there are."""
    from spinflip.daemon.storage.archive import ScanWriter
    nchan = 2048
    header = {"SITELAT": 54.0, "SITELONG": -2.0, "SITEELEV": 400.0, "TELESCOP": "HRFS-3",
              "SPECSYS": "TOPOCENT", "BUNIT": "K"}

    def row(i):
        return {"DATA": np.full(nchan, 10.0 + i, np.float32), "FLAGGED": np.zeros(nchan, bool),
                "CHANEXP": np.full(nchan, 9.5, np.float32),
                "TSYS": 100.0, "EXPOSURE": 10.0, "DATE-OBS": f"2026-03-01T02:00:{i:02d}.000",
                "CRVAL1": 1420.4e6, "CDELT1": 2.4e6 / nchan, "CRPIX1": nchan / 2 + 1.0,
                "CTYPE1": "FREQ", "RESTFREQ": 1420405751.768, "VFRAME": 0.0, "GLON": 30.0,
                "GLAT": 0.0, "AZIMUTH": 180.0, "ELEVATIO": 40.0, "OBJECT": "G030.0+00.0"}

    sizes = {}
    for n_rows in (2, 10):
        w = ScanWriter(tmp_path, f"rows{n_rows}", header, nchan)
        for i in range(n_rows):
            w.append(row(i))
        journal = w.journal_path.stat().st_size
        w.close()
        sizes[n_rows] = journal + w.fits_path.stat().st_size
    per_row_bytes = (sizes[10] - sizes[2]) / 8
    cfg = doctor.config_mod.load(None)
    cfg["spectrometer"].update(channels=nchan, integration_s=1.0)
    assert per_row_bytes <= archive_rate_bytes_s(cfg)          # bytes per 1 s row
    assert per_row_bytes > 0.5 * archive_rate_bytes_s(cfg)     # and not wildly pessimistic


@pytest.mark.parametrize("hours, status, says", [(30.0, "ok", "30 h"), (12.0, "warn", "12 h"),
                                                 (0.5, "fail", "30 min")])
def test_disk_hours_left(tmp_path, hours, status, says):
    cfg_path = write_config(tmp_path, extra="[spectrometer]\nchannels = 16384\nintegration_s = 1\n")
    rate = 2 * 3 * 4 * 16384 / 1.0                 # bytes/s: 100 MB lasts about 16 min here
    seen = []

    def free(path):
        seen.append(path)
        return int(hours * 3600 * rate)
    roots = station(tmp_path, disk_free_bytes=free)
    disk = by_name(run_checks(cfg_path, roots))["disk space"]
    assert disk.status == status and says in disk.detail
    assert seen == [tmp_path / "data"]
    assert (disk.fix == "") == (status == "ok")


def test_disk_below_100_mb_fails_however_slow_the_rate(tmp_path):
    cfg_path = write_config(tmp_path, extra="[spectrometer]\nchannels = 64\nintegration_s = 3600\n")
    roots = station(tmp_path, disk_free_bytes=lambda path: 50_000_000)   # years at this rate
    disk = by_name(run_checks(cfg_path, roots))["disk space"]
    assert disk.status == "fail" and "100 MB" in disk.detail


def test_disk_of_a_folder_not_made_yet_is_its_parent(tmp_path):
    seen = []
    roots = station(tmp_path, disk_free_bytes=lambda path: seen.append(path) or 10**12)
    checks = by_name(run_checks(write_config(tmp_path), roots, out_dir=str(tmp_path / "a" / "b")))
    assert seen == [tmp_path]
    assert checks["output folder"].status == "ok" and "does not exist yet" in checks["output folder"].detail


def test_output_folder_that_is_a_file_fails(tmp_path):
    (tmp_path / "plain").write_text("not a folder")
    out = by_name(run_checks(write_config(tmp_path), station(tmp_path),
                             out_dir=str(tmp_path / "plain")))["output folder"]
    assert out.status == "fail" and "not a folder" in out.detail
    assert not list(tmp_path.glob("data/.spinflip-doctor-*"))     # no probe left behind


# -- 7 config ----------------------------------------------------------------------------------

def test_bad_config_names_the_key(tmp_path):
    cfg_path = write_config(tmp_path, extra="[spectrometer]\nchannels = 1000\n")
    checks = run_checks(cfg_path, station(tmp_path))
    cfg = by_name(checks)["config"]
    assert cfg.status == "fail" and "spectrometer.channels = 1000" in cfg.detail
    assert cfg.fix.startswith(f"edit {cfg_path}")
    assert len(checks) == 10                       # the rest ran, on the defaults (two ports)
    Path(cfg_path).write_text('[source]\nkindd = "rtlsdr"\n')
    assert "source.kindd" in by_name(run_checks(cfg_path, station(tmp_path)))["config"].detail


def test_no_config_is_defaults(tmp_path):
    service = tmp_path / "spinflip.toml"
    service.write_text("")
    cfg = by_name(run_checks(None, station(tmp_path, service_config=service)))["config"]
    assert cfg.status == "ok" and cfg.detail.startswith("defaults") and str(service) in cfg.detail


# -- 8 ports -----------------------------------------------------------------------------------

@pytest.fixture
def taken_port():
    sock = socket.socket()
    sock.bind(("127.0.0.1", 0))
    sock.listen()
    yield sock.getsockname()[1]
    sock.close()


def test_port_taken_names_the_holder(tmp_path, taken_port):
    free = socket.socket()
    free.bind(("127.0.0.1", 0))
    free_port = free.getsockname()[1]
    free.close()
    cfg = write_config(tmp_path, publish=(f"tcp://127.0.0.1:{taken_port}",
                                          f"tcp://127.0.0.1:{free_port}"))
    checks = by_name(run_checks(cfg, station(tmp_path)))
    data = checks["port data"]
    assert data.status == "fail" and "already in use" in data.detail
    assert f"pid {os.getpid()}" in data.detail                 # this test process holds it
    assert "systemctl status spinflip" in data.fix and "[publish] data" in data.fix
    assert checks["port control"].status == "ok"
    console, buf = text_console()
    assert doctor_main(cfg, console=console, roots=station(tmp_path)) == 1
    # printed as written: "[publish]" is a section name, not rich markup to be swallowed
    assert "[publish]" in buf.getvalue()


def test_port_held_by_our_daemon_only_warns(tmp_path, taken_port):
    """A fake /proc whose socket table says a spinflip daemon listens on the port."""
    proc = tmp_path / "proc"
    (proc / "net").mkdir(parents=True)
    (proc / "net" / "tcp").write_text(
        "  sl  local_address rem_address   st tx_queue rx_queue tr tm->when retrnsmt   uid  "
        "timeout inode\n"
        f"   0: 0100007F:{taken_port:04X} 00000000:0000 0A 00000000:00000000 00:00000000 "
        "00000000   999        0 424242 1 0000000000000000 100 0 0 10 0\n")
    (proc / "4242" / "fd").mkdir(parents=True)
    (proc / "4242" / "fd" / "7").symlink_to("socket:[424242]")
    (proc / "4242" / "cmdline").write_bytes(
        b"/opt/spinflip/bin/python\0/opt/spinflip/bin/spinflip\0run\0--config\0"
        b"/etc/spinflip/spinflip.toml\0")
    cfg = write_config(tmp_path, publish=(f"tcp://127.0.0.1:{taken_port}", ""))
    data = by_name(run_checks(cfg, station(tmp_path, proc_root=proc)))["port data"]
    assert data.status == "warn" and "spinflip daemon (pid 4242)" in data.detail
    assert "systemctl status spinflip" in data.fix


def test_spinflip_daemon_argv():
    assert station_probes._is_spinflip_daemon(["/opt/spinflip/bin/python", "/opt/spinflip/bin/spinflip",
                                       "run", "--config", "x.toml"])
    assert station_probes._is_spinflip_daemon(["python", "-m", "spinflip.cli", "demo"])
    assert not station_probes._is_spinflip_daemon(["python", "-m", "pytest", "/home/obs/spinflip"])


def test_port_endpoints_not_bindable(tmp_path):
    roots = station(tmp_path)
    assert doctor.check_port("data", "tcp://*:*", roots).status == "ok"
    assert doctor.check_port("data", "ipc:///tmp/hf3.sock", roots).status == "ok"
    bad = doctor.check_port("data", "tcp://127.0.0.1:70000", roots)
    assert bad.status == "fail" and "1-65535" in bad.detail
    # 192.0.2.0/24 is TEST-NET-1 (RFC 5737): never an address of this machine
    other = doctor.check_port("control", "tcp://192.0.2.7:5622", roots)
    assert other.status == "fail" and "not an address of this machine" in other.detail


# -- the real machine --------------------------------------------------------------------------

def test_real_machine_runs(tmp_path):
    """No injection: real sysfs, /dev, /proc, kernel clock, disk and pyrtlsdr import."""
    cfg = write_config(tmp_path, publish=("tcp://127.0.0.1:*", ""))
    console, buf = text_console()
    code = doctor_main(cfg, console=console)
    checks = by_name(run_checks(cfg))
    assert code == (1 if any(c.status == "fail" for c in checks.values()) else 0)
    assert all(c.status in ("ok", "warn", "fail") for c in checks.values())
    assert all(c.fix for c in checks.values() if c.status != "ok")
    dongles, _ = find_dongles(Path("/sys"))
    if not dongles:                                # this machine: no dongle (a container)
        assert checks["dongle"].status == "fail" and "lsusb" in checks["dongle"].fix
        assert code == 1 and "dongle" in buf.getvalue().splitlines()[-1]


def test_doctor_command_fails_on_a_bad_config_and_names_the_key(tmp_path):
    from cli_runner import run_cli
    bad = tmp_path / "bad.toml"
    bad.write_text("[spectrometer]\nchannels = 1000\n")
    r = run_cli(["doctor", "--config", bad, "--out", tmp_path / "o"])
    assert r.returncode == 1, r.stdout + r.stderr
    assert "spectrometer.channels" in r.stdout and "fail" in r.stdout
