"""One GPIO output line through the Linux GPIO character device (uAPI v2), with ioctl only.

A line is requested from the chip device ``/dev/gpiochipN`` as an output, driven inactive at
once, set with one ioctl per change, and released when its file descriptor is closed. Only the
standard library is used (``os``, ``fcntl.ioctl`` and ``ctypes``): no third-party GPIO package.

Sequence of system calls::

    chip_fd = open("/dev/gpiochipN", O_RDWR | O_CLOEXEC | O_NONBLOCK)
    ioctl(chip_fd, GPIO_GET_CHIPINFO_IOCTL, &gpiochip_info)     # is it a chip? how many lines?
    ioctl(chip_fd, GPIO_V2_GET_LINE_IOCTL, &gpio_v2_line_request)
    close(chip_fd)                        # the line request holds its own reference
    line_fd = request.fd
    ioctl(line_fd, GPIO_V2_LINE_SET_VALUES_IOCTL, &gpio_v2_line_values)   # per change
    close(line_fd)                        # releases the line

Kernel header ``include/uapi/linux/gpio.h`` (Linux 5.10 and later), quoted in the part used::

    #define GPIO_MAX_NAME_SIZE 32
    #define GPIO_V2_LINES_MAX 64
    #define GPIO_V2_LINE_NUM_ATTRS_MAX 10

    struct gpiochip_info {
            char name[GPIO_MAX_NAME_SIZE];
            char label[GPIO_MAX_NAME_SIZE];
            __u32 lines;
    };

    enum gpio_v2_line_flag {
            GPIO_V2_LINE_FLAG_USED          = _BITULL(0),
            GPIO_V2_LINE_FLAG_ACTIVE_LOW    = _BITULL(1),
            GPIO_V2_LINE_FLAG_INPUT         = _BITULL(2),
            GPIO_V2_LINE_FLAG_OUTPUT        = _BITULL(3),
            ...
    };

    struct gpio_v2_line_values {
            __aligned_u64 bits;
            __aligned_u64 mask;
    };

    enum gpio_v2_line_attr_id {
            GPIO_V2_LINE_ATTR_ID_FLAGS              = 1,
            GPIO_V2_LINE_ATTR_ID_OUTPUT_VALUES      = 2,
            GPIO_V2_LINE_ATTR_ID_DEBOUNCE           = 3,
    };

    struct gpio_v2_line_attribute {
            __u32 id;
            __u32 padding;
            union {
                    __aligned_u64 flags;
                    __aligned_u64 values;
                    __u32 debounce_period_us;
            };
    };

    struct gpio_v2_line_config_attribute {
            struct gpio_v2_line_attribute attr;
            __aligned_u64 mask;
    };

    struct gpio_v2_line_config {
            __aligned_u64 flags;
            __u32 num_attrs;
            __u32 padding[5];
            struct gpio_v2_line_config_attribute attrs[GPIO_V2_LINE_NUM_ATTRS_MAX];
    };

    struct gpio_v2_line_request {
            __u32 offsets[GPIO_V2_LINES_MAX];
            char consumer[GPIO_MAX_NAME_SIZE];
            struct gpio_v2_line_config config;
            __u32 num_lines;
            __u32 event_buffer_size;
            __u32 padding[5];
            __s32 fd;
    };

    #define GPIO_GET_CHIPINFO_IOCTL _IOR(0xB4, 0x01, struct gpiochip_info)
    #define GPIO_V2_GET_LINE_IOCTL _IOWR(0xB4, 0x07, struct gpio_v2_line_request)
    #define GPIO_V2_LINE_SET_VALUES_IOCTL _IOWR(0xB4, 0x0F, struct gpio_v2_line_values)

Sizes that follow (every member is naturally aligned, so there is no implicit padding and the
layout is the same on 32- and 64-bit ABIs): gpiochip_info 32 + 32 + 4 = 68 bytes;
gpio_v2_line_attribute 4 + 4 + 8 = 16; gpio_v2_line_config_attribute 16 + 8 = 24;
gpio_v2_line_config 8 + 4 + 20 + 10 * 24 = 272; gpio_v2_line_request
64 * 4 + 32 + 272 + 4 + 4 + 20 + 4 = 592; gpio_v2_line_values 8 + 8 = 16.

Request numbers, from ``include/uapi/asm-generic/ioctl.h``::

    _IOC(dir, type, nr, size) = dir << 30 | size << 16 | type << 8 | nr
    _IOC_WRITE = 1, _IOC_READ = 2;  _IOR: dir = _IOC_READ;  _IOWR: dir = _IOC_READ | _IOC_WRITE

(2 direction bits, 14 size bits, 8 type bits, 8 number bits). This generic layout is the one of
x86, ARM, arm64 and RISC-V, the boards a small telescope runs on; Alpha, MIPS, PowerPC and SPARC
define their own and are not supported here.

Polarity: with ``GPIO_V2_LINE_FLAG_ACTIVE_LOW`` the kernel inverts the line, so the values
passed here are always logical (1 = active = noise source on) and the pin is physically low
when active.

References
----------
Linux kernel, include/uapi/linux/gpio.h and Documentation/userspace-api/gpio/chardev.rst
(GPIO character device uAPI v2, Linux 5.10 and later).
Linux kernel, include/uapi/asm-generic/ioctl.h (ioctl request number layout).
"""

