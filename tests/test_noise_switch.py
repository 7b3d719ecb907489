"""Noise-source switch: shell commands, GPIO character device (uAPI v2) and config validation.

No GPIO hardware is needed: the GPIO request and set-values paths run against a fake ``ioctl``
that decodes the bytes it is given at offsets worked out here from the kernel header.
"""

import ctypes
import errno
import grp
import logging
import os
import shlex
import struct
import time

import pytest

from spinflip.daemon.calibration import gpio_cdev
from spinflip.daemon.calibration.noise_switch import (
    CommandNoiseSwitch,
    GpioNoiseSwitch,
    NoiseSwitchError,
    make_noise_switch,
)

# --- the kernel ABI, worked out by hand -------------------------------------------------
# include/uapi/asm-generic/ioctl.h: _IOC(dir, type, nr, size) =
#   dir << _IOC_DIRSHIFT (30) | size << _IOC_SIZESHIFT (16) | type << _IOC_TYPESHIFT (8) | nr,
#   _IOC_WRITE = 1, _IOC_READ = 2; _IOR uses _IOC_READ, _IOWR uses _IOC_READ | _IOC_WRITE.
_IOC_READ, _IOC_WRITE = 2, 1


def _ioc(direction, ioc_type, nr, size):
    return direction << 30 | size << 16 | ioc_type << 8 | nr


# include/uapi/linux/gpio.h (Linux 5.10+): sizes of the structs from their members.
ATTRIBUTE_SIZE = 4 + 4 + 8                    # id, padding, union of __aligned_u64
CONFIG_ATTRIBUTE_SIZE = ATTRIBUTE_SIZE + 8    # attr, mask
CONFIG_SIZE = 8 + 4 + 5 * 4 + 10 * CONFIG_ATTRIBUTE_SIZE   # flags, num_attrs, padding[5], attrs[10]
REQUEST_SIZE = 64 * 4 + 32 + CONFIG_SIZE + 4 + 4 + 5 * 4 + 4   # offsets[64], consumer[32], ...
VALUES_SIZE = 8 + 8                           # bits, mask
CHIPINFO_SIZE = 32 + 32 + 4                   # name[32], label[32], lines

# byte offsets inside struct gpio_v2_line_request
OFF_OFFSETS = 0
OFF_CONSUMER = 64 * 4                         # 256
OFF_CONFIG = OFF_CONSUMER + 32                # 288
OFF_CONFIG_FLAGS = OFF_CONFIG
OFF_CONFIG_NUM_ATTRS = OFF_CONFIG + 8
OFF_ATTR0_ID = OFF_CONFIG + 8 + 4 + 20        # 320
OFF_ATTR0_VALUES = OFF_ATTR0_ID + 8
OFF_ATTR0_MASK = OFF_ATTR0_ID + ATTRIBUTE_SIZE
OFF_NUM_LINES = OFF_CONFIG + CONFIG_SIZE      # 560
OFF_FD = OFF_NUM_LINES + 4 + 4 + 20           # 588

# gpio.h enum gpio_v2_line_flag / gpio_v2_line_attr_id
FLAG_ACTIVE_LOW = 1 << 1                      # _BITULL(1)
FLAG_INPUT = 1 << 2                           # _BITULL(2)
FLAG_OUTPUT = 1 << 3                          # _BITULL(3)
ATTR_ID_OUTPUT_VALUES = 2

GET_CHIPINFO = _ioc(_IOC_READ, 0xB4, 0x01, CHIPINFO_SIZE)
GET_LINE = _ioc(_IOC_READ | _IOC_WRITE, 0xB4, 0x07, REQUEST_SIZE)
SET_VALUES = _ioc(_IOC_READ | _IOC_WRITE, 0xB4, 0x0F, VALUES_SIZE)


