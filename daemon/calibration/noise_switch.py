"""The switch of the calibration noise source: none, a pair of shell commands, or a GPIO line.

The daemon measures the system temperature by turning the noise source (a noise diode coupled
in before the LNA) on and off. How it is switched comes from the ``[calibration]`` section:

    ``switch``            ``"none"`` | ``"command"`` | ``"gpio"``
    ``switch_on_cmd``     shell command that turns the source on  (``"command"``)
    ``switch_off_cmd``    shell command that turns the source off (``"command"``)
    ``switch_timeout_s``  longest a command may run, s (``"command"``)
    ``gpio_chip``         chip device, e.g. ``"/dev/gpiochip0"`` (``"gpio"``)
    ``gpio_line``         line offset on that chip (``"gpio"``)
    ``gpio_active_low``   the source is on when the pin is low (``"gpio"``)

Every switch has the same interface: ``open()``, ``set(on)``, ``close()``, ``describe()``, and
the attributes ``kind``, ``state`` and ``can_switch``. A switch that fails raises
:class:`NoiseSwitchError` with one line naming the switch and what failed, and forgets its state
(``state = None``): samples taken while the state is unknown must go neither into spectra nor
into a system-temperature measurement, so a broken switch is an error the observer sees, never
a silently wrong Tsys. ``close()`` turns the source off if it can and never raises.

A command runs as ``/bin/sh -c CMD`` with the environment variable ``SPINFLIP_CAL`` set to
``on`` or ``off``, stdin from ``/dev/null`` and its output captured; a non-zero exit status is a
failure. On timeout the command's whole process group is killed, so a hung relay tool cannot
switch the source later behind the daemon's back.

References
----------
Linux kernel, Documentation/userspace-api/gpio/chardev.rst (GPIO character device, see
:mod:`spinflip.daemon.calibration.gpio_cdev`).
Python standard library, :mod:`subprocess` (``Popen.communicate`` with a timeout).
"""

from __future__ import annotations

import fcntl
import logging
import math
import os
import signal
import subprocess
import threading

from spinflip.daemon.calibration.gpio_cdev import (
    GpioError,
    GpioOutputLine,
    IoctlFunc,
    OpenFunc,
)
from spinflip.daemon.config import ConfigError
from spinflip.daemon.error_line import one_line

log = logging.getLogger("spinflip.noise_switch")

#: Switch kinds accepted in ``calibration.switch``.
SWITCH_KINDS = ("none", "command", "gpio")
#: Longest allowed ``calibration.switch_timeout_s``, s.
MAX_SWITCH_TIMEOUT_S = 60.0
#: Values used for keys missing from the ``[calibration]`` section.
DEFAULTS = {
    "switch": "none",
    "switch_on_cmd": "",
    "switch_off_cmd": "",
    "switch_timeout_s": 5.0,
    "gpio_chip": "/dev/gpiochip0",
    "gpio_line": -1,                     # not given
    "gpio_active_low": False,
}
#: Longest ``describe()`` text: a FITS string value on one card, 80 columns minus 10 for keyword
#: and value indicator and 2 for the quotes (FITS standard 4.0, section 4.2.1.1, from memory).
DESCRIBE_MAX_CHARS = 68
#: Longest command text quoted in an error message, characters.
_QUOTE_MAX_CHARS = 60
#: How long to wait for the pipes of a killed command to close, s.
_REAP_TIMEOUT_S = 2.0


class NoiseSwitchError(RuntimeError):
    """The noise source could not be switched; the message is one line naming switch and cause."""


def _fits_text(text: str) -> str:
    """Printable ASCII (others become ``?``) of at most :data:`DESCRIBE_MAX_CHARS` characters."""
    ascii_text = "".join(c if c.isascii() and c.isprintable() else "?" for c in text)
    return ascii_text[:DESCRIBE_MAX_CHARS]


class NoiseSwitch:
    """Interface of a noise-source switch (the base class does nothing).

    Attributes
    ----------
    kind : str
        ``"none"``, ``"command"`` or ``"gpio"``.
    state : bool or None
        Last state commanded successfully; None before ``open()`` and after a failure.
    can_switch : bool
        False for ``"none"``: the source cannot be turned on.
    """

    kind = "none"
    can_switch = False

    def __init__(self) -> None:
        self.state: bool | None = None
        self._lock = threading.Lock()

    def open(self) -> None:
        """Make the switch ready and turn the source off; raises :class:`NoiseSwitchError`."""

    def set(self, on: bool) -> None:
        """Turn the source on (True) or off (False); raises :class:`NoiseSwitchError`."""
        raise NotImplementedError

    def close(self) -> None:
        """Turn the source off if possible and release the switch; never raises."""

    def describe(self) -> str:
        """The switch for a FITS header: printable ASCII, at most 68 characters."""
        return _fits_text(self.kind)

    def _error(self, what: str) -> NoiseSwitchError:
        return NoiseSwitchError(f"noise switch {self.describe()}: {what}")

    def __enter__(self) -> NoiseSwitch:
        self.open()
        return self

    def __exit__(self, *exc_info) -> None:
        self.close()