from __future__ import annotations

import ctypes
import errno
import fcntl
import grp
import os
import stat
from collections.abc import Callable

#: Maximum size of name and label arrays, bytes (gpio.h GPIO_MAX_NAME_SIZE).
GPIO_MAX_NAME_SIZE = 32
#: Maximum number of lines in one request (gpio.h GPIO_V2_LINES_MAX).
GPIO_V2_LINES_MAX = 64
#: Maximum number of configuration attributes of one request (gpio.h).
GPIO_V2_LINE_NUM_ATTRS_MAX = 10

#: enum gpio_v2_line_flag: line active state is physical low.
GPIO_V2_LINE_FLAG_ACTIVE_LOW = 1 << 1
#: enum gpio_v2_line_flag: line is an input.
GPIO_V2_LINE_FLAG_INPUT = 1 << 2
#: enum gpio_v2_line_flag: line is an output.
GPIO_V2_LINE_FLAG_OUTPUT = 1 << 3
#: enum gpio_v2_line_attr_id: the attribute's ``values`` member is in use.
GPIO_V2_LINE_ATTR_ID_OUTPUT_VALUES = 2

#: Consumer label the kernel shows for our line (e.g. in ``gpioinfo``).
CONSUMER = "spinflip"


class GpioChipInfo(ctypes.Structure):
    """``struct gpiochip_info`` (68 bytes)."""

    _fields_ = [
        ("name", ctypes.c_char * GPIO_MAX_NAME_SIZE),
        ("label", ctypes.c_char * GPIO_MAX_NAME_SIZE),
        ("lines", ctypes.c_uint32),
    ]


class _GpioV2LineAttributeValue(ctypes.Union):
    """The anonymous union of ``struct gpio_v2_line_attribute`` (8 bytes)."""

    _fields_ = [
        ("flags", ctypes.c_uint64),
        ("values", ctypes.c_uint64),
        ("debounce_period_us", ctypes.c_uint32),
    ]


class GpioV2LineAttribute(ctypes.Structure):
    """``struct gpio_v2_line_attribute`` (16 bytes)."""

    _anonymous_ = ("u",)
    _fields_ = [
        ("id", ctypes.c_uint32),
        ("padding", ctypes.c_uint32),
        ("u", _GpioV2LineAttributeValue),
    ]


class GpioV2LineConfigAttribute(ctypes.Structure):
    """``struct gpio_v2_line_config_attribute`` (24 bytes)."""

    _fields_ = [
        ("attr", GpioV2LineAttribute),
        ("mask", ctypes.c_uint64),
    ]


class GpioV2LineConfig(ctypes.Structure):
    """``struct gpio_v2_line_config`` (272 bytes)."""

    _fields_ = [
        ("flags", ctypes.c_uint64),
        ("num_attrs", ctypes.c_uint32),
        ("padding", ctypes.c_uint32 * 5),
        ("attrs", GpioV2LineConfigAttribute * GPIO_V2_LINE_NUM_ATTRS_MAX),
    ]


