"""``spinflip loads``: the hot/cold (Y-factor) procedure run against a real or simulated source.

The receiver is held at the signal LO with switching off; for each step the observer is asked
to put the load in front of the feed (on the simulator the simulated load is placed for them),
then ``calibration.loads_s`` seconds of samples are channelized by the same spectrometer as a
scan, and the band-averaged power is the mean channel power over the band's flat part
(:func:`spinflip.daemon.calibration.tsys_meter.usable_channels`), in counts. The record
(:mod:`spinflip.daemon.calibration.loads`) is saved in the records folder, where later scans find it.

The steps themselves are :class:`LoadsProcedure`, independent of where the samples come from
(the tests drive it with made-up powers). The same :class:`LoadsSession` is what a control
command runs (it needs only a ``prompt`` callable that returns when the observer has placed
the load).
"""

from __future__ import annotations

import copy
import time
from collections.abc import Callable
from dataclasses import dataclass

import numpy as np

from spinflip.daemon.calibration import loads as loads_mod
from spinflip.daemon.calibration.loads import LoadsRecord, check_meta, make_record
from spinflip.daemon.calibration.noise_source import CalControl
from spinflip.daemon.calibration.noise_switch import make_noise_switch
from spinflip.daemon.calibration.tsys_meter import usable_channels
from spinflip.daemon.calibration.y_factor import (
    LoadsError,
    _finite,
    _power,
    check_load_temperatures,
)
from spinflip.daemon.config import ConfigError
from spinflip.daemon.dsp.spectrometer import Spectrometer
from spinflip.daemon.sources.base import make_source

#: Measurements, in the order the procedure makes them.
LOADS = ("hot", "cold", "cold+cal")


@dataclass(frozen=True)
class Step:
    """One step of the procedure, as the observer sees it.

    Attributes
    ----------
    number, total : int
        This is step ``number`` of ``total`` (from 1).
    load : str
        What is measured: "hot", "cold" or "cold+cal" (see :data:`LOADS`).
    title : str
        Short title, e.g. "Hot load".
    instruction : str
        One sentence for the observer, e.g. "Step 1 of 3: cover the feed with the absorber
        (hot load, 290.0 K), then press Enter".
    """

    number: int
    total: int
    load: str
    title: str
    instruction: str


