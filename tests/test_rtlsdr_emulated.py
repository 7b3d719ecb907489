"""The dongle source through pyrtlsdr's real ctypes layer, against an emulated librtlsdr.

``tests/fake_librtlsdr.c`` (built once per session by ``rtlsdr_emulator``) streams synthetic
IQ in real time and fails on cue, so opening, streaming, retuning, short transfers, unplugging
and replugging run through the same calls as with a dongle. The emulator streams a weak tone
at a fixed sky frequency, which shows at baseband (sky - LO): that tells which LO a block's
samples were really taken at.
"""

import time

import numpy as np
import pytest
from rtlsdr_emulator import TONE_HZ, fakertl, fakertl_lib  # noqa: F401  (fixtures)

from spinflip.daemon import config
from spinflip.daemon.sources import dongle
from spinflip.daemon.sources.base import SourceError
from spinflip.daemon.sources.sample_clock import SampleClock

pytestmark = pytest.mark.live      # real-time: seconds of wall time (CI runs it)

FS_HZ = 1.024e6          # a rate the RTL2832U supports exactly (librtlsdr's resampler ratio)
BLOCK_SAMPLES = 16384    # the smallest block the configuration allows
_PATIENT_STALL_S = 30.0  # dongle._STALL_S in these tests (3 s in the daemon): see ``sources``


def _cfg(**sections):
    cfg = config.load(None)
    config.merge(cfg, {"source": {"kind": "rtlsdr", "sample_rate": FS_HZ,
                                  "block_samples": BLOCK_SAMPLES},
                       "calibration": {"tsys_from": "fixed"},
                       "switching": {"dwell_s": 0.05, "settle_s": 0.002}})
    config.merge(cfg, sections)
    return cfg


@pytest.fixture
def sources(fakertl, monkeypatch):   # noqa: F811
    """Make RtlSdrSource(cfg) objects; all closed at the end, and the emulator must have seen
    no call on a closed handle and no close of a handle still streaming."""
    monkeypatch.setattr(dongle, "_dvb_driver_loaded", lambda: None)   # the host's
    # Patience for a loaded machine (other tests on the other xdist worker): dongle._STALL_S
    # (3 s) bounds both a read waiting for samples and close() waiting for the reader thread,
    # after which close() leaves the handle open for good, and a reader scheduled late would
    # leak a handle into every later test of the session (LIBUSB_ERROR_BUSY). Here both may
    # take longer; a wedged or unplugged dongle is still told apart by the error's words (and
    # test_a_wedged_dongle_is_given_up_on sets its own 0.3 s).
    monkeypatch.setattr(dongle, "_STALL_S", _PATIENT_STALL_S)
    made = []

    def make(cfg, **kw):
        s = dongle.RtlSdrSource(cfg, **kw)
        made.append(s)
        return s

    yield make
    monkeypatch.setattr(dongle, "_STALL_S", _PATIENT_STALL_S)     # a test may have lowered it
    for s in made:
        s.close()
    assert fakertl.stat("stale_calls") == 0
    assert fakertl.stat("close_while_streaming") == 0
    assert fakertl.stat("open_handles") == 0


def _tone_offset_hz(block):
    """Baseband frequency of the strongest line of a block after its settle samples, Hz."""
    iq = block.raw[2 * block.settle_samples:].astype(np.float64) - 127.5
    x = iq[0::2] + 1j * iq[1::2]
    spec = np.abs(np.fft.fft(x)) ** 2
    f_hz = np.fft.fftfreq(x.size, d=1 / block.sample_rate)
    return f_hz[np.argmax(spec)], block.sample_rate / x.size


def _read_timed(src, n, lag_before_hops_s=0.0):
    """n blocks, each with the system time at which read() returned; before each hop, wait
    ``lag_before_hops_s`` so that transfers taken at the old LO queue up in the ring (as when
    the processing falls behind)."""
    out = []
    for i in range(n):
        if i and src.schedule.is_hop(i):
            time.sleep(lag_before_hops_s)
        b = src.read()
        out.append((b, time.time()))
    return out


