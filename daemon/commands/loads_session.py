"""``spinflip loads``: the hot/cold (Y-factor) procedure run against a real or simulated source.

The receiver is held at the signal LO with switching off; for each step the observer is asked
to put the load in front of the feed (on the simulator the simulated load is placed for them),
then ``calibration.loads_s`` seconds of samples are channelized by the same spectrometer as a
scan, and the band-averaged power is the mean channel power over the band's flat part
(:func:`spinflip.daemon.calibration.tsys_meter.usable_channels`), in counts. The record
(:mod:`spinflip.daemon.calibration.loads`) is saved in the records folder, where later scans find it.

The same :class:`LoadsSession` is what a control command runs (it needs only a ``prompt``
callable that returns when the observer has placed the load).
"""

from __future__ import annotations

import copy

import numpy as np

from spinflip.daemon.calibration import loads as loads_mod
from spinflip.daemon.calibration.noise_source import CalControl
from spinflip.daemon.config import ConfigError
from spinflip.daemon.calibration.noise_switch import make_noise_switch
from spinflip.daemon.sources.base import make_source
from spinflip.daemon.dsp.spectrometer import Spectrometer
from spinflip.daemon.calibration.tsys_meter import usable_channels


class LoadsSession:
    """One hot/cold calibration with the configured source and noise-source switch.

    Parameters
    ----------
    cfg : validated configuration
    fast : simulator (and replay) as fast as the CPU allows
    prompt : callable(step) returning when the load is in place (raise KeyboardInterrupt to
        cancel)
    """

    def __init__(self, cfg: dict, prompt, fast: bool = False):
        if cfg["source"]["kind"] == "replay":
            raise ConfigError("spinflip loads needs a live receiver (sim or rtlsdr), not a replay")
        self.cfg = copy.deepcopy(cfg)
        self.cfg["switching"]["mode"] = "none"          # hold the signal LO
        self.cfg["calibration"]["tsys_from"] = "fixed"  # the schedule never fires the source
        self.source = make_source(self.cfg, fast=fast)
        cal = cfg["calibration"]
        try:
            self.switch = make_noise_switch(cal)
        except ValueError as exc:
            raise ConfigError(str(exc)) from None
        self.is_sim = self.source.kind == "sim"
        has_noise_source = self.is_sim or self.switch.can_switch
        if self.source.can_fire_noise_source():
            self.source.attach_noise_source(
                CalControl(self.switch if self.switch.can_switch else None))
        sp = cfg["spectrometer"]
        self.spectrometer = Spectrometer(sp["channels"], sp["method"], sp["taps"])
        self.usable = usable_channels(sp["channels"])
        self.procedure = loads_mod.LoadsProcedure(
            self._measure, prompt, t_hot_k=cal["t_hot_k"], t_cold_k=cal["t_cold_k"],
            seconds=cal["loads_s"],
            set_noise_source=self._set_noise_source if has_noise_source else None)

    def _set_noise_source(self, on: bool) -> None:
        self.source.set_cal(on)

    def _measure(self, load: str, seconds: float) -> float:
        """Band-averaged power (counts) of ``seconds`` of samples on ``load``."""
        if self.is_sim:
            self.source.load = "hot" if load == "hot" else "cold"
        n_blocks = max(1, round(seconds * self.source.fs / self.source.block_samples))
        s1 = np.zeros(self.spectrometer.nchan)
        m = np.zeros(self.spectrometer.nchan)
        for k in range(n_blocks + 1):   # the first block may hold the change of load: dropped
            block = self.source.read()
            if block is None:
                raise loads_mod.LoadsError("the receiver stopped delivering samples")
            if block.cal_on is None:
                raise loads_mod.LoadsError("the noise source switch failed; no measurement")
            bs1, bm = self.spectrometer.add(block)
            if k:
                s1 += bs1
                m += bm
        self.spectrometer.take()
        use = self.usable & (m > 0)
        if not use.any():
            raise loads_mod.LoadsError("every channel was flagged as interference; no measurement")
        return float(np.mean(s1[use] / m[use]))

    def run(self) -> loads_mod.LoadsRecord:
        """Open the receiver, perform the steps, return the record (not yet saved)."""
        src, site = self.cfg["source"], self.cfg["site"]
        meta = {"gain_setting_db": src["gain"], "center_freq_hz": src["center_freq"],
                "sample_rate_hz": src["sample_rate"], "telescope": site["telescope"],
                "site_name": site["name"]}
        if self.switch.can_switch:
            self.switch.open()
        self.source.open()
        try:
            return self.procedure.run(meta)
        finally:
            self.source.close()
            self.switch.close()
            if self.is_sim:
                self.source.load = None

