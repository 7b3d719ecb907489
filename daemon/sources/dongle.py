"""The USB dongle (RTL2832U + tuner) through pyrtlsdr's ctypes binding of librtlsdr.

Samples are read with librtlsdr's asynchronous interface (a ring of USB transfers kept in
flight), in a thread of our own: the callback stamps each transfer's arrival on the monotonic
clock, copies it into a preallocated ring of buffers and returns. A synchronous read loop loses
samples in the gaps between calls.

Where pyrtlsdr's ``RtlSdr`` is the real one, reads and retunes go to its librtlsdr functions
directly (``rtlsdr_read_async``, ``rtlsdr_set_center_freq``) rather than through its methods,
which close the device themselves on any error: a close while the read thread is still
streaming blocks in librtlsdr until the stream ends, and a later cancel or close on the
freed handle is a use-after-free. Here the device is closed once, by :meth:`close`, after its
stream has ended.

Timestamps
----------
A transfer's last sample was taken just before it arrived (USB latency aside), so with
``a_k`` its arrival (monotonic, s), ``n_k`` its complex samples and ``fs`` the sample rate,
sample ``j`` of it (0-based) was taken at ``a_k - (n_k - j) / fs``. A block's
``t0_unix_s = clock.time_of(a_k - (n_k - j0) / fs)`` with ``j0`` its first sample, through
:class:`~spinflip.daemon.sources.sample_clock.SampleClock` (monotonic, anchored to the system clock at
open). Late stamps (the callback waiting for the interpreter) can only make a block look
later; ``t0`` is never put before the end of the previous block, so timestamps never decrease.

Lost samples
------------
The dongle does not report lost samples, so they are estimated two ways and the larger is
taken: ring overruns (the consumer fell behind), and samples received against monotonic time
since the first transfer began, times the sample rate (USB dropped transfers), less the
transfer being filled and ``_JITTER_S`` of delivery jitter. The time a dongle was gone is not
counted here: a :meth:`reopen` starts a new stream (the daemon reports the outage as events and
begins a new scan segment).

Retuning
--------
The switching schedule retunes between blocks. Samples already taken at the old LO (the rest
of the current transfer and the part of the next transfers taken before the retune, found from
their arrival stamps) are dropped; the settle blanking (``switching.settle_s``) then covers the
tuner's PLL settling. The same is done when the noise source changes state. A retune that fails
is tried once more; a second failure is a :class:`SourceError` naming the frequency.

Faults
------
An unplugged dongle ends librtlsdr's asynchronous read (it returns, with an error code or 0);
the next :meth:`read` then raises :class:`SourceError` as soon as the ring is empty, or after
``_STALL_S`` without a transfer when nothing returns. The pipeline calls :meth:`reopen`
(with its own back-off) until the dongle is back.

References
----------
librtlsdr ``rtl-sdr.h`` (osmocom): ``rtlsdr_read_async``'s buffer length must be a multiple
of 512; ``rtlsdr_close`` waits for asynchronous reads to end (from memory).
"""

from __future__ import annotations

import ctypes
import math
import threading
from collections.abc import Callable
from pathlib import Path
from typing import TYPE_CHECKING, Any

import numpy as np

from spinflip.daemon.calibration.noise_source import CalControl
from spinflip.daemon.dsp.block import Block
from spinflip.daemon.dsp.switching import Schedule
from spinflip.daemon.sources.base import FiresNoiseSource, SourceError, WallClock
from spinflip.daemon.sources.sample_clock import SampleClock

if TYPE_CHECKING:
    from astropy.coordinates import SkyCoord
    from astropy.time import Time