def test_blocks_follow_the_switching_schedule_through_pyrtlsdr(fakertl, sources):  # noqa: F811
    cfg = _cfg(source={"ppm": 3, "bias_tee": True})
    src = sources(cfg)
    src.open()
    sch = src.schedule
    n = 2 * sch.blocks_per_cycle + 1
    timed = _read_timed(src, n, lag_before_hops_s=0.15)   # two transfers and more
    blocks = [b for b, _ in timed]
    assert [b.index for b in blocks] == list(range(n))
    assert all(b.raw.dtype == np.uint8 and b.raw.size == 2 * BLOCK_SAMPLES for b in blocks)
    assert [b.lo_hz for b in blocks] == [sch.lo_of(sch.phase_of_block(i)) for i in range(n)]
    assert {b.phase for b in blocks} == {"sig", "ref"}
    # the emulator saw the retunes: pyrtlsdr's 80 MHz default at open, then one per hop
    hops = [round(blocks[0].lo_hz)] + [round(b.lo_hz) for k, b in enumerate(blocks[1:], 1)
                                       if b.lo_hz != blocks[k - 1].lo_hz]
    assert fakertl.tunes() == [80_000_000] + hops
    assert fakertl.stat("bias_tee") == 1
    src.close()          # the bias tee is switched off with the device (hardware/SAFETY.md)
    assert fakertl.stat("bias_tee_last") == 0
    src.open()
    # each block's samples were taken at its own LO: the tone sits at (sky - LO) at baseband
    # (the mixer's definition: baseband = RF - LO, common practice), within two bins; a block
    # that still held samples of the previous LO (queued before the retune) would show it
    # elsewhere
    for b in blocks:
        f_hz, bin_hz = _tone_offset_hz(b)
        assert abs(f_hz - (TONE_HZ - b.lo_hz)) <= 2 * bin_hz, (b.index, b.phase, f_hz)
    # timestamps: increasing, no block overlapping the previous one, none ending after the
    # moment it was handed over, none older than a few seconds at that moment
    t0 = np.array([b.t0_unix_s for b in blocks])
    dur_s = BLOCK_SAMPLES / FS_HZ
    assert np.all(np.diff(t0) >= dur_s - 1e-9)
    for b, t_read in timed:
        assert t_read - 5.0 < b.t0_unix_s and b.t0_unix_s + dur_s <= t_read + 0.01
    assert all(b.clock_step_s == 0.0 for b in blocks)


def test_short_transfers_keep_the_stream_continuous(fakertl, sources):  # noqa: F811
    fakertl.set(short=2, counter=1)     # every second transfer half long; bytes count 0..255
    src = sources(_cfg(switching={"mode": "none"}))
    src.open()
    blocks = [src.read() for _ in range(40)]
    assert fakertl.stat("short_transfers") >= 3
    stream = np.concatenate([b.raw for b in blocks]).astype(np.int64)
    # not a byte lost, repeated or reordered, across short transfers and block edges
    assert np.all(np.diff(stream) % 256 == 1)
    # short transfers are not lost samples: far less than one transfer's worth reported
    assert sum(b.lost_before for b in blocks) < dongle.transfer_bytes_for(FS_HZ) // 2
    assert np.all(np.diff([b.t0_unix_s for b in blocks]) > 0)


def test_a_retune_refused_twice_names_the_frequency(fakertl, sources):  # noqa: F811
    src = sources(_cfg())
    src.open()
    sch = src.schedule
    first = [src.read() for _ in range(sch.blocks_per_dwell)]     # the whole signal dwell
    assert all(b.phase == "sig" for b in first)
    fakertl.set(retune_fail=1)
    with pytest.raises(SourceError) as err:
        src.read()                                                # the hop to the reference
    assert f"{sch.ref_lo_hz / 1e6:.6f} MHz" in str(err.value)
    assert len(str(err.value).splitlines()) == 1
    assert fakertl.stat("retune_failures") == 2                   # tried once more
    fakertl.set(retune_fail=0)
    src.reopen()
    b = src.read()                      # the same block again, at the reference LO
    assert (b.index, b.phase, b.lo_hz) == (sch.blocks_per_dwell, "ref", sch.ref_lo_hz)
    f_hz, bin_hz = _tone_offset_hz(b)
    assert abs(f_hz - (TONE_HZ - sch.ref_lo_hz)) <= 2 * bin_hz