def test_struct_sizes_and_offsets_match_kernel_header():
    # sizes: include/uapi/linux/gpio.h, summed member by member above
    assert REQUEST_SIZE == 592 and VALUES_SIZE == 16
    assert ctypes.sizeof(gpio_cdev.GpioV2LineRequest) == REQUEST_SIZE
    assert ctypes.sizeof(gpio_cdev.GpioV2LineValues) == VALUES_SIZE
    assert ctypes.sizeof(gpio_cdev.GpioV2LineConfig) == CONFIG_SIZE
    assert ctypes.sizeof(gpio_cdev.GpioV2LineConfigAttribute) == CONFIG_ATTRIBUTE_SIZE
    assert ctypes.sizeof(gpio_cdev.GpioV2LineAttribute) == ATTRIBUTE_SIZE
    assert ctypes.sizeof(gpio_cdev.GpioChipInfo) == CHIPINFO_SIZE
    req = gpio_cdev.GpioV2LineRequest
    assert req.consumer.offset == OFF_CONSUMER
    assert req.config.offset == OFF_CONFIG
    assert req.num_lines.offset == OFF_NUM_LINES
    assert req.fd.offset == OFF_FD
    assert gpio_cdev.GpioV2LineConfig.attrs.offset == OFF_ATTR0_ID - OFF_CONFIG
    assert gpio_cdev.GpioV2LineAttribute.u.offset == 8


def test_ioctl_numbers_follow_ioc_bit_layout():
    # include/uapi/asm-generic/ioctl.h bit layout, computed independently above
    assert gpio_cdev.GPIO_V2_GET_LINE_IOCTL == GET_LINE == 0xC250B407
    assert gpio_cdev.GPIO_V2_LINE_SET_VALUES_IOCTL == SET_VALUES == 0xC010B40F
    assert gpio_cdev.GPIO_GET_CHIPINFO_IOCTL == GET_CHIPINFO == 0x8044B401


# --- a fake GPIO chip behind an injected ioctl ------------------------------------------

class FakeChip:
    """Answers the three GPIO ioctls, recording the bytes it was given."""

    def __init__(self, lines=32, request_errno=None, set_errno=None):
        self.lines = lines
        self.request_errno = request_errno
        self.set_errno = set_errno
        self.requests = []      # bytes of each gpio_v2_line_request
        self.values = []        # (fd, bits, mask) of each set-values call
        self.line_fd = None

    def __call__(self, fd, request, arg, mutate_flag=True):
        buf = memoryview(arg).cast("B")
        if request == GET_CHIPINFO:
            assert len(buf) == CHIPINFO_SIZE
            struct.pack_into("=32s32sI", buf, 0, b"gpiochip9", b"fake-gpio", self.lines)
        elif request == GET_LINE:
            assert len(buf) == REQUEST_SIZE
            self.requests.append(bytes(buf))
            if self.request_errno:
                raise OSError(self.request_errno, os.strerror(self.request_errno))
            self.line_fd = os.open(os.devnull, os.O_RDONLY)
            struct.pack_into("=i", buf, OFF_FD, self.line_fd)
        elif request == SET_VALUES:
            assert len(buf) == VALUES_SIZE
            if self.set_errno:
                raise OSError(self.set_errno, os.strerror(self.set_errno))
            bits, mask = struct.unpack_from("=QQ", buf, 0)
            self.values.append((fd, bits, mask))
        else:
            raise OSError(errno.ENOTTY, os.strerror(errno.ENOTTY))
        return 0


class RecordingOpener:
    """os.open that remembers the fds it handed out (to check the chip fd gets closed)."""

    def __init__(self):
        self.fds = []

    def __call__(self, path, flags):
        fd = os.open(path, flags)
        self.fds.append(fd)
        return fd


def _is_closed(fd):
    try:
        os.fstat(fd)
    except OSError as exc:
        return exc.errno == errno.EBADF
    return False


@pytest.fixture
def chip_file(tmp_path):
    """A regular file standing in for /dev/gpiochipN (only the fake ioctl talks to it)."""
    path = tmp_path / "gpiochip9"
    path.write_bytes(b"")
    return str(path)


