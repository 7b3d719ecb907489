"""The USB dongle (RTL2832U + tuner) through pyrtlsdr's ctypes binding of librtlsdr.

Samples are read with librtlsdr's asynchronous interface (a ring of USB transfers kept in
flight), in a thread of our own: the callback only copies each transfer into a preallocated
ring of buffers and returns. A synchronous read loop loses samples in the gaps between calls.
The dongle does not report lost samples, so they are estimated two ways and the larger is
taken: ring overruns (the consumer fell behind), and bytes received against elapsed
wall-clock time times the sample rate (USB dropped transfers).

The switching schedule retunes between blocks; samples of a transfer already in flight at a
retune belong to the old LO, which the settle blanking (``switching.settle_s``) discards.
"""

from __future__ import annotations

import threading
import time as _time
from pathlib import Path

import numpy as np

from .block import Block
from .cal_control import CalControl
from .sources import SourceError
from .switching import Schedule

_TRANSFER_BYTES = 262144          # per USB transfer (a multiple of 512 as librtlsdr requires)
_RING_TRANSFERS = 64              # about 3.5 s at 2.4 MS/s
_DVB_MODULES = ("dvb_usb_rtl28xxu", "rtl2832_sdr", "rtl2832", "rtl2830")


def _dvb_driver_loaded(sys_module: Path = Path("/sys/module")) -> str | None:
    for name in _DVB_MODULES:
        if (sys_module / name).exists():
            return name
    return None


def _import_rtlsdr():
    try:
        import rtlsdr  # noqa: F401  (pyrtlsdr loads librtlsdr with ctypes at import)
        from rtlsdr import RtlSdr
    except (ImportError, OSError) as exc:
        raise SourceError(f"librtlsdr not found ({exc}): install it with "
                          "'sudo apt-get install librtlsdr0' (Debian / Raspberry Pi OS)") from None
    return RtlSdr