_TRANSFER_TARGET_S = 1.0 / 16     # aim for this much signal per USB transfer, s
_TRANSFER_QUANTUM_BYTES = 16384   # transfer sizes are multiples of this (and so of 512)
_TRANSFER_MAX_BYTES = 262144      # librtlsdr's default transfer (16 * 32 * 512 bytes)
_RING_S = 4.0                     # the ring holds at least this much signal, s
_STALL_S = 3.0                    # no transfer for this long: the dongle is taken as gone, s
_CANCEL_RETRY_S = 0.05            # close(): a cancel of a stream not started yet is repeated, s
_JITTER_S = 0.25                  # transfers may come this late before samples count as lost, s
_RETUNE_TRIES = 2                 # a failed retune is tried once more
#: Kernel modules of the DVB-T television driver that claim the RTL2832U (from memory).
DVB_MODULES = ("dvb_usb_rtl28xxu", "rtl2832_sdr", "rtl2832", "rtl2830")

#: libusb error names of the codes librtlsdr passes on (libusb.h, from memory).
_LIBUSB_ERRORS = {-1: "LIBUSB_ERROR_IO", -4: "LIBUSB_ERROR_NO_DEVICE",
                  -5: "LIBUSB_ERROR_NOT_FOUND", -6: "LIBUSB_ERROR_BUSY",
                  -7: "LIBUSB_ERROR_TIMEOUT", -9: "LIBUSB_ERROR_PIPE"}