@pytest.mark.parametrize("unplug_rc", [-5, 0])   # 0: librtlsdr ending its read quietly
def test_unplug_then_replug(fakertl, sources, unplug_rc):  # noqa: F811
    fakertl.set(unplug_rc=unplug_rc)
    src = sources(_cfg(switching={"mode": "none"}))
    src.open()
    before = [src.read() for _ in range(3)]
    fakertl.set(present=0)
    t_unplug = time.monotonic()
    with pytest.raises(SourceError) as err:
        for _ in range(1000):
            src.read()
    waited_s = time.monotonic() - t_unplug
    msg = str(err.value)
    # the end of the stream is seen as such, not by waiting out the no-data timeout
    assert "stopped delivering samples" in msg and len(msg.splitlines()) == 1
    assert waited_s < _PATIENT_STALL_S                   # not by waiting out the timeout
    with pytest.raises(SourceError, match="no RTL-SDR dongle"):
        src.reopen()                                             # still unplugged
    fakertl.set(present=1)
    src.reopen()
    after = [src.read() for _ in range(3)]
    assert [b.index for b in after] == list(range(after[0].index, after[0].index + 3))
    assert after[0].index > before[-1].index
    assert after[0].t0_unix_s >= before[-1].t0_unix_s + BLOCK_SAMPLES / FS_HZ
    # a new stream: the outage is not charged as lost samples (the daemon reports it as events
    # and a new scan segment), and it starts with its settle time
    assert after[0].lost_before < dongle.transfer_bytes_for(FS_HZ) // 2
    assert after[0].settle_samples == src.schedule.settle_samples
    assert fakertl.stat("opens") == 2 and fakertl.stat("open_fails") == 1


def test_a_wedged_dongle_is_given_up_on(fakertl, sources, monkeypatch):  # noqa: F811
    monkeypatch.setattr(dongle, "_STALL_S", 0.3)          # 3 s in the daemon
    src = sources(_cfg(switching={"mode": "none"}))
    src.open()
    src.read()
    fakertl.set(stall=1)
    with pytest.raises(SourceError, match="no samples for 0.3 s"):
        for _ in range(1000):
            src.read()


def test_system_clock_steps_reach_the_blocks(fakertl, sources):  # noqa: F811
    offset_s = [0.0]
    clock = SampleClock(wall=lambda: time.time() + offset_s[0])
    src = sources(_cfg(switching={"mode": "none"}), clock=clock)
    src.open()
    a = src.read()
    offset_s[0] = 100.0                 # NTP puts a stale clock right: forward, followed
    b = src.read()
    offset_s[0] = 40.0                  # stepped back 60 s: reported, not followed
    c = src.read()
    # steps as sample_clock defines them: the change of (system - monotonic), s
    assert b.clock_step_s == pytest.approx(100.0, abs=0.1)
    assert b.t0_unix_s - a.t0_unix_s == pytest.approx(100.0 + BLOCK_SAMPLES / FS_HZ, abs=0.1)
    assert c.clock_step_s == pytest.approx(-60.0, abs=0.1)
    assert c.t0_unix_s >= b.t0_unix_s + BLOCK_SAMPLES / FS_HZ


def test_opening_without_the_dongle_says_what_to_check(fakertl, sources, monkeypatch):  # noqa: F811
    fakertl.set(present=0)
    with pytest.raises(SourceError, match="no RTL-SDR dongle '0' found") as err:
        sources(_cfg()).open()
    assert "udev rule" in str(err.value) and len(str(err.value).splitlines()) == 1
    fakertl.set(present=1)
    with pytest.raises(SourceError, match="no RTL-SDR dongle 'SPF99999'"):
        sources(_cfg(source={"device": "SPF99999"})).open()
    monkeypatch.setattr(dongle, "_dvb_driver_loaded", lambda: "dvb_usb_rtl28xxu")
    with pytest.raises(SourceError, match="rmmod dvb_usb_rtl28xxu"):
        sources(_cfg(source={"device": "SPF99999"})).open()
    src = sources(_cfg(source={"device": "SPF00001"}))           # by serial number
    src.open()
    assert src.read().raw.size == 2 * BLOCK_SAMPLES


def test_close_right_after_open_stops_a_reader_that_started_late(fakertl, sources,  # noqa: F811
                                                                   monkeypatch):
    # On a loaded machine the reader thread may enter read_async only after close() cancelled:
    # librtlsdr's cancel_async does nothing to a stream not running yet (it returns -2), so a
    # single cancel left the stream running and the handle open for good (the next open: BUSY).
    started_late = dongle.RtlSdrSource._reader

    def late(self):
        time.sleep(0.5)                       # scheduled late
        started_late(self)

    monkeypatch.setattr(dongle.RtlSdrSource, "_reader", late)
    src = sources(_cfg(switching={"mode": "none"}))
    src.open()
    src.close()
    assert fakertl.stat("open_handles") == 0 and fakertl.stat("async_running") == 0
    assert not src._abandoned