class NoNoiseSwitch(NoiseSwitch):
    """No switch configured: the source cannot be turned on; turning it off does nothing."""

    kind = "none"
    can_switch = False

    def set(self, on: bool) -> None:
        if on:
            raise NoiseSwitchError(
                "no noise-source switch configured (calibration.switch = 'none'): cannot turn "
                "the noise source on; set calibration.switch to 'command' or 'gpio'")


class CommandNoiseSwitch(NoiseSwitch):
    """The source switched by two shell commands.

    Parameters
    ----------
    on_cmd, off_cmd : str
        Shell commands (run by ``/bin/sh -c``) that turn the source on and off.
    timeout_s : float
        Longest a command may run, s; after it the command's process group is killed.
    """

    kind = "command"
    can_switch = True

    def __init__(self, on_cmd: str, off_cmd: str, timeout_s: float = DEFAULTS["switch_timeout_s"]):
        super().__init__()
        self.on_cmd = on_cmd
        self.off_cmd = off_cmd
        self.timeout_s = float(timeout_s)
        self._opened = False

    def _run(self, on: bool) -> None:
        word = "on" if on else "off"
        cmd = self.on_cmd if on else self.off_cmd
        quoted = one_line(cmd, _QUOTE_MAX_CHARS)
        env = dict(os.environ, SPINFLIP_CAL=word)
        try:
            # own session = own process group, so a timeout kills the shell and its children
            proc = subprocess.Popen(cmd, shell=True, env=env, stdin=subprocess.DEVNULL,
                                    stdout=subprocess.PIPE, stderr=subprocess.PIPE, text=True,
                                    errors="replace", start_new_session=True)
        except OSError as exc:
            raise self._error(f"turning the source {word} failed: cannot start `{quoted}`: "
                              f"{exc.strerror}") from None
        try:
            _, err = proc.communicate(timeout=self.timeout_s)
        except subprocess.TimeoutExpired:
            _kill_group(proc)
            raise self._error(f"turning the source {word} failed: `{quoted}` did not finish "
                              f"within {self.timeout_s:g} s (calibration.switch_timeout_s) and "
                              "was killed") from None
        if proc.returncode != 0:
            lines = [ln.strip() for ln in (err or "").splitlines() if ln.strip()]
            last = one_line(lines[-1], 120) if lines else "(nothing on stderr)"
            if proc.returncode < 0:
                how = f"was killed by signal {-proc.returncode}"
            else:
                how = f"exited with code {proc.returncode}"
            raise self._error(f"turning the source {word} failed: `{quoted}` {how}: {last}")

    def open(self) -> None:
        """Run the off command once, so the source starts in a known state."""
        with self._lock:
            self._opened = True
            self.state = None
            self._run(False)
            self.state = False

    def set(self, on: bool) -> None:
        on = bool(on)
        with self._lock:
            if not self._opened:
                raise self._error("set() called before open()")
            self.state = None
            self._run(on)
            self.state = on

    def close(self) -> None:
        with self._lock:
            if not self._opened:
                return
            self._opened = False
            try:
                self._run(False)
                self.state = False
            except NoiseSwitchError as exc:
                self.state = None
                log.warning("%s", exc)


def _kill_group(proc: subprocess.Popen) -> None:
    """SIGKILL the process group of ``proc`` (its own session) and reap it."""
    try:
        os.killpg(proc.pid, signal.SIGKILL)
    except OSError:
        proc.kill()
    try:
        # the pipes close once every process of the group has died
        proc.communicate(timeout=_REAP_TIMEOUT_S)
    except subprocess.TimeoutExpired:
        # something left the group holding our pipes; stop reading and reap the shell
        for pipe in (proc.stdout, proc.stderr):
            if pipe is not None:
                pipe.close()
        proc.wait()