def transfer_bytes_for(sample_rate: float) -> int:
    """Bytes per USB transfer for a sample rate: about ``_TRANSFER_TARGET_S`` of signal.

    Parameters
    ----------
    sample_rate : complex samples per second

    Returns
    -------
    int
        A multiple of 16384 bytes (so of librtlsdr's 512), from 16384 to 262144.

    Notes
    -----
    Each complex sample is 2 bytes (I, Q). Small transfers at low rates keep the latency of
    the first block and of fault detection short; at 2.4 MS/s this is librtlsdr's default.
    """
    n = round(2 * sample_rate * _TRANSFER_TARGET_S / _TRANSFER_QUANTUM_BYTES)
    return int(min(max(n, 1), _TRANSFER_MAX_BYTES // _TRANSFER_QUANTUM_BYTES)
               * _TRANSFER_QUANTUM_BYTES)


def _dvb_driver_loaded(sys_module: Path = Path("/sys/module")) -> str | None:
    for name in DVB_MODULES:
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


def _librtlsdr_of(sdr: Any) -> tuple[Any, Any] | None:
    """(librtlsdr ctypes library, callback type) behind pyrtlsdr's RtlSdr ``sdr``, or None
    for a stand-in that only offers RtlSdr's Python methods (as the tests' own does)."""
    if not hasattr(sdr, "dev_p"):
        return None
    try:
        from rtlsdr.librtlsdr import librtlsdr, rtlsdr_read_async_cb_t
    except (ImportError, OSError):
        return None
    return librtlsdr, rtlsdr_read_async_cb_t


def _describe_rc(rc: int) -> str:
    name = _LIBUSB_ERRORS.get(rc)
    return f"librtlsdr error {rc}" + (f" {name}" if name else "")


class RtlSdrSource(FiresNoiseSource, WallClock):
    """Blocks from an RTL-SDR dongle, read asynchronously into a ring of transfers.

    Parameters
    ----------
    cfg : dict, the configuration (``source``, ``switching``, ``spectrometer``,
        ``calibration`` sections are used)
    clock : SampleClock, optional
        Timestamps of the samples (tests pass one with a stepping system clock).

    Notes
    -----
    The Source interface (:class:`spinflip.daemon.sources.base.Source`): :meth:`open`,
    :meth:`read` -> Block, :meth:`close`, :meth:`set_cal`, ``schedule``, ``kind``, ``forced_cal``,
    the noise source (:meth:`attach_noise_source`, :meth:`request_firing`); and :meth:`reopen`
    after a :class:`SourceError`.
    """

    kind = "rtlsdr"

    def __init__(self, cfg: dict, clock: SampleClock | None = None):
        self.cfg = cfg
        src = cfg["source"]
        self.fs = src["sample_rate"]
        self.block_samples = src["block_samples"]
        self.schedule = Schedule.from_config(cfg)
        self.cal = CalControl()   # the pipeline gives it the configured switch and its events
        self.forced_cal: bool | None = None   # True / False: held there (hot/cold procedure), not scheduled
        self._fire = threading.Event()   # a control command: an extra firing as soon as possible
        self.t_start = None       # samples are dated by the clock as they come
        self.clock = clock or SampleClock()
        self._extra_from: int | None = None
        self._cal_wanted = False  # noise-source state of the previous block
        # pyrtlsdr has no type hints: its RtlSdr (or a test's stand-in), its ctypes library
        # and the C callback made from our method are Any
        self.sdr: Any | None = None
        self._lib: Any | None = None
        self._c_callback: Any | None = None
        self._abandoned: list[Any] = []   # devices whose stream would not stop (never closed)
        self._transfer_bytes = transfer_bytes_for(self.fs)
        ring_n = max(16, math.ceil(_RING_S * 2 * self.fs / self._transfer_bytes))
        self._ring = np.zeros((ring_n, self._transfer_bytes), dtype=np.uint8)
        self._ring_len = np.zeros(ring_n, dtype=np.int64)
        self._ring_arrival_s = np.zeros(ring_n, dtype=np.float64)   # monotonic
        self._lock = threading.Condition()
        self._thread: threading.Thread | None = None
        self._index = 0
        self._lo: float | None = None
        self._last_end_unix_s: float | None = None    # end of the last block delivered (across reopens)
        self._after_reopen = False
        self._reset_stream()

    def _reset_stream(self) -> None:
        """Forget the stream of a device (the reader thread is not running)."""
        self._write = 0                   # transfers written by the callback (monotonic count)
        self._read = 0                    # transfers consumed
        self._overrun_bytes = 0
        self._received_bytes = 0
        self._first_start_mono_s: float | None = None   # when the first transfer's first sample was taken
        self._ended = False               # the asynchronous read returned
        self._end_rc: int | None = None
        self._error: Exception | None = None
        self._stopping = False
        self._pending = np.zeros(0, dtype=np.uint8)
        self._pending_arrival_s = 0.0     # arrival of the transfer the pending bytes end
        self._cutoff_mono_s: float | None = None   # samples taken before this are dropped
        self._lost_reported = 0

    # -- opening the device ----------------------------------------------------------------
    def open(self) -> None:
        """Open and configure the dongle and start streaming.

        Raises
        ------
        SourceError
            librtlsdr missing, no such dongle, the DVB driver holding it, or a setting refused.
        """
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
            self.sdr = None
            held = _dvb_driver_loaded()
            if held:
                raise SourceError(f"dongle busy: the kernel's DVB driver {held} holds it: run "
                                  f"'sudo rmmod {held}' and install hardware/spinflip-blacklist-dvb.conf "
                                  "in /etc/modprobe.d/") from None
            raise SourceError(f"no RTL-SDR dongle {dev!r} found ({exc}): check the USB cable, "
                              "'lsusb', and the udev rule hardware/60-spinflip-dongle.rules") from None
        found = _librtlsdr_of(self.sdr)
        self._lib, cb_type = found if found else (None, None)
        try:
            self._configure(src)
        except SourceError:
            self._close_device()
            raise
        except Exception as exc:   # pyrtlsdr: LibUSBError / IOError on a refused setting
            self._close_device()
            raise SourceError(f"configuring the dongle failed: {exc}") from None
        self._reset_stream()
        self.clock.start()
        if self._lib is not None:
            assert cb_type is not None, "found together with the library"
            self._c_callback = cb_type(self._c_transfer)   # kept alive while streaming
        self._thread = threading.Thread(target=self._reader, name="rtlsdr-async", daemon=True)
        self._thread.start()

    def _configure(self, src: dict) -> None:
        sdr = self.sdr
        assert sdr is not None, "open() made the device first"
        sdr.sample_rate = self.fs
        if src["ppm"]:
            sdr.freq_correction = src["ppm"]
        lo = self.schedule.lo_of(self.schedule.phase_of_block(self._index))
        self._tune(lo)
        self._lo = lo
        sdr.gain = src["gain"]             # a number sets manual gain (AGC off) in pyrtlsdr
        if hasattr(sdr, "set_agc_mode"):
            sdr.set_agc_mode(False)
        if hasattr(sdr, "set_bias_tee"):
            sdr.set_bias_tee(bool(src["bias_tee"]))
        elif src["bias_tee"]:
            raise SourceError("source.bias_tee = true but this pyrtlsdr/librtlsdr has no bias-tee call")

    def set_pointing(self, pointing: Callable[[Time], SkyCoord] | None) -> None:
        """The dongle's samples do not depend on where the dish points."""

    def can_reopen(self) -> bool:
        return True

    def reopen(self) -> None:
        """Close whatever is left of the device and open it again (after a SourceError).

        Blocks go on with the next block of the switching schedule; the first one after a
        reopen has its leading ``settle_samples`` blanked; the outage is not counted as lost samples.

        Raises
        ------
        SourceError
            Still absent (one line, as from :meth:`open`).
        """
        self.close()
        self._after_reopen = True
        self.open()

    def _tune(self, lo_hz: float) -> None:
        """Set the centre frequency, trying once more if librtlsdr refuses."""
        hz = int(round(lo_hz))
        rc = 0
        for _ in range(_RETUNE_TRIES):
            rc = self._set_center_freq(hz)
            if rc >= 0:
                return
        raise SourceError(f"retuning the dongle to {lo_hz / 1e6:.6f} MHz failed twice "
                          f"({_describe_rc(rc)}): unplugged, or the tuner cannot reach it")

    def _set_center_freq(self, hz: int) -> int:
        if self._lib is not None:
            assert self.sdr is not None, "tuned only while the device is open"
            return int(self._lib.rtlsdr_set_center_freq(self.sdr.dev_p, hz))
        if self.sdr is None:
            return -1                 # closed meanwhile: a refused setting, like any other
        try:
            self.sdr.center_freq = hz
        except Exception:
            return -1
        return 0

    # -- the reader thread and its callback ------------------------------------------------
    def _reader(self) -> None:
        rc = None
        try:
            assert self.sdr is not None, "started by open() on an open device"
            if self._lib is not None:
                rc = int(self._lib.rtlsdr_read_async(self.sdr.dev_p, self._c_callback, self,
                                                     0, self._transfer_bytes))
            else:
                self.sdr.read_bytes_async(self._callback, self._transfer_bytes)
        except Exception as exc:  # device unplugged and the like
            self._error = exc
        with self._lock:
            self._end_rc = rc
            self._ended = True
            self._lock.notify_all()

    def _c_transfer(self, buf: ctypes._Pointer[ctypes.c_ubyte], n_bytes: int,
                    _context: object) -> None:
        """librtlsdr's callback: one transfer of ``n_bytes`` at ``buf`` (reused afterwards)."""
        try:
            if n_bytes > 0:
                self._store(np.ctypeslib.as_array(buf, shape=(int(n_bytes),)))
        except Exception as exc:   # never let an exception into C; reported by read()
            self._error = exc

    def _callback(self, buf: bytes | bytearray | ctypes.Array[ctypes.c_ubyte],
                  _context: object) -> None:
        """pyrtlsdr-style callback (a stand-in's ``read_bytes_async``)."""
        data = np.ctypeslib.as_array(buf) if not isinstance(buf, (bytes, bytearray)) else \
            np.frombuffer(buf, dtype=np.uint8)
        self._store(data)

    def _store(self, data: np.ndarray) -> None:
        """Stamp and copy one transfer into the ring; never blocks for long."""
        arrival_s = self.clock.now_mono()
        with self._lock:
            if self._stopping:
                return
            if self._first_start_mono_s is None:
                self._first_start_mono_s = arrival_s - data.size / 2 / self.fs
            if self._write - self._read >= len(self._ring):
                self._overrun_bytes += data.size   # consumer behind: drop, count
            else:
                slot = self._write % len(self._ring)
                n = min(data.size, self._transfer_bytes)
                self._ring[slot, :n] = data[:n]
                self._ring_len[slot] = n
                self._ring_arrival_s[slot] = arrival_s
                self._write += 1
            self._received_bytes += data.size
            self._lock.notify()

    # -- the Source interface --------------------------------------------------------------
    def set_cal(self, on: bool | None) -> None:
        """Hold the noise source on or off (True / False), or back to the schedule (None)."""
        self.forced_cal = None if on is None else bool(on)

    def lost_samples_estimate(self) -> int:
        """Samples lost since open: max(ring overruns, time-based shortfall).

        Returns
        -------
        int
            ``max(overrun_bytes / 2, (t_now - t_first - jitter_s) * fs - received_bytes / 2
            - transfer_bytes / 2, 0)``: ``t_first`` when the first transfer's first sample was
            taken, ``transfer_bytes / 2`` samples for the transfer being filled, ``jitter_s``
            for transfers delivered late (the callback waiting for the interpreter).
        """
        with self._lock:
            if self._first_start_mono_s is None:
                return int(self._overrun_bytes // 2)
            expected = (self.clock.now_mono() - self._first_start_mono_s - _JITTER_S) * self.fs
            shortfall = expected - self._received_bytes / 2 - self._transfer_bytes / 2
            return int(max(self._overrun_bytes / 2, shortfall, 0))

    def _stop_message(self) -> str:
        if self._error is not None:
            why = str(self._error).splitlines()[0] if str(self._error) else type(self._error).__name__
        elif self._end_rc is not None and self._end_rc < 0:
            why = f"its read returned {_describe_rc(self._end_rc)}"
        else:
            why = "its USB transfers ended"
        return f"dongle stopped delivering samples ({why}): unplugged or a USB fault"

    def _next_transfer(self) -> tuple[np.ndarray, float]:
        """The next transfer from the ring and its arrival (monotonic, s)."""
        with self._lock:
            waited_s = 0.0
            while self._read >= self._write:
                if self._ended or self._error is not None or (
                        self._thread is not None and not self._thread.is_alive()):
                    raise SourceError(self._stop_message())
                if waited_s >= _STALL_S:
                    raise SourceError(f"dongle delivered no samples for {_STALL_S:g} s: "
                                      "unplugged or a USB fault")
                start = self.clock.now_mono()
                self._lock.wait(timeout=_STALL_S - waited_s)
                waited_s += self.clock.now_mono() - start
            slot = self._read % len(self._ring)
            out = self._ring[slot, : self._ring_len[slot]].copy()
            arrival_s = float(self._ring_arrival_s[slot])
            self._read += 1
            return out, arrival_s

    def _after_cutoff(self, data: np.ndarray, arrival_s: float) -> np.ndarray:
        """Drop the samples of a transfer taken before ``_cutoff_mono_s`` (a retune or a
        noise-source change): sample j of n was taken at arrival - (n - j) / fs."""
        cutoff = self._cutoff_mono_s
        if cutoff is None:
            return data
        if arrival_s <= cutoff:
            return data[:0]                       # all of it before: keep looking
        start_s = arrival_s - data.size / 2 / self.fs
        self._cutoff_mono_s = None
        if start_s >= cutoff:
            return data
        drop = min(data.size, 2 * math.ceil((cutoff - start_s) * self.fs))
        return data[drop:]

    def read(self) -> Block:
        """The next block of the switching schedule.

        Raises
        ------
        SourceError
            The dongle stopped (unplugged, USB fault) or a retune failed twice; the same
            block index is read again after a :meth:`reopen`.
        """
        i = self._index
        sch = self.schedule
        phase = sch.phase_of_block(i)
        hop = sch.is_hop(i)
        lo = sch.lo_of(phase)
        if self._fire.is_set():
            self._fire.clear()
            self._extra_from = i
        wanted = sch.cal_on(i, self._extra_from) if self.forced_cal is None else self.forced_cal
        switched = wanted != self._cal_wanted
        self._cal_wanted = wanted
        cal_state = self.cal.state_for(wanted)
        if lo != self._lo:
            self._tune(lo)
            self._lo = lo
            self._drop_before(self.clock.now_mono())   # samples of the old LO
        elif switched:
            self._drop_before(self.clock.now_mono())   # from before the noise source changed
        need = 2 * self.block_samples
        parts, have = [self._pending], self._pending.size
        # first sample: in the pending tail of the last transfer, or the next transfer's first
        first_mono_s = (self._pending_arrival_s - have / 2 / self.fs) if have else None
        while have < need:
            data, arrival_s = self._next_transfer()
            data = self._after_cutoff(data, arrival_s)
            if data.size == 0:
                continue
            if first_mono_s is None:
                first_mono_s = arrival_s - data.size / 2 / self.fs
            parts.append(data)
            have += data.size
            self._pending_arrival_s = arrival_s
        raw = np.concatenate(parts)
        self._pending = raw[need:]
        raw = raw[:need]
        assert first_mono_s is not None, "set from the pending tail or the first transfer"
        step_s = self.clock.check()
        t0 = self.clock.time_of(first_mono_s)
        lost = self.lost_samples_estimate()
        new_lost, self._lost_reported = max(0, lost - self._lost_reported), max(lost, self._lost_reported)
        fresh = self._after_reopen
        if self._last_end_unix_s is not None:
            t0 = max(t0, self._last_end_unix_s)        # never before the previous block's end
        self._after_reopen = False
        self._last_end_unix_s = t0 + self.block_samples / self.fs
        self._index += 1
        settle = sch.settle_samples if (hop or switched or fresh) else 0
        return Block(raw=raw, lo_hz=lo, sample_rate=self.fs, t0_unix_s=t0, phase=phase,
                     cal_on=cal_state, lost_before=new_lost, settle_samples=settle, index=i,
                     clock_step_s=step_s)

    def _drop_before(self, mono_s: float) -> None:
        self._pending = self._pending[:0]
        self._cutoff_mono_s = mono_s

    def close(self) -> None:
        """Stop streaming and close the device (safe to call twice, and after a fault)."""
        if self.sdr is None:
            return
        with self._lock:
            self._stopping = True
        thread = self._thread
        if thread is not None and thread.is_alive():
            # a reader thread started late may not be in read_async yet, where a cancel does
            # nothing (librtlsdr: -2, not running): cancel again until it ends, _STALL_S at most
            for _ in range(max(1, math.ceil(_STALL_S / _CANCEL_RETRY_S))):
                try:
                    if self._lib is not None:
                        self._lib.rtlsdr_cancel_async(self.sdr.dev_p)
                    else:
                        self.sdr.cancel_read_async()
                except Exception:
                    pass
                thread.join(timeout=_CANCEL_RETRY_S)
                if not thread.is_alive():
                    break
        if thread is not None and thread.is_alive():
            # librtlsdr would block in close until the stream ends: leave the handle alone,
            # and keep a reference so that pyrtlsdr's __del__ does not close it either
            self._abandoned.append(self.sdr)
            self.sdr, self._thread = None, None
            return
        self._thread = None
        self._close_device()

    def _close_device(self) -> None:
        sdr, self.sdr = self.sdr, None
        if sdr is None:
            return
        if not getattr(sdr, "device_opened", True):  # pyrtlsdr closes it itself on some errors
            return
        if self.cfg["source"]["bias_tee"]:
            try:                              # the LNA's supply off while nobody observes
                if self._lib is not None:
                    self._lib.rtlsdr_set_bias_tee(sdr.dev_p, 0)
                elif hasattr(sdr, "set_bias_tee"):
                    sdr.set_bias_tee(False)
            except Exception:
                pass                          # a device gone cannot be switched; close it all the same
        try:
            sdr.close()
        except Exception:
            pass