@pytest.mark.parametrize("active_low", [False, True])
def test_request_bytes_and_set_values(chip_file, active_low):
    fake, opener = FakeChip(), RecordingOpener()
    line = gpio_cdev.GpioOutputLine(chip_file, 17, active_low=active_low, ioctl=fake,
                                    opener=opener)
    line.open()
    assert len(fake.requests) == 1
    raw = fake.requests[0]
    assert struct.unpack_from("=I", raw, OFF_OFFSETS)[0] == 17
    assert raw[OFF_CONSUMER:OFF_CONSUMER + 32].rstrip(b"\0") == b"spinflip"
    flags = struct.unpack_from("=Q", raw, OFF_CONFIG_FLAGS)[0]
    assert flags & FLAG_OUTPUT and not flags & FLAG_INPUT
    assert bool(flags & FLAG_ACTIVE_LOW) == active_low
    assert struct.unpack_from("=I", raw, OFF_NUM_LINES)[0] == 1
    # the line starts inactive: output-values attribute, value 0, for line index 0
    assert struct.unpack_from("=I", raw, OFF_CONFIG_NUM_ATTRS)[0] == 1
    assert struct.unpack_from("=I", raw, OFF_ATTR0_ID)[0] == ATTR_ID_OUTPUT_VALUES
    assert struct.unpack_from("=Q", raw, OFF_ATTR0_VALUES)[0] == 0
    assert struct.unpack_from("=Q", raw, OFF_ATTR0_MASK)[0] == 1
    assert _is_closed(opener.fds[0])           # chip fd released after the request
    line.set(True)
    line.set(False)
    # logical values: bit 0 = offsets[0]; the kernel applies active-low itself
    assert fake.values == [(fake.line_fd, 1, 1), (fake.line_fd, 0, 1)]
    line.close()
    assert _is_closed(fake.line_fd)            # line released
    line.close()                               # twice is harmless


def test_missing_chip_path_is_one_clear_line(tmp_path):
    path = str(tmp_path / "gpiochip7")
    with pytest.raises(gpio_cdev.GpioError) as info:
        gpio_cdev.GpioOutputLine(path, 3).open()
    msg = str(info.value)
    assert info.value.errno == errno.ENOENT
    assert path in msg and "not found" in msg and "\n" not in msg


def test_regular_file_is_not_a_gpio_chip(chip_file):
    # real fcntl.ioctl: a regular file answers ENOTTY to the chip-info request
    with pytest.raises(gpio_cdev.GpioError) as info:
        gpio_cdev.GpioOutputLine(chip_file, 3).open()
    msg = str(info.value)
    assert info.value.errno == errno.ENOTTY
    assert "not a GPIO chip" in msg and "ENOTTY" in msg and chip_file in msg
    assert "\n" not in msg


def test_permission_denied_names_group_and_fix(chip_file):
    os.chmod(chip_file, 0o600)

    def denied(path, flags):
        raise PermissionError(errno.EACCES, os.strerror(errno.EACCES), path)

    group = grp.getgrgid(os.stat(chip_file).st_gid).gr_name
    with pytest.raises(gpio_cdev.GpioError) as info:
        gpio_cdev.GpioOutputLine(chip_file, 3, opener=denied).open()
    msg = str(info.value)
    assert info.value.errno == errno.EACCES
    assert "permission denied" in msg and chip_file in msg
    assert f"group '{group}'" in msg and "udev rule" in msg and "\n" not in msg


@pytest.mark.parametrize("code, fragment", [
    (errno.EBUSY, "is busy"),
    (errno.EINVAL, "offset out of range"),
])
def test_request_errors_are_one_line_and_release_the_chip(chip_file, code, fragment):
    fake, opener = FakeChip(request_errno=code), RecordingOpener()
    line = gpio_cdev.GpioOutputLine(chip_file, 5, ioctl=fake, opener=opener)
    with pytest.raises(gpio_cdev.GpioError) as info:
        line.open()
    assert info.value.errno == code
    assert fragment in str(info.value) and "line 5" in str(info.value)
    assert "\n" not in str(info.value)
    assert _is_closed(opener.fds[0]) and not line.is_open


def test_offset_beyond_the_chip_is_refused_before_the_request(chip_file):
    fake = FakeChip(lines=8)
    with pytest.raises(gpio_cdev.GpioError) as info:
        gpio_cdev.GpioOutputLine(chip_file, 17, ioctl=fake).open()
    msg = str(info.value)
    assert info.value.errno == errno.EINVAL
    assert "out of range" in msg and "8 lines" in msg and "0-7" in msg
    assert fake.requests == []


