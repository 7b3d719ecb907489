"""The dongle source's noise-source handling, driven through a stand-in for pyrtlsdr's RtlSdr.

No dongle or librtlsdr is on this machine; the stand-in delivers constant samples through the
same asynchronous-callback interface (``read_bytes_async``), so the source's ring, retuning
and noise-source switching run as they would with hardware.
"""

import threading
import time

import numpy as np

from spinflip.daemon import config
from spinflip.daemon.calibration.noise_source import CalControl
from spinflip.daemon.calibration.noise_switch import make_noise_switch
from spinflip.daemon.sources import dongle


class _FakeRtlSdr:
    """What pyrtlsdr's RtlSdr offers the source: settings, async reads, cancel, close."""

    def __init__(self, device_index=0):
        self.tuned = []
        self._stop = threading.Event()
        self.sample_rate = self.gain = self.freq_correction = None

    @property
    def center_freq(self):
        return self.tuned[-1]

    @center_freq.setter
    def center_freq(self, hz):
        self.tuned.append(hz)

    def set_agc_mode(self, on):
        pass

    def set_bias_tee(self, on):
        pass

    def read_bytes_async(self, callback, nbytes):
        buf = bytes([127, 128]) * (nbytes // 2)
        while not self._stop.is_set():
            callback(buf, None)
            time.sleep(0.0005)

    def cancel_read_async(self):
        self._stop.set()

    def close(self):
        pass


def test_dongle_source_switches_the_noise_source_on_schedule(tmp_path, monkeypatch):
    monkeypatch.setattr(dongle, "_import_rtlsdr", lambda: _FakeRtlSdr)
    log = tmp_path / "switch.log"
    cfg = config.load(None)
    config.merge(cfg, {"source": {"kind": "rtlsdr"}, "calibration": {
        "noise_source_k": 50.0, "cal_interval_s": 3.3, "cal_on_s": 1.0, "switch": "command",
        "switch_on_cmd": f"echo on >> {log}", "switch_off_cmd": f"echo off >> {log}"}})
    src = dongle.RtlSdrSource(cfg)
    switch = make_noise_switch(cfg["calibration"])
    switch.open()
    src.attach_noise_source(CalControl(switch))
    src.open()
    try:
        blocks = [src.read() for _ in range(4 * src.schedule.blocks_per_cycle)]
    finally:
        src.close()
        switch.close()
    sch = src.schedule
    assert [b.cal_on for b in blocks] == [sch.cal_on(i) for i in range(len(blocks))]
    assert any(b.cal_on for b in blocks) and not all(b.cal_on for b in blocks)
    # the switch ran at each change: off (open), on, off, ..., off (close)
    changes = [k for k in range(1, len(blocks)) if blocks[k].cal_on != blocks[k - 1].cal_on]
    assert log.read_text().split() == ["off"] + ["on", "off"] * (len(changes) // 2) + (
        ["on"] if len(changes) % 2 else []) + ["off"]
    # after a change of noise-source state the settling samples are blanked, as after a hop
    assert all(blocks[k].settle_samples == sch.settle_samples for k in changes)
    # the tuner went back and forth between the two phases' LOs
    assert {b.lo_hz for b in blocks} == {sch.sig_lo_hz, sch.ref_lo_hz}
    assert all(b.raw.size == 2 * src.block_samples for b in blocks)
    assert np.all(blocks[0].raw[:2] == [127, 128])