class GpioNoiseSwitch(NoiseSwitch):
    """The source switched by a GPIO output line (Linux GPIO character device, uAPI v2).

    Parameters
    ----------
    chip_path : str
        Chip device, e.g. ``"/dev/gpiochip0"``.
    line_offset : int
        Line offset on that chip.
    active_low : bool
        The source is on when the pin is physically low.
    ioctl, opener : callable
        Passed to :class:`~spinflip.daemon.calibration.gpio_cdev.GpioOutputLine` (fakes in tests).
    """

    kind = "gpio"
    can_switch = True

    def __init__(self, chip_path: str, line_offset: int, active_low: bool = False,
                 ioctl: IoctlFunc = fcntl.ioctl, opener: OpenFunc = os.open):
        super().__init__()
        self.line = GpioOutputLine(chip_path, line_offset, active_low, ioctl=ioctl, opener=opener)

    def describe(self) -> str:
        low = " active-low" if self.line.active_low else ""
        return _fits_text(f"gpio {self.line.chip_path} line {self.line.line_offset}{low}")

    def open(self) -> None:
        """Request the line as an output and drive it inactive (source off)."""
        with self._lock:
            self.state = None
            try:
                self.line.open()
                self.line.set(False)
            except GpioError as exc:
                self.line.close()
                raise self._error(str(exc)) from None
            self.state = False

    def set(self, on: bool) -> None:
        on = bool(on)
        with self._lock:
            if not self.line.is_open:
                raise self._error("set() called before open()")
            self.state = None
            try:
                self.line.set(on)
            except GpioError as exc:
                raise self._error(str(exc)) from None
            self.state = on

    def close(self) -> None:
        with self._lock:
            if not self.line.is_open:
                return
            try:
                self.line.set(False)
                self.state = False
            except GpioError as exc:
                self.state = None
                log.warning("%s", self._error(f"turning the source off on close failed: {exc}"))
            finally:
                self.line.close()


def _text_key(cal: dict, key: str, needed_for: str) -> str:
    value = cal.get(key, DEFAULTS[key])
    if not isinstance(value, str):
        raise ConfigError(f"config calibration.{key} = {value!r}: expected a string ({needed_for})")
    if not value.strip():
        raise ConfigError(f"config calibration.{key} is empty: calibration.switch = "
                          f"{cal.get('switch')!r} needs {needed_for}")
    return value


def make_noise_switch(cal_cfg: dict) -> NoiseSwitch:
    """Build the noise-source switch that the ``[calibration]`` section asks for.

    Parameters
    ----------
    cal_cfg : dict
        The ``[calibration]`` section; keys missing from it take :data:`DEFAULTS`, keys of other
        features (``tsys_k``, ...) are ignored.

    Returns
    -------
    NoiseSwitch
        Not yet opened: call ``open()`` (or use it as a context manager) before ``set()``.

    Raises
    ------
    ConfigError
        (a ``ValueError``) with one line naming the key, its value and what is allowed.
    """
    kind = cal_cfg.get("switch", DEFAULTS["switch"])
    if kind not in SWITCH_KINDS:
        raise ConfigError(f"config calibration.switch = {kind!r}: expected one of "
                          + ", ".join(repr(k) for k in SWITCH_KINDS))
    if kind == "none":
        return NoNoiseSwitch()
    if kind == "command":
        on_cmd = _text_key(cal_cfg, "switch_on_cmd", "a command to turn the noise source on")
        off_cmd = _text_key(cal_cfg, "switch_off_cmd", "a command to turn the noise source off")
        timeout_s = cal_cfg.get("switch_timeout_s", DEFAULTS["switch_timeout_s"])
        if isinstance(timeout_s, bool) or not isinstance(timeout_s, (int, float)) \
                or not math.isfinite(timeout_s) or not 0 < timeout_s <= MAX_SWITCH_TIMEOUT_S:
            raise ConfigError(f"config calibration.switch_timeout_s = {timeout_s!r}: expected a "
                              f"number of seconds above 0 and at most {MAX_SWITCH_TIMEOUT_S:g}")
        return CommandNoiseSwitch(on_cmd, off_cmd, float(timeout_s))
    chip = _text_key(cal_cfg, "gpio_chip", "the GPIO chip device, e.g. '/dev/gpiochip0'")
    line = cal_cfg.get("gpio_line", DEFAULTS["gpio_line"])
    if line is None or (type(line) is int and line == -1):   # -1: the schema's "not given"
        raise ConfigError("config calibration.gpio_line is not set: calibration.switch = 'gpio' "
                          "needs the line offset on the chip that drives the noise source")
    if isinstance(line, bool) or not isinstance(line, int) or not 0 <= line < 1 << 32:
        raise ConfigError(f"config calibration.gpio_line = {line!r}: expected a line offset on "
                          "the chip, an integer >= 0")
    active_low = cal_cfg.get("gpio_active_low", DEFAULTS["gpio_active_low"])
    if not isinstance(active_low, bool):
        raise ConfigError(f"config calibration.gpio_active_low = {active_low!r}: expected true "
                          "or false")
    return GpioNoiseSwitch(chip, line, active_low)