class GpioV2LineRequest(ctypes.Structure):
    """``struct gpio_v2_line_request`` (592 bytes)."""

    _fields_ = [
        ("offsets", ctypes.c_uint32 * GPIO_V2_LINES_MAX),
        ("consumer", ctypes.c_char * GPIO_MAX_NAME_SIZE),
        ("config", GpioV2LineConfig),
        ("num_lines", ctypes.c_uint32),
        ("event_buffer_size", ctypes.c_uint32),
        ("padding", ctypes.c_uint32 * 5),
        ("fd", ctypes.c_int32),
    ]


class GpioV2LineValues(ctypes.Structure):
    """``struct gpio_v2_line_values`` (16 bytes)."""

    _fields_ = [
        ("bits", ctypes.c_uint64),
        ("mask", ctypes.c_uint64),
    ]


# asm-generic/ioctl.h: 8 number bits, 8 type bits, 14 size bits, 2 direction bits.
_IOC_NRSHIFT = 0
_IOC_TYPESHIFT = 8
_IOC_SIZESHIFT = 16
_IOC_DIRSHIFT = 30
_IOC_WRITE = 1
_IOC_READ = 2


def _ioc(direction: int, ioc_type: int, nr: int, size_bytes: int) -> int:
    """``_IOC(dir, type, nr, size) = dir << 30 | size << 16 | type << 8 | nr``."""
    if not 0 <= size_bytes < 1 << 14:
        raise ValueError(f"ioctl argument size {size_bytes} bytes does not fit in 14 bits")
    return (direction << _IOC_DIRSHIFT | size_bytes << _IOC_SIZESHIFT
            | ioc_type << _IOC_TYPESHIFT | nr << _IOC_NRSHIFT)


#: _IOR(0xB4, 0x01, struct gpiochip_info)
GPIO_GET_CHIPINFO_IOCTL = _ioc(_IOC_READ, 0xB4, 0x01, ctypes.sizeof(GpioChipInfo))
#: _IOWR(0xB4, 0x07, struct gpio_v2_line_request)
GPIO_V2_GET_LINE_IOCTL = _ioc(_IOC_READ | _IOC_WRITE, 0xB4, 0x07, ctypes.sizeof(GpioV2LineRequest))
#: _IOWR(0xB4, 0x0F, struct gpio_v2_line_values)
GPIO_V2_LINE_SET_VALUES_IOCTL = _ioc(_IOC_READ | _IOC_WRITE, 0xB4, 0x0F,
                                     ctypes.sizeof(GpioV2LineValues))

#: ``ioctl(fd, request, arg, mutate_flag)`` as :func:`fcntl.ioctl`.
IoctlFunc = Callable[..., int]
#: ``open(path, flags) -> fd`` as :func:`os.open`.
OpenFunc = Callable[[str, int], int]


class GpioError(OSError):
    """A GPIO chip or line that cannot be used; ``str()`` is one line saying what and why.

    ``errno`` holds the system error number when there is one.
    """

    def __init__(self, code: int | None, message: str):
        super().__init__(code, message)
        self.message = message

    def __str__(self) -> str:
        return self.message


def _errno_name(code: int | None) -> str:
    return errno.errorcode.get(code, str(code)) if code is not None else "no errno"


def _permission_hint(chip_path: str) -> str:
    """Who owns the chip device, and what to change so the daemon's user may open it."""
    try:
        st = os.stat(chip_path)
    except OSError:
        return ("give the daemon's user read-write access to it (group membership or a udev "
                "rule)")
    try:
        group = grp.getgrgid(st.st_gid).gr_name
    except KeyError:
        group = str(st.st_gid)
    mode = stat.S_IMODE(st.st_mode)
    where = f"group '{group}', mode {mode:04o}"
    if mode & 0o060 == 0o060 and st.st_gid != 0:
        return (f"{where}: add the daemon's user to group '{group}' "
                f"(sudo usermod -aG {group} USER) and restart the daemon")
    return (f"{where}: give the chips to a group with a udev rule (SUBSYSTEM==\"gpio\", "
            f"KERNEL==\"gpiochip*\", GROUP=\"gpio\", MODE=\"0660\"), add the daemon's user to "
            "that group and restart the daemon")