# --- the GPIO noise switch over the fake chip -------------------------------------------

def test_gpio_switch_drives_off_on_open_and_on_close(chip_file):
    fake = FakeChip()
    sw = GpioNoiseSwitch(chip_file, 17, active_low=True, ioctl=fake)
    assert sw.state is None and sw.can_switch and sw.kind == "gpio"
    sw.open()
    assert sw.state is False and fake.values == [(fake.line_fd, 0, 1)]
    sw.set(True)
    assert sw.state is True and fake.values[-1] == (fake.line_fd, 1, 1)
    sw.close()
    assert sw.state is False and fake.values[-1] == (fake.line_fd, 0, 1)
    assert _is_closed(fake.line_fd)
    assert sw.describe() == f"gpio {chip_file} line 17 active-low"[:68]


def test_gpio_switch_errors_name_the_switch(chip_file):
    sw = GpioNoiseSwitch(chip_file, 17, ioctl=FakeChip(request_errno=errno.EBUSY))
    with pytest.raises(NoiseSwitchError) as info:
        sw.open()
    msg = str(info.value)
    assert msg.startswith("noise switch gpio ") and "line 17" in msg and "busy" in msg
    assert sw.state is None


def test_gpio_set_failure_forgets_state_and_close_never_raises(chip_file, caplog):
    fake = FakeChip()
    sw = GpioNoiseSwitch(chip_file, 4, ioctl=fake)
    sw.open()
    fake.set_errno = errno.ENODEV              # the chip went away (USB GPIO unplugged)
    with pytest.raises(NoiseSwitchError) as info:
        sw.set(True)
    assert "ENODEV" in str(info.value) and sw.state is None
    with caplog.at_level(logging.WARNING, logger="spinflip.noise_switch"):
        sw.close()                             # must not raise
    assert "off on close failed" in caplog.text
    assert _is_closed(fake.line_fd)


# --- the command switch, with real shell commands ---------------------------------------

def test_command_switch_runs_commands_in_order_with_env(tmp_path):
    log = shlex.quote(str(tmp_path / "relay.log"))
    sw = CommandNoiseSwitch(f'echo "on $SPINFLIP_CAL" >> {log}',
                            f'echo "off $SPINFLIP_CAL" >> {log}', timeout_s=10.0)
    assert sw.kind == "command" and sw.can_switch and sw.describe() == "command"
    with pytest.raises(NoiseSwitchError):
        sw.set(True)                           # not opened yet
    sw.open()
    assert sw.state is False
    sw.set(True)
    assert sw.state is True
    sw.set(False)
    sw.close()
    assert sw.state is False
    assert (tmp_path / "relay.log").read_text().splitlines() == [
        "off off", "on on", "off off", "off off"]


def test_failing_command_gives_exit_code_and_last_stderr_line(tmp_path):
    sw = CommandNoiseSwitch("echo trying >&2; echo 'relay not found' >&2; exit 3", "true",
                            timeout_s=10.0)
    sw.open()
    with pytest.raises(NoiseSwitchError) as info:
        sw.set(True)
    msg = str(info.value)
    assert msg.startswith("noise switch command: turning the source on failed")
    # only the last stderr line is reported, after the exit code
    assert msg.split("exited with code 3: ", 1)[1] == "relay not found"
    assert "\n" not in msg
    assert sw.state is None                    # unknown after a failure


def test_hanging_command_times_out_and_is_killed(tmp_path):
    pid_file = tmp_path / "child.pid"
    # the shell forks a child: killing only the shell would leave `sleep` running
    hang = f"sleep 5 & echo $! > {shlex.quote(str(pid_file))}; wait"
    sw = CommandNoiseSwitch(hang, "true", timeout_s=1.0)
    sw.open()
    with pytest.raises(NoiseSwitchError) as info:
        sw.set(True)
    msg = str(info.value)
    assert "did not finish within 1 s" in msg and "killed" in msg and "\n" not in msg
    assert sw.state is None
    child = int(pid_file.read_text())
    # the child is gone or a zombie awaiting its reaper (Linux /proc/PID/stat, field 3); on a
    # loaded machine the kill may take a moment to land
    deadline = time.monotonic() + 3.0
    while True:
        try:
            state = open(f"/proc/{child}/stat").read().rsplit(")", 1)[1].split()[0]
        except FileNotFoundError:
            return
        if state in ("Z", "X") or time.monotonic() > deadline:
            break
        time.sleep(0.05)
    assert state in ("Z", "X")