class LoadsProcedure:
    """Guided hot/cold-load calibration, independent of where the samples come from.

    Parameters
    ----------
    measure : callable ``(load: str, seconds: float) -> float``
        Band-averaged power, counts, of ``seconds`` of samples for ``load`` = "hot", "cold" or
        "cold+cal" (the load is in front of the feed and the noise source set when it is
        called).
    prompt : callable ``(step: Step) -> None``
        Shows the step to the observer and returns when they say go (Enter on a terminal).
        Raising ``KeyboardInterrupt`` cancels the procedure.
    t_hot_k, t_cold_k : float
        Load temperatures, K (see :func:`check_load_temperatures`).
    seconds : float
        Integration time on each load, s (> 0).
    set_noise_source : callable ``(on: bool) -> None`` or None
        Switches the noise source; None: the telescope has none (no "cold+cal" step).
    clock : callable ``() -> float``
        Current time, POSIX s (the simulator passes its simulated clock).
    go_action : str
        What the observer does to go on, as said in the instructions.

    Notes
    -----
    :meth:`run` switches the noise source off before the first measurement and again when it
    ends, whether it succeeds, fails or is cancelled. It writes nothing: the caller saves the
    returned record (:func:`save_record`), so a failed or cancelled run leaves no record.
    """

    def __init__(self, measure: Callable[[str, float], float], prompt: Callable[[Step], None], *,
                 t_hot_k: float, t_cold_k: float, seconds: float,
                 set_noise_source: Callable[[bool], None] | None = None,
                 clock: Callable[[], float] = time.time, go_action: str = "press Enter"):
        self.t_hot_k, self.t_cold_k = check_load_temperatures(t_hot_k, t_cold_k)
        s = _finite(seconds, "seconds per load")
        if s <= 0.0:
            raise LoadsError(f"seconds per load = {s:g} s: expected above 0 s")
        self.seconds = s
        self._measure = measure
        self._prompt = prompt
        self._set_noise_source = set_noise_source
        self._clock = clock
        self._go = go_action

    def steps(self) -> list[Step]:
        """The steps in the order :meth:`run` performs them."""
        loads = LOADS if self._set_noise_source is not None else LOADS[:2]
        n = len(loads)
        text = {
            "hot": ("Hot load", "cover the feed with the absorber "
                    f"(hot load, {self.t_hot_k:.1f} K)"),
            "cold": ("Cold load", "remove the absorber and point the feed at the cold sky near "
                     f"the zenith (cold load, {self.t_cold_k:.1f} K)"),
            "cold+cal": ("Cold load + noise source", "keep the feed on the cold sky for a "
                         "measurement with the noise source on"),
        }
        return [Step(i, n, load, text[load][0],
                     f"Step {i} of {n}: {text[load][1]}, then {self._go}")
                for i, load in enumerate(loads, start=1)]

    def _noise_source(self, on: bool) -> None:
        if self._set_noise_source is not None:
            self._set_noise_source(on)

    def run(self, meta: dict) -> LoadsRecord:
        """Perform the steps in order and compute the calibration record.

        Parameters
        ----------
        meta : dict
            Receiver settings and where (:data:`META_KEYS`: gain_setting_db, center_freq_hz,
            sample_rate_hz, telescope, site_name); checked before the first prompt.

        Returns
        -------
        LoadsRecord
            Not saved (see :func:`save_record`).

        Raises
        ------
        LoadsError
            Bad ``meta``, a non-finite or non-positive power (naming the step), or a failed
            check of the formulas (Y <= 1, noise source without effect, ...).
        KeyboardInterrupt
            The observer cancelled at a prompt; nothing is returned.
        """
        m = check_meta(meta, "loads procedure meta")
        powers: dict[str, float] = {}
        try:
            self._noise_source(False)
            for step in self.steps():
                self._prompt(step)
                if step.load == "cold+cal":
                    self._noise_source(True)
                p = self._measure(step.load, self.seconds)
                if step.load == "cold+cal":
                    self._noise_source(False)
                what = f"step {step.number} of {step.total} ({step.title.lower()})"
                try:
                    powers[step.load] = _power(p, f"{what}: band-averaged power")
                except LoadsError as exc:
                    raise LoadsError(f"{exc}; check that the receiver delivers samples") from None
        finally:
            self._noise_source(False)
        return make_record(m, p_hot_counts=powers["hot"], p_cold_counts=powers["cold"],
                           p_cold_cal_counts=powers.get("cold+cal"), t_hot_k=self.t_hot_k,
                           t_cold_k=self.t_cold_k, time_per_load_s=self.seconds,
                           time_unix_s=self._clock())


class LoadsSession:
    """One hot/cold calibration with the configured source and noise-source switch.

    Parameters
    ----------
    cfg : validated configuration
    fast : simulator (and replay) as fast as the CPU allows
    prompt : callable(step) returning when the load is in place (raise KeyboardInterrupt to
        cancel)
    """

    def __init__(self, cfg: dict, prompt: Callable[[Step], None], fast: bool = False):
        if cfg["source"]["kind"] == "replay":
            raise ConfigError("spinflip loads needs a live receiver (sim or rtlsdr), not a replay")
        self.cfg = copy.deepcopy(cfg)
        self.cfg["switching"]["mode"] = "none"          # hold the signal LO
        self.cfg["calibration"]["tsys_from"] = "fixed"  # the schedule never fires the source
        self.source = make_source(self.cfg, fast=fast)
        calib = cfg["calibration"]
        try:
            self.switch = make_noise_switch(calib)
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
        self.procedure = LoadsProcedure(
            self._measure, prompt, t_hot_k=calib["t_hot_k"], t_cold_k=calib["t_cold_k"],
            seconds=calib["loads_s"],
            set_noise_source=self._set_noise_source if has_noise_source else None)

    def _set_noise_source(self, on: bool) -> None:
        self.source.set_cal(on)

    def _sim_load(self, load: str | None) -> None:
        """Put the simulator's feed on a load ("hot", "cold") or back on the sky (None)."""
        from spinflip.daemon.sources.sim import SimSource
        assert isinstance(self.source, SimSource), "called only when is_sim"
        self.source.load = load

    def _measure(self, load: str, seconds: float) -> float:
        """Band-averaged power (counts) of ``seconds`` of samples on ``load``."""
        if self.is_sim:
            self._sim_load("hot" if load == "hot" else "cold")
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
                self._sim_load(None)