class RtlSdrSource:
    kind = "rtlsdr"

    def __init__(self, cfg: dict):
        self.cfg = cfg
        src = cfg["source"]
        self.fs = src["sample_rate"]
        self.block_samples = src["block_samples"]
        self.schedule = Schedule.from_config(cfg)
        self.cal = CalControl()   # the pipeline gives it the configured switch and its events
        self.forced_cal = None    # True / False: held there (hot/cold procedure), not scheduled
        self.fire_now = False     # set by a control command: an extra firing as soon as possible
        self._extra_from = None
        self._cal_wanted = False  # noise-source state of the previous block
        self.sdr = None
        self._ring = np.zeros((_RING_TRANSFERS, _TRANSFER_BYTES), dtype=np.uint8)
        self._ring_len = np.zeros(_RING_TRANSFERS, dtype=np.int64)
        self._write = 0          # transfers written by the callback (monotonic count)
        self._read = 0           # transfers consumed
        self._overrun_bytes = 0
        self._lock = threading.Condition()
        self._thread = None
        self._error = None
        self._pending = np.zeros(0, dtype=np.uint8)
        self._index = 0
        self._lost_reported = 0

    # -- opening the device ----------------------------------------------------------------
    def open(self) -> None:
        RtlSdr = _import_rtlsdr()
        src = self.cfg["source"]
        dev = src["device"]
        try:
            if dev.isdigit():
                index = int(dev)
            else:
                index = RtlSdr.get_device_index_by_serial(dev)
            self.sdr = RtlSdr(device_index=index)
        except Exception as exc:  # pyrtlsdr raises LibUSBError / IOError with librtlsdr's code
            held = _dvb_driver_loaded()
            if held:
                raise SourceError(f"dongle busy: the kernel's DVB driver {held} holds it: run "
                                  f"'sudo rmmod {held}' and install hardware/blacklist-rtl-dvb.conf "
                                  "in /etc/modprobe.d/") from None
            raise SourceError(f"no RTL-SDR dongle {dev!r} found ({exc}): check the USB cable, "
                              "'lsusb', and the udev rule hardware/20-rtlsdr.rules") from None
        sdr = self.sdr
        sdr.sample_rate = self.fs
        if src["ppm"]:
            sdr.freq_correction = src["ppm"]
        sdr.center_freq = self.schedule.lo_of("sig")
        sdr.gain = src["gain"]             # a number sets manual gain (AGC off) in pyrtlsdr
        if hasattr(sdr, "set_agc_mode"):
            sdr.set_agc_mode(False)
        if hasattr(sdr, "set_bias_tee"):
            sdr.set_bias_tee(bool(src["bias_tee"]))
        elif src["bias_tee"]:
            raise SourceError("source.bias_tee = true but this pyrtlsdr/librtlsdr has no bias-tee call")
        self._lo = self.schedule.lo_of("sig")
        self._t0_wall = _time.time()
        self._t0_mono = _time.monotonic()
        self._received = 0
        self._thread = threading.Thread(target=self._reader, name="rtlsdr-async", daemon=True)
        self._thread.start()

    def _reader(self) -> None:
        try:
            self.sdr.read_bytes_async(self._callback, _TRANSFER_BYTES)
        except Exception as exc:  # device unplugged and the like
            self._error = exc
        with self._lock:
            self._lock.notify_all()

    def _callback(self, buf, _context) -> None:
        """Copy one USB transfer into the ring; never blocks."""
        data = np.ctypeslib.as_array(buf) if not isinstance(buf, (bytes, bytearray)) else \
            np.frombuffer(buf, dtype=np.uint8)
        with self._lock:
            if self._write - self._read >= _RING_TRANSFERS:
                self._overrun_bytes += data.size   # consumer behind: drop, count
            else:
                slot = self._write % _RING_TRANSFERS
                n = min(data.size, _TRANSFER_BYTES)
                self._ring[slot, :n] = data[:n]
                self._ring_len[slot] = n
                self._write += 1
            self._received += data.size
            self._lock.notify()

    # -- the Source interface --------------------------------------------------------------
    def set_cal(self, on: bool | None) -> None:
        """Hold the noise source on or off (True / False), or back to the schedule (None)."""
        self.forced_cal = None if on is None else bool(on)

    def lost_samples_estimate(self) -> int:
        """max(ring overruns, wall-clock expectation minus bytes received), in samples."""
        expected = (_time.monotonic() - self._t0_mono) * self.fs
        shortfall = expected - self._received / 2 - 2 * _TRANSFER_BYTES  # allow transfers in flight
        return int(max(self._overrun_bytes / 2, shortfall, 0))

    def _next_transfer(self, timeout_s: float = 3.0) -> np.ndarray:
        with self._lock:
            end = _time.monotonic() + timeout_s
            while self._read >= self._write:
                if self._error is not None or (self._thread and not self._thread.is_alive()):
                    raise SourceError(f"dongle stopped delivering samples ({self._error})")
                if not self._lock.wait(timeout=max(0.0, end - _time.monotonic())):
                    raise SourceError("dongle delivered no samples for 3 s (unplugged?)")
            slot = self._read % _RING_TRANSFERS
            out = self._ring[slot, : self._ring_len[slot]].copy()
            self._read += 1
            return out

    def read(self) -> Block:
        i = self._index
        self._index += 1
        sch = self.schedule
        phase = sch.phase_of_block(i)
        hop = sch.is_hop(i)
        lo = sch.lo_of(phase)
        if self.fire_now:
            self.fire_now, self._extra_from = False, i
        wanted = sch.cal_on(i, self._extra_from) if self.forced_cal is None else self.forced_cal
        switched = wanted != self._cal_wanted
        self._cal_wanted = wanted
        cal_state = self.cal.state_for(wanted)
        if lo != self._lo:
            self.sdr.center_freq = lo
            self._lo = lo
            self._pending = self._pending[:0]     # leftover samples of the old LO
        elif switched:
            self._pending = self._pending[:0]     # samples from before the noise source changed
        need = 2 * self.block_samples
        parts, have = [self._pending], self._pending.size
        while have < need:
            t = self._next_transfer()
            parts.append(t)
            have += t.size
        raw = np.concatenate(parts)
        self._pending = raw[need:]
        raw = raw[:need]
        lost = self.lost_samples_estimate()
        new_lost, self._lost_reported = lost - self._lost_reported, lost
        t0 = self._t0_wall + (self._received - have) / 2 / self.fs
        settle = sch.settle_samples if (hop or switched) else 0
        return Block(raw=raw, lo_hz=lo, sample_rate=self.fs, t0_unix_s=t0, phase=phase,
                     cal_on=cal_state, lost_before=max(0, new_lost), settle_samples=settle, index=i)

    def close(self) -> None:
        if self.sdr is not None:
            try:
                self.sdr.cancel_read_async()
            except Exception:
                pass
            if self._thread:
                self._thread.join(timeout=2)
            try:
                self.sdr.close()
            except Exception:
                pass
            self.sdr = None