def test_close_logs_but_does_not_raise_when_off_fails(tmp_path, caplog):
    flag = tmp_path / "broken"
    sw = CommandNoiseSwitch("true", f"test ! -e {shlex.quote(str(flag))}", timeout_s=10.0)
    sw.open()
    flag.write_text("")
    with caplog.at_level(logging.WARNING, logger="spinflip.noise_switch"):
        sw.close()
    assert "exited with code 1" in caplog.text and sw.state is None


# --- no switch, and the configuration ---------------------------------------------------

def test_none_refuses_on_and_ignores_off():
    sw = make_noise_switch({})
    assert sw.kind == "none" and not sw.can_switch and sw.describe() == "none"
    sw.open()
    sw.set(False)
    with pytest.raises(NoiseSwitchError) as info:
        sw.set(True)
    assert "no noise-source switch configured" in str(info.value)
    assert sw.state is None
    sw.close()


def test_config_builds_each_kind():
    cmd = make_noise_switch({"switch": "command", "switch_on_cmd": "a", "switch_off_cmd": "b",
                             "switch_timeout_s": 2, "tsys_k": 85.0})
    assert isinstance(cmd, CommandNoiseSwitch) and cmd.timeout_s == 2.0
    gpio = make_noise_switch({"switch": "gpio", "gpio_line": 17})
    assert gpio.describe() == "gpio /dev/gpiochip0 line 17"
    long_path = make_noise_switch({"switch": "gpio", "gpio_chip": "/dev/" + "x" * 80 + "\u00e9",
                                   "gpio_line": 1})
    text = long_path.describe()
    assert len(text) <= 68 and text.isascii() and text.isprintable()   # FITS card value


@pytest.mark.parametrize("cal, fragments", [
    ({"switch": "relay"}, ["calibration.switch = 'relay'", "'none', 'command', 'gpio'"]),
    ({"switch": "command", "switch_off_cmd": "off"},
     ["config calibration.switch_on_cmd is empty: calibration.switch = 'command' needs a "
      "command to turn the noise source on"]),
    ({"switch": "command", "switch_on_cmd": "on", "switch_off_cmd": "  "},
     ["calibration.switch_off_cmd is empty", "turn the noise source off"]),
    ({"switch": "command", "switch_on_cmd": 5, "switch_off_cmd": "off"},
     ["calibration.switch_on_cmd = 5", "expected a string"]),
    ({"switch": "command", "switch_on_cmd": "on", "switch_off_cmd": "off",
      "switch_timeout_s": 0}, ["calibration.switch_timeout_s = 0", "above 0"]),
    ({"switch": "gpio"}, ["calibration.gpio_line is not set", "line offset"]),
    ({"switch": "gpio", "gpio_line": -1}, ["calibration.gpio_line is not set"]),
    ({"switch": "gpio", "gpio_line": -5}, ["calibration.gpio_line = -5", "integer >= 0"]),
    ({"switch": "gpio", "gpio_line": True}, ["calibration.gpio_line = True"]),
    ({"switch": "gpio", "gpio_line": 3, "gpio_chip": ""}, ["calibration.gpio_chip is empty"]),
    ({"switch": "gpio", "gpio_line": 3, "gpio_active_low": "yes"},
     ["calibration.gpio_active_low = 'yes'", "true or false"]),
])
def test_config_errors_name_key_and_allowed(cal, fragments):
    with pytest.raises(ValueError) as info:
        make_noise_switch(cal)
    msg = str(info.value)
    assert "\n" not in msg
    for fragment in fragments:
        assert fragment in msg