class GpioOutputLine:
    """One GPIO line requested as an output through ``/dev/gpiochipN`` (uAPI v2).

    Parameters
    ----------
    chip_path : str
        The chip's character device, e.g. ``"/dev/gpiochip0"``.
    line_offset : int
        The line's offset on that chip (not a global GPIO number), >= 0.
    active_low : bool
        The load is on when the pin is physically low; the kernel inverts the line.
    consumer : str
        Label the kernel shows as the line's user, printable ASCII of at most 31 characters.
    ioctl : callable
        ``ioctl(fd, request, arg, mutate_flag)``; :func:`fcntl.ioctl` unless a test injects
        a fake.
    opener : callable
        ``opener(path, flags) -> fd``; :func:`os.open` unless a test injects a fake.

    Notes
    -----
    The line is driven inactive (logical 0) as part of the request itself, through a
    ``GPIO_V2_LINE_ATTR_ID_OUTPUT_VALUES`` attribute with value 0, so it never glitches on.
    What the pin does once released (``close``) is up to the chip driver: it may hold the last
    level or float. Hardware that must stay off at boot and after a crash needs a pull resistor
    to the inactive level (common practice).
    """

    def __init__(self, chip_path: str, line_offset: int, active_low: bool = False,
                 consumer: str = CONSUMER, ioctl: IoctlFunc = fcntl.ioctl,
                 opener: OpenFunc = os.open):
        if isinstance(line_offset, bool) or not isinstance(line_offset, int) \
                or not 0 <= line_offset < 1 << 32:
            raise ValueError(f"GPIO line offset {line_offset!r}: expected an integer >= 0")
        if not (consumer.isascii() and consumer.isprintable()) or len(consumer) >= GPIO_MAX_NAME_SIZE:
            raise ValueError(f"GPIO consumer label {consumer!r}: expected printable ASCII of at "
                             f"most {GPIO_MAX_NAME_SIZE - 1} characters")
        self.chip_path = str(chip_path)
        self.line_offset = line_offset
        self.active_low = bool(active_low)
        self.consumer = consumer
        self._ioctl = ioctl
        self._opener = opener
        self._line_fd: int | None = None

    @property
    def is_open(self) -> bool:
        """Whether the line is currently requested (held) by us."""
        return self._line_fd is not None

    def _where(self) -> str:
        return f"line {self.line_offset} of {self.chip_path}"

    def _open_chip(self) -> int:
        path = self.chip_path
        try:
            return self._opener(path, os.O_RDWR | os.O_CLOEXEC | os.O_NONBLOCK)
        except FileNotFoundError as exc:
            raise GpioError(exc.errno, f"GPIO chip {path} not found: check the path "
                            "(ls /dev/gpiochip*) and that the chip's driver is loaded") from None
        except PermissionError as exc:
            raise GpioError(exc.errno, f"permission denied opening GPIO chip {path} "
                            f"({_permission_hint(path)})") from None
        except IsADirectoryError as exc:
            raise GpioError(exc.errno, f"{path} is a directory, not a GPIO chip device "
                            "(expected /dev/gpiochipN)") from None
        except OSError as exc:
            raise GpioError(exc.errno, f"cannot open GPIO chip {path}: {exc.strerror} "
                            f"({_errno_name(exc.errno)})") from None

    def _chip_info(self, chip_fd: int) -> GpioChipInfo:
        info = GpioChipInfo()
        try:
            self._ioctl(chip_fd, GPIO_GET_CHIPINFO_IOCTL, info, True)
        except OSError as exc:
            if exc.errno in (errno.ENOTTY, errno.EINVAL):
                raise GpioError(exc.errno, f"{self.chip_path} is not a GPIO chip (the kernel "
                                f"answered {_errno_name(exc.errno)} to the chip-info request): "
                                "expected a /dev/gpiochipN device") from None
            raise GpioError(exc.errno, f"reading chip info of {self.chip_path} failed: "
                            f"{exc.strerror} ({_errno_name(exc.errno)})") from None
        return info

    def _request(self, chip_fd: int) -> int:
        req = GpioV2LineRequest()
        req.offsets[0] = self.line_offset
        req.consumer = self.consumer.encode("ascii")
        req.config.flags = GPIO_V2_LINE_FLAG_OUTPUT | (
            GPIO_V2_LINE_FLAG_ACTIVE_LOW if self.active_low else 0)
        # one attribute: output value 0 (inactive) for the line at index 0 of offsets
        req.config.num_attrs = 1
        req.config.attrs[0].attr.id = GPIO_V2_LINE_ATTR_ID_OUTPUT_VALUES
        req.config.attrs[0].attr.values = 0
        req.config.attrs[0].mask = 1 << 0
        req.num_lines = 1
        try:
            self._ioctl(chip_fd, GPIO_V2_GET_LINE_IOCTL, req, True)
        except OSError as exc:
            code = exc.errno
            if code == errno.EBUSY:
                msg = (f"{self._where()} is busy: another program or a kernel driver holds it "
                       "(gpioinfo shows its consumer)")
            elif code == errno.EINVAL:
                msg = (f"the kernel refused {self._where()} as an output (EINVAL): offset out "
                       "of range or flags not supported by the chip")
            elif code in (errno.EPERM, errno.EACCES):
                msg = (f"not allowed to request {self._where()} ({_errno_name(code)}): "
                       f"{_permission_hint(self.chip_path)}")
            elif code == errno.ENOTTY:
                msg = (f"{self.chip_path} does not support the GPIO v2 line request (ENOTTY): "
                       "the kernel is older than 5.10 or the device is not a GPIO chip")
            else:
                msg = (f"requesting {self._where()} failed: {exc.strerror} "
                       f"({_errno_name(code)})")
            raise GpioError(code, msg) from None
        # gpio.h: "zero or negative value means error"
        if req.fd <= 0:
            raise GpioError(None, f"requesting {self._where()} returned no file descriptor "
                            f"(fd = {req.fd})")
        return int(req.fd)

    def open(self) -> None:
        """Request the line as an output, driven inactive; raises :class:`GpioError`."""
        if self._line_fd is not None:
            return
        chip_fd = self._open_chip()
        try:
            info = self._chip_info(chip_fd)
            if self.line_offset >= info.lines:
                label = info.label.decode("ascii", "replace") or info.name.decode("ascii", "replace")
                span = f"offsets 0-{info.lines - 1}" if info.lines else "no lines"
                raise GpioError(errno.EINVAL, f"line offset {self.line_offset} is out of range "
                                f"for {self.chip_path} ('{label}' has {info.lines} lines: {span})")
            self._line_fd = self._request(chip_fd)
        finally:
            os.close(chip_fd)

    def set(self, active: bool) -> None:
        """Drive the line active (True) or inactive (False); raises :class:`GpioError`.

        Logical value: with ``active_low`` the kernel makes active a physical low.
        """
        if self._line_fd is None:
            raise GpioError(errno.EBADF, f"{self._where()} is not open")
        # bit i of bits/mask is line offsets[i] of the request; we hold one line: bit 0
        values = GpioV2LineValues(bits=1 if active else 0, mask=1)
        try:
            self._ioctl(self._line_fd, GPIO_V2_LINE_SET_VALUES_IOCTL, values, True)
        except OSError as exc:
            hint = ": the chip has gone (unplugged?)" if exc.errno == errno.ENODEV else ""
            raise GpioError(exc.errno, f"setting {self._where()} "
                            f"{'active' if active else 'inactive'} failed: {exc.strerror} "
                            f"({_errno_name(exc.errno)}){hint}") from None

    def close(self) -> None:
        """Release the line (close its file descriptor). Never raises; safe to call twice."""
        fd, self._line_fd = self._line_fd, None
        if fd is not None:
            try:
                os.close(fd)
            except OSError:
                pass

    def __enter__(self) -> GpioOutputLine:
        self.open()
        return self

    def __exit__(self, *exc_info: object) -> None:
        self.close()
