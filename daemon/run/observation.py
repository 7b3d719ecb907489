"""The acquisition daemon's main loop: source -> spectrometer -> calibrator -> archive.

System temperature (:class:`TsysPlan` says where it comes from, and the FITS header cites it):
``calibration.tsys_from = "noise_source"`` fires the noise source on the schedule's cadence and
measures T_sys at every firing (:mod:`spinflip.daemon.calibration.tsys_meter`); each row takes the newest
measurement finished by the time the row is, and its age (TSYSAGE). Rows finished before the
first measurement wait for it. A failed measurement is an error event; a row whose newest
T_sys is older than ``calibration.tsys_max_age_s`` is saved with every channel flagged, so no
spectrum is ever silently on a wrong scale. ``"loads"`` takes T_sys on the cold sky from the
newest hot/cold record (:mod:`spinflip.daemon.calibration.loads`), refused when too old or measured at other
receiver settings; ``"fixed"`` takes ``calibration.tsys_k``.

Threads: a reader thread pulls Blocks from the source into a bounded queue; the DSP loop (the
calling thread; numpy releases the GIL) consumes it; finished rows go to a writer thread whose
journal append (with fsync) never blocks the DSP loop. For a live source (the dongle, or the
simulator in real time) a full queue drops the block and counts its samples as lost; in
``--fast`` mode the reader waits instead, since simulated time does not run away.

Faults (each also an event on the live socket):

* a source that fails in mid-scan (the dongle unplugged) and can be reopened: the integration
  in progress is kept if it holds a whole switching cycle, the scan file is closed, the reader
  reopens the source with a doubling wait (1 s up to ``source.reconnect_max_s``) and a new scan
  segment begins when samples flow again; the daemon never exits for it;
* the disk refusing writes: :mod:`spinflip.daemon.storage.writer` holds finished integrations in
  memory within ``output.hold_mb`` and writes them when it can again;
* SIGTERM / SIGINT: the integration in progress is kept if it holds a whole switching cycle
  (its EXPOSURE says how long), else dropped and said so; the scan file is closed;
* the system clock stepping: forward steps end the integration and the timestamps follow;
  backward steps are recorded and the timestamps keep counting (never decrease), see
  :mod:`spinflip.daemon.sources.sample_clock`;
* under systemd (``Type=notify``) the daemon says READY=1 once observing, STATUS= lines, and
  WATCHDOG=1 while its main loop is alive (:mod:`spinflip.daemon.run.sd_notify`).
"""

from __future__ import annotations

import math
import queue
import signal
import sys
import threading
import time as _time
from dataclasses import dataclass, field
from pathlib import Path

import numpy as np
from astropy.time import Time

import functools
import shutil

import zmq

from spinflip import __version__

from spinflip.daemon.storage import archive
from spinflip.daemon.sky import coordinates
from spinflip.daemon.live import schema
from spinflip.daemon.calibration import loads as loads_mod
from spinflip.daemon.calibration.noise_source import CalControl
from spinflip.daemon.calibration.kelvin import calibrate
from spinflip.daemon.config import ConfigError
from spinflip.daemon.sky.kinematics import expected_velocity_range_km_s
from spinflip.daemon.live.messages import RunningAverage, spectrum_message
from spinflip.daemon.live.publisher import Publisher, PublishError
from spinflip.daemon.sky.hi_line import HI_REST_FREQ_HZ, radio_velocity_m_s
from spinflip.daemon.calibration.noise_switch import NoiseSwitchError, make_noise_switch
from spinflip.daemon.products.scan_average import scan_products
from spinflip.daemon.storage.writer import ScanStore
from spinflip.daemon.run import sd_notify
from spinflip.daemon.sources.base import SourceError, make_source
from spinflip.daemon.sky.spectral_axis import velocity_wcs_m_s
from spinflip.daemon.rfi.carriers import CarrierFinder
from spinflip.daemon.dsp.spectrometer import FlagSettings, Spectrometer
from spinflip.daemon.rfi.masks import named_channels
from spinflip.daemon.run.supervisor import Supervisor, WorkerFailed
from spinflip.daemon.calibration.tsys_meter import TsysMeter

_QUEUE_BLOCKS = 8                # about 0.9 s of samples at 2.4 MS/s
_WATCHDOG_STALL_S = 10.0         # a main loop silent this long is hung: no more WATCHDOG=1
_STOP = object()


@dataclass
class RunResult:
    files: list = field(default_factory=list)
    file_rows: dict = field(default_factory=dict)   # str(path) -> integrations in it
    rows: int = 0
    observed_s: float = 0.0
    lost_samples: int = 0
    recovered: list = field(default_factory=list)


def check_output_dir(path: Path) -> Path:
    """Create the output folder if needed and prove it writable, or raise ConfigError."""
    path = Path(path).expanduser()
    try:
        path.mkdir(parents=True, exist_ok=True)
        probe = path / ".spinflip-write-test"
        probe.write_bytes(b"ok")
        probe.unlink()
    except OSError as exc:
        raise ConfigError(f"output folder {path}: not writable ({exc.strerror or exc})") from None
    return path


@dataclass
class TsysPlan:
    """Where the kelvin scale's system temperature comes from, and the FITS cards citing it."""

    kind: str                 # "noise_source", "loads", "fixed" or "none"
    tsys_k: float = float("nan")       # loads / fixed: the value
    tcal_k: float = float("nan")       # noise_source: the source's excess temperature
    text: str = ""                     # TSYSSRC
    cards: dict = field(default_factory=dict)
    record: object = None


def records_dir(cfg: dict) -> Path:
    """Folder of hot/cold records: ``calibration.records`` or ``<output.dir>/calibration``."""
    folder = cfg["calibration"]["records"] or str(Path(cfg["output"]["dir"]) / "calibration")
    return Path(folder).expanduser()


def _usable_record(cfg: dict, now_unix_s: float):
    """The newest hot/cold record, checked for age and receiver settings (LoadsError if not)."""
    folder = records_dir(cfg)
    record = loads_mod.latest_record(folder)
    if record is None:
        return None
    cal, src = cfg["calibration"], cfg["source"]
    loads_mod.check_record_age(record, now_unix_s, cal["max_record_age_s"])
    loads_mod.check_record_matches(record, src["gain"], src["center_freq"], src["sample_rate"])
    return record


def plan_tsys(cfg: dict, source_kind: str, now_unix_s: float) -> TsysPlan:
    """Resolve ``[calibration]`` into a :class:`TsysPlan`, or ConfigError (exit 2) naming why."""
    cal = cfg["calibration"]
    how = cal["tsys_from"]
    if source_kind == "replay" and how == "noise_source":
        return TsysPlan("none", text="none: a capture cannot fire a noise source")
    if how == "fixed":
        return TsysPlan("fixed", tsys_k=cal["tsys_k"], text="fixed: calibration.tsys_k",
                        cards={"TSYSFIX": cal["tsys_k"]})
    try:
        record = _usable_record(cfg, now_unix_s)
    except loads_mod.LoadsError as exc:
        if how == "loads" or (how == "noise_source" and cal["noise_source_k"] <= 0
                              and source_kind != "sim"):
            raise ConfigError(str(exc)) from None
        record = None
    if how == "loads":
        if record is None:
            raise ConfigError(f"calibration.tsys_from = 'loads' but there is no hot/cold record in "
                              f"{records_dir(cfg)}: run 'spinflip loads' first")
        return TsysPlan("loads", tsys_k=record.tsys_cold_k, record=record,
                        text=f"loads record {record.name}: Trx + Tcold",
                        cards=loads_mod.header_cards(record))
    # the noise source
    if cal["noise_source_k"] > 0:
        tcal, why = cal["noise_source_k"], "calibration.noise_source_k"
    elif record is not None and record.noise_source_k:
        tcal, why = record.noise_source_k, f"loads record {record.name}"
    elif source_kind == "sim":
        tcal, why = cfg["sim"]["noise_source_k"], "sim.noise_source_k (simulated)"
    else:
        raise ConfigError("config calibration.noise_source_k is not given (0): calibration.tsys_from"
                          " = 'noise_source' needs the noise source's excess temperature in K "
                          "(> 0), or a hot/cold record that measured it, or tsys_from = 'loads' "
                          "or 'fixed'")
    if source_kind == "rtlsdr" and cal["switch"] == "none":
        raise ConfigError("config calibration.switch = 'none': calibration.tsys_from = "
                          "'noise_source' needs a way to switch it ('command' or 'gpio')")
    cards = {"TCAL": tcal, "TCALSRC": why, "CALEVERY": cal["cal_interval_s"],
             "CALON": cal["cal_on_s"]}
    if record is not None and why.startswith("loads"):
        cards.update(loads_mod.header_cards(record))
    return TsysPlan("noise_source", tcal_k=tcal, cards=cards,
                    text=f"noise source, TCAL {tcal:g} K from {why}", record=record)


class Pointing:
    """Resolves the configured pointing to a sky position at any time."""

    def __init__(self, cfg: dict, location, t_start: Time):
        p = cfg["pointing"]
        self.frame, self.lon, self.lat = p["frame"], p["lon"], p["lat"]
        if self.frame == "auto":
            self.frame, self.lon, self.lat = "galactic", coordinates.best_plane_longitude(
                location, t_start, p["min_elevation"]), 0.0
        self.location = location
        self.object = p["object"] or self._name()

    def _name(self) -> str:
        if self.frame == "galactic":
            return f"G{self.lon % 360:05.1f}{self.lat:+05.1f}"
        if self.frame == "radec":
            return f"RA{self.lon:06.2f}DEC{self.lat:+06.2f}"
        return f"AZ{self.lon:05.1f}EL{self.lat:04.1f}"

    def __call__(self, t: Time):
        return coordinates.pointing_coord(self.frame, self.lon, self.lat, self.location, t)



_LEAKAGE_CHANNELS = 2     # neighbours flagged beside a steady strong carrier (filterbank leakage)


def _widen(mask: np.ndarray, k: int) -> np.ndarray:
    """``mask`` grown by ``k`` channels on each side."""
    out = mask.copy()
    for d in range(1, k + 1):
        out[d:] |= mask[:-d]
        out[:-d] |= mask[d:]
    return out


def _as_words(args: dict) -> str:
    """Command arguments as ``key=value`` words, for the event log."""
    return " ".join(f"{k}={v}" for k, v in sorted(args.items()))


class Daemon:
    """One observation run; see :meth:`run`."""

    def __init__(self, cfg: dict, fast: bool = False, duration_s: float | None = None,
                 log=None):
        self.cfg = cfg
        self.fast = fast
        self.duration_s = duration_s
        self.log = log or (lambda msg: print(msg, file=sys.stderr, flush=True))
        self.events: list = []          # (severity, text), newest last
        self.stop_event = threading.Event()
        self.publisher = None
        self.supervisor = Supervisor(self.event, self.log, on_fatal=self.stop_event.set)
        self.result = RunResult()       # what run() did so far (read after a failure too)
        self.out_dir = check_output_dir(Path(cfg["output"]["dir"]))
        self.source = make_source(cfg, fast=fast)
        site = cfg["site"]
        self.location = coordinates.site_location(site["lat"], site["lon"], site["height_m"])
        t_start = getattr(self.source, "t_start", None) or Time.now()
        self.t_start = t_start
        self.tsys_plan = plan_tsys(cfg, self.source.kind, float(Time.now().unix))
        try:
            self.switch = make_noise_switch(cfg["calibration"])
        except ValueError as exc:
            raise ConfigError(str(exc)) from None
        if hasattr(self.source, "cal"):
            self.source.cal = CalControl(self.switch if self.switch.can_switch else None,
                                         event=self.event)
        self.pointing = Pointing(cfg, self.location, t_start)
        if self.pointing.frame != "azel":
            el = coordinates.describe(self.pointing(t_start), self.location, t_start)["ELEVATIO"]
        else:
            el = self.pointing.lat
        if el < cfg["pointing"]["min_elevation"]:
            raise ConfigError(f"pointing {self.pointing.object}: elevation {el:.1f} deg at "
                              f"{t_start.isot[:19]} UTC is below pointing.min_elevation = "
                              f"{cfg['pointing']['min_elevation']:g} deg")
        if hasattr(self.source, "pointing"):
            self.source.pointing = self.pointing
        eop = coordinates.check_eop(t_start)
        if eop:
            self.event("warning", eop)
        sp = cfg["spectrometer"]
        self.nchan = sp["channels"]
        self.spectrometer = Spectrometer(self.nchan, sp["method"], sp["taps"],
                                         FlagSettings.from_config(cfg["rfi"]))
        rfi = cfg["rfi"]
        self.carriers = (CarrierFinder(self.nchan, rfi["carrier_sigma"], rfi["carrier_history"])
                         if rfi["carriers"] else None)
        self._carrier_freqs: dict = {}     # phase -> set of sky frequencies flagged last time
        self.rfi_totals = {"impulses": 0, "carrier_onsets": 0, "sk_cells": 0, "blanked_spectra": 0}
        sch = self.source.schedule
        block_s = self.source.block_samples / cfg["source"]["sample_rate"]
        self.block_s = block_s
        cycle = sch.blocks_per_cycle
        self.blocks_per_integration = cycle * max(1, math.ceil(sp["integration_s"] / (block_s * cycle)))
        self.meter = (TsysMeter(cycle, self.nchan, self.tsys_plan.tcal_k, self._emission_mask)
                      if self.tsys_plan.kind == "noise_source" else None)
        if self.tsys_plan.kind == "noise_source" and self.switch.can_switch:
            try:                      # prove the switch works (it turns the source off)
                self.switch.open()
            except (NoiseSwitchError, OSError) as exc:
                raise ConfigError(f"noise source switch failed at start-up: {exc}") from None
        self._live_setup()
        self.state = "observing"        # observing, paused, idle or stopping
        self.commands: queue.Queue = queue.Queue()
        self.scan_name = None
        self.integ_blocks = 0           # blocks in the integration being made
        self.total_blocks = 0           # blocks observed (paused and idle ones not counted)
        self.started_mono = _time.monotonic()
        self.counters = {"received": 0, "lost": 0, "dropped": 0, "error": None}
        self.notifier = sd_notify.Notifier.from_env(log=self.log)
        self.store = None
        self.row_index = 0
        self.average = RunningAverage()
        self._pending_log: list = []    # interference log records of the row being made
        self.tsys_now = None            # newest good TsysMeasurement
        self.pending: list = []         # integrations waiting for the first measurement
        self._warned: set = set()
        self._scan_names: set = set()   # scan names used in this run

    def _emission_mask(self, phase: str, t_unix_s: float) -> np.ndarray:
        """bool[nchan]: channels of ``phase`` where HI of the current pointing may appear."""
        t = Time(t_unix_s, format="unix", scale="utc")
        coord = self.pointing(t)
        pos = coordinates.describe(coord, self.location, t)
        vframe = coordinates.vframe_lsrk_m_s(coord, self.location, t)
        v_lo, v_hi = expected_velocity_range_km_s(pos["GLON"], pos["GLAT"])
        sch = self.source.schedule
        f = sch.lo_of(phase) + (np.arange(self.nchan) - self.nchan // 2) * sch.channel_hz
        v = (radio_velocity_m_s(f) + vframe) / 1e3
        return (v >= v_lo) & (v <= v_hi)

    def event(self, severity: str, text: str) -> None:
        """An event the observer must see: logged now (and kept for the publisher)."""
        self.events.append((severity, text))
        del self.events[:-200]
        self.log(f"{severity}: {text}")
        if getattr(self, "publisher", None) is not None:
            self.publisher.publish("event", {"severity": severity, "text": text,
                                             "time_utc": schema.now_utc_iso(), "station": ""})

    # -- the threads -----------------------------------------------------------------------
    def _put_waiting(self, q: queue.Queue, item) -> bool:
        """Queue ``item``, waiting for room; False if a stop came first."""
        while not self.stop_event.is_set():
            try:
                q.put(item, timeout=0.2)
                return True
            except queue.Full:
                continue
        return False

    def _reader(self, q: queue.Queue, counters: dict) -> None:
        """The reader thread: blocks into ``q`` (its body runs again after a failure, see
        :mod:`spinflip.daemon.run.supervisor`), then the end marker."""
        try:
            self.supervisor.guard("reader", lambda: self._read_blocks(q, counters))()
        finally:
            q.put(_STOP)

    def _read_blocks(self, q: queue.Queue, counters: dict) -> None:
        try:
            while not self.stop_event.is_set():
                try:
                    block = self.source.read()
                except SourceError as exc:
                    if not hasattr(self.source, "reopen"):
                        raise
                    lost_at = _time.monotonic()
                    if not self._put_waiting(q, ("lost", str(exc))) or not self._reconnect():
                        break
                    self._put_waiting(q, ("back", _time.monotonic() - lost_at))
                    continue
                if block is None:
                    break
                if self.fast:
                    self._put_waiting(q, block)
                else:
                    try:
                        q.put_nowait(block)
                    except queue.Full:
                        counters["dropped"] += block.n_samples
        except (SourceError, OSError) as exc:
            counters["error"] = exc

    def _reconnect(self) -> bool:
        """Reopen a lost source, waiting 1, 2, 4 ... s (at most ``source.reconnect_max_s``)
        between attempts; True once it delivers again, False if a stop came first."""
        wait_s, cap_s = 1.0, self.cfg["source"]["reconnect_max_s"]
        attempt = 0
        while not self.stop_event.wait(wait_s):
            attempt += 1
            try:
                self.source.reopen()
                return True
            except (SourceError, OSError) as exc:
                self.log(f"info: reconnection attempt {attempt} failed ({str(exc).splitlines()[0]});"
                         f" next in {min(2 * wait_s, cap_s):.0f} s")
            wait_s = min(2 * wait_s, cap_s)
        return False

    # -- one row ---------------------------------------------------------------------------
    def _warn_once(self, key: str, severity: str, text: str) -> None:
        if key not in self._warned:
            self._warned.add(key)
            self.event(severity, text)

    def _tsys_for(self, t_end_s: float) -> tuple[float, float, bool]:
        """(T_sys for the kelvin scale, its age in s (NaN if not measured), trustworthy)."""
        plan = self.tsys_plan
        if plan.kind == "fixed":
            return plan.tsys_k, float("nan"), True
        if plan.kind == "loads":       # records are dated by the wall clock, so is their age
            age = _time.time() - plan.record.time_unix_s
            if age > self.cfg["calibration"]["max_record_age_s"]:
                self._warn_once("old-record", "error", f"calibration record {plan.record.name} "
                                "is now older than calibration.max_record_age_s: rows are saved "
                                "fully flagged; repeat the hot/cold calibration (spinflip loads)")
                return plan.tsys_k, age, False
            return plan.tsys_k, age, True
        if plan.kind == "none" or self.tsys_now is None:
            return float("nan"), float("nan"), False
        age = t_end_s - self.tsys_now.t_unix_s
        return self.tsys_now.tsys_k, age, age <= self.cfg["calibration"]["tsys_max_age_s"]

    def _row(self, integ) -> dict:
        from spinflip.daemon.calibration.kelvin import fold_spoiled
        cfg = self.cfg
        sch = self.source.schedule
        switched = sch.mode == "frequency"
        tsys, age, trusted = self._tsys_for(integ.t_last_s)
        scale_k = tsys if np.isfinite(tsys) else cfg["calibration"]["tsys_k"]
        t_mid = Time((integ.t_first_s + integ.t_last_s) / 2, format="unix", scale="utc")
        bad, n_carrier, log = self._interference(integ, t_mid)
        spec = calibrate(integ, self.nchan, sch.shift_channels, switched, scale_k,
                         False, cfg["calibration"]["main_beam_efficiency"], bad=bad)
        coord = self.pointing(t_mid)
        pos = coordinates.describe(coord, self.location, t_mid)
        vframe = coordinates.vframe_lsrk_m_s(coord, self.location, t_mid)
        fs = self.source.schedule.channel_hz * self.nchan
        flagged = spec.flagged
        if spec.unit == "K" and not trusted:
            flagged = np.ones_like(flagged)      # on no trustworthy scale: kept, all flagged
            if not np.isfinite(tsys):
                self._warn_once("no-tsys", "error", "no system temperature measured yet: rows are"
                                f" saved fully flagged, scaled with calibration.tsys_k = "
                                f"{cfg['calibration']['tsys_k']:g} K as a placeholder")
            elif self.tsys_plan.kind == "noise_source":
                self._warn_once("old-tsys", "error", f"newest system temperature is {age:.0f} s old"
                                f" (> calibration.tsys_max_age_s): rows are saved fully flagged")
        if pos["ELEVATIO"] < cfg["pointing"]["min_elevation"]:
            flagged = np.ones_like(flagged)
            self._warn_once("low-el", "error", f"{self.pointing.object} is at elevation "
                            f"{pos['ELEVATIO']:.1f} deg, below pointing.min_elevation = "
                            f"{cfg['pointing']['min_elevation']:g} deg: rows are saved fully flagged")
        # interference apart from fold coverage: the baseband channels flagged for it (carriers,
        # spurs, masks; every spectrum removed by SK or blanking), not the DC channel flagged by
        # name, carried through the fold onto the covered channels they spoil
        dc = np.zeros(self.nchan, dtype=bool)
        dc[self.nchan // 2] = cfg["rfi"]["flag_dc"]
        rfi_base = np.zeros(self.nchan, dtype=bool)
        for mask in bad.values():
            rfi_base |= mask
        for ph in integ.sums.values():
            if ph.spectra:
                rfi_base |= ph.m == 0
        rfi_flagged = fold_spoiled(rfi_base & ~dc, sch.shift_channels, spec.folded)
        crpix1 = self.nchan // 2 + 1.0
        cdelt1 = fs / self.nchan
        fl = integ.flags
        crval1a, cdelt1a = velocity_wcs_m_s(sch.sig_lo_hz, cdelt1, HI_REST_FREQ_HZ, vframe)
        row = {
            "DATA": spec.data, "FLAGGED": flagged,
            "TSYS": tsys,
            "EXPOSURE": spec.exposure_s,
            "DATE-OBS": t_mid.isot,
            "CRVAL1": sch.sig_lo_hz, "CDELT1": cdelt1, "CRPIX1": crpix1,
            "CTYPE1": "FREQ", "RESTFREQ": HI_REST_FREQ_HZ, "VFRAME": vframe,
            "OBJECT": self.pointing.object, **pos,
            "CRVAL1A": crval1a, "CDELT1A": cdelt1a, "CRPIX1A": crpix1,
            "TSYSAGE": age,
            "LOSTSAMP": int(integ.lost_samples), "BLANKSMP": int(integ.blanked_samples),
            "CALSTATE": int(integ.cal_s > 0), "CALTIME": float(integ.cal_s),
            "UNKNTIME": float(integ.unknown_s), "FOLDED": int(spec.folded),
            "CHANEXP": spec.chan_exposure_s,
            "FLAGTIME": fl.blanked / fl.spectra if fl.spectra else 0.0,
            "FLAGFREQ": float(np.mean(flagged)),
            "RFIFRAC": float(np.mean(rfi_flagged)),
            "UNCOVFR": float(np.mean(~spec.covered)),
            "SKFRAC": fl.sk_cells / (fl.blocks * self.nchan) if fl.blocks else 0.0,
            "NIMPULSE": int(fl.impulses), "NCARRIER": int(n_carrier),
        }
        for rec in log:
            rec["DATE-OBS"] = row["DATE-OBS"]
            self._pending_log.append(("rfi", rec))
        return row

    def _interference(self, integ, t_mid: Time):
        """Per phase: channels flagged by name or as carriers; the count; log records."""
        from spinflip.daemon.rfi.carriers import lo_channels
        cfg, sch = self.cfg["rfi"], self.source.schedule
        bad, n_carrier, log = {}, 0, []
        fl = integ.flags
        self.rfi_totals["impulses"] += fl.impulses
        self.rfi_totals["sk_cells"] += fl.sk_cells
        self.rfi_totals["blanked_spectra"] += fl.blanked
        if fl.impulses:
            log.append({"KIND": "impulses", "FREQ": float("nan"), "VALUE": float(fl.impulses),
                        "TEXT": f"{fl.blanked} spectra blanked"})
        if fl.sk_cells and fl.blocks:
            frac = fl.sk_cells / (fl.blocks * self.nchan)
            log.append({"KIND": "sk", "FREQ": float("nan"), "VALUE": frac,
                        "TEXT": f"{fl.sk_cells} channel-blocks removed"})
        for phase, ph in integ.sums.items():
            if not ph.spectra:
                continue
            lo = ph.lo_hz
            mask = named_channels(lo, self.nchan, sch.channel_hz, cfg["flag_dc"], cfg["spurs_hz"],
                                  cfg["masks_mhz"])
            # a channel SK removed in most blocks is a strong steady carrier, whose leakage
            # reaches neighbours SK may miss; the shape search finds the weaker ones. Neither
            # looks at the LO channels: the receiver's LO leakage there is a steady tone near
            # the SK threshold, removed in a varying share of blocks (carriers.lo_channels)
            carrier = ((ph.sk_hits > 0.5 * ph.blocks) & ~lo_channels(self.nchan) if ph.blocks
                       else np.zeros(self.nchan, bool))
            mask |= _widen(carrier, _LEAKAGE_CHANNELS)
            if self.carriers is not None:
                protected = self._emission_mask(phase, float(t_mid.unix))
                found = self.carriers.find((phase, lo), ph.mean(), ph.m, protected)
                mask |= found
                carrier = carrier | found
            n_carrier += int(carrier.sum())
            chans = np.flatnonzero(carrier)
            sky = dict(zip(np.round(lo + (chans - self.nchan // 2) * sch.channel_hz, 0), chans))
            freqs = set(sky)
            z = None
            if self.carriers is not None:            # excess of those the shape search found
                z = np.where(found, self.carriers.last_z.get(phase), np.nan)
            before = self._carrier_freqs.get(phase, set())
            for f in sorted(freqs - before):
                strength = float(z[sky[f]]) if z is not None and np.isfinite(z[sky[f]]) else \
                    float("nan")                  # NaN: removed by spectral kurtosis
                log.append({"KIND": "carrier-on", "FREQ": float(f), "VALUE": strength,
                            "TEXT": f"{phase} phase"})
            for f in sorted(before - freqs):
                log.append({"KIND": "carrier-off", "FREQ": float(f), "VALUE": 0.0,
                            "TEXT": f"{phase} phase"})
            self.rfi_totals["carrier_onsets"] += len(freqs - before)
            self._carrier_freqs[phase] = freqs
            bad[phase] = mask
        return bad, n_carrier, log

    def _finish(self, integ, rows_q: queue.Queue, result: RunResult, observed_s: float) -> None:
        """Hand a finished integration on: now, or after the first T_sys measurement."""
        result.rows += 1
        result.observed_s += observed_s
        if self.meter is not None and self.tsys_now is None and not self._gave_up_waiting:
            self.pending.append(integ)
            return
        self._put_row(integ, rows_q)

    def _put_row(self, integ, rows_q: queue.Queue) -> None:
        row = self._row(integ)
        rows_q.put(row)
        for item in self._pending_log:
            rows_q.put(item)
        self._pending_log.clear()
        self.last_row = row
        if self.publisher is not None:
            unit = "K" if self.source.schedule.mode == "frequency" else "count"
            scan = self.scan_name or ""
            self.average.add(row, self.nchan)
            self.publisher.publish(*spectrum_message(row, self.nchan, "integration", scan,
                                                     self.row_index, unit))
            self.publisher.publish(*spectrum_message(row, self.nchan, "average", scan,
                                                     self.row_index, unit, self.average))
        self.row_index += 1

    def _flush_pending(self, rows_q: queue.Queue) -> None:
        for integ in self.pending:
            self._put_row(integ, rows_q)
        self.pending.clear()

    def _on_measurement(self, meas, rows_q: queue.Queue) -> None:
        rec = {"DATE-OBS": Time(meas.t_unix_s, format="unix", scale="utc").isot,
               "TSYS": meas.tsys_k, "TSYSSIG": meas.tsys_phase_k.get("sig", float("nan")),
               "TSYSREF": meas.tsys_phase_k.get("ref", float("nan")), "TCAL": meas.tcal_k,
               "ONOFF": meas.on_off, "NCHANUSE": meas.channels_used,
               "STATUS": "ok" if meas.ok else meas.message[:60], "TSYSCHAN": meas.tsys_chan_k}
        rows_q.put(("tsys", rec))
        if meas.ok:
            self.tsys_now = meas
            self._flush_pending(rows_q)
        else:
            self.event("error", meas.message)
            if self.pending:
                self._gave_up_waiting = True
                self._flush_pending(rows_q)

    def _header(self) -> dict:
        cfg = self.cfg
        site = cfg["site"]
        sch = self.source.schedule
        unit = "K" if sch.mode == "frequency" else "count"
        eta = cfg["calibration"]["main_beam_efficiency"]
        head = {
            "TELESCOP": site["telescope"], "SITENAME": site["name"],
            "SITELAT": site["lat"], "SITELONG": site["lon"], "SITEELEV": site["height_m"],
            "SPECSYS": "TOPOCENT", "SSYSOBS": "TOPOCENT", "VELDEF": "RADI-LSR", "BUNIT": unit,
            "CTYPE1A": "VRAD", "CUNIT1A": "m/s", "SPECSYSA": "LSRK",
            "SOURCE": self.source.kind, "SWMODE": sch.mode, "SWOFFSET": sch.shift_channels *
            sch.channel_hz, "SWDWELL": sch.blocks_per_dwell * self.block_s,
            "CHANMETH": cfg["spectrometer"]["method"], "PFBTAPS": cfg["spectrometer"]["taps"],
            "TSYSSRC": self.tsys_plan.text,
            "TEMPSCAL": ("TMB" if eta < 1 else "TA") if unit == "K" else "COUNTS",
            "BEAMEFF": eta,
            "CALSWTCH": self.switch.describe() if self.tsys_plan.kind == "noise_source" else "none",
            "SAMPRATE": self.cfg["source"]["sample_rate"], "GAIN": cfg["source"]["gain"],
            "PNTFRAME": self.pointing.frame,
        }
        head.update(self.tsys_plan.cards)
        return head

    def _end_integration(self, rows_q: queue.Queue, result: RunResult, why: str) -> None:
        """Close the integration being made: kept as a shorter row if it holds at least one
        whole switching cycle (its EXPOSURE says how long), else dropped and said so."""
        partial = self.integ_blocks
        self.integ_blocks = 0
        if partial >= self.source.schedule.blocks_per_cycle:
            self._finish(self.spectrometer.take(), rows_q, result, partial * self.block_s)
        else:
            self.spectrometer.take()
            if partial:
                self.log(f"note: the unfinished integration ({partial * self.block_s:.1f} s) "
                         f"was dropped ({why}): shorter than one switching cycle")

    def _restart_stream(self) -> None:
        """After a gap (pause, idle, new pointing): no spectrum or Tsys firing spans it."""
        self.spectrometer.restart()
        if self.meter is not None:
            self.meter.reset()

    # -- the run ---------------------------------------------------------------------------
    def run(self) -> RunResult:
        """Acquire until the duration is reached, the source ends, or a stop signal."""
        result = self.result = RunResult()
        self._gave_up_waiting = False
        try:
            self.source.open()        # a source that cannot start leaves nothing behind
        except BaseException:
            self.switch.close()
            raise
        try:
            self._live_start()
        except BaseException:
            self.source.close()
            self.switch.close()
            raise
        products = functools.partial(scan_products, baseline_cfg=self.cfg["baseline"])
        result.recovered = archive.recover(self.out_dir, products=products, report=self.event)
        blocks_q: queue.Queue = queue.Queue(maxsize=_QUEUE_BLOCKS)
        self.store = ScanStore(self.out_dir, self.nchan, products, self.event,
                               hold_bytes=int(self.cfg["output"]["hold_mb"] * 1e6),
                               on_open=self._scan_opened, guard=self.supervisor.guard)
        rows_q = self.store            # the DSP loop only ever put()s into it
        self._blocks_q = blocks_q
        counters = self.counters
        reader = threading.Thread(target=self._reader, args=(blocks_q, counters), daemon=True,
                                  name="reader")
        self.supervisor.install_excepthook()
        reader.start()
        self.store.start()
        self._open_scan(rows_q, self.t_start)
        max_blocks = None if self.duration_s is None else max(
            1, round(self.duration_s / self.block_s))
        self._heartbeat = sd_notify.Heartbeat(_WATCHDOG_STALL_S)   # the main loop's pulse
        pinger = self._systemd_start()
        try:
            while not self.stop_event.is_set():
                self._heartbeat.beat()
                self._run_commands(rows_q, result)
                self._systemd_status()
                try:
                    block = blocks_q.get(timeout=0.2)
                except queue.Empty:
                    continue
                if block is _STOP:
                    if counters["error"] is None and not self.stop_event.is_set():
                        self._end_integration(rows_q, result, "the source ended")   # replay
                    break
                if isinstance(block, tuple):          # ("lost", why) / ("back", seconds)
                    self._source_fault(block, rows_q, result)
                    continue
                counters["received"] += block.n_samples
                counters["lost"] += block.lost_before
                result.lost_samples += block.lost_before
                self._last_block_end = block.t0_unix_s + block.duration_s
                if block.clock_step_s:
                    self._clock_stepped(block, rows_q, result)
                if self.state != "observing":
                    continue
                s1, m = self.spectrometer.add(block)
                if self.meter is not None:
                    meas = self.meter.add(block, s1, m)
                    if meas is not None:
                        self._on_measurement(meas, rows_q)
                self.integ_blocks += 1
                self.total_blocks += 1
                if self.integ_blocks >= self.blocks_per_integration:
                    self.integ_blocks = 0
                    self._finish(self.spectrometer.take(), rows_q, result,
                                 self.blocks_per_integration * self.block_s)
                if max_blocks is not None and self.total_blocks >= max_blocks:
                    self._end_integration(rows_q, result, "planned end")
                    break
        finally:
            stopped_by_signal = self.stop_event.is_set() and self.supervisor.fatal is None
            self.stop_event.set()
            self.state = "stopping"
            self.notifier.stopping("stopping: writing the scan")
            try:
                if self.integ_blocks:
                    self._end_integration(rows_q, result, "stop signal" if stopped_by_signal
                                          else "stopped by a failure")
            finally:
                if self.pending:           # no measurement ever came: keep them, fully flagged
                    self._gave_up_waiting = True
                    self._flush_pending(rows_q)
                self.store.finish()
                if pinger is not None:
                    pinger.stop()
                self.notifier.close()
                reader.join(timeout=5)
                self.source.close()
                self.switch.close()
                self._live_stop()
                self.supervisor.remove_excepthook()
        result.files, result.file_rows = self.store.files, self.store.file_rows
        result.lost_samples += counters["dropped"]
        unsaved = self._unsaved_text()
        if self.supervisor.fatal is not None:
            raise WorkerFailed(f"the {self.supervisor.fatal.worker} thread failed "
                               f"({self.supervisor.fatal.text})" + (f"; {unsaved}" if unsaved
                                                                    else ""))
        if unsaved:
            raise OSError(f"writing {self.out_dir}: {unsaved}")
        if counters["error"] is not None:
            raise SourceError(str(counters["error"]))
        return result

    def _unsaved_text(self) -> str:
        """What the store could not save, by cause; '' when everything finished is saved."""
        st = self.store
        parts = []
        if st.unsaved_rows:
            parts.append(f"{st.unsaved_rows} still held when the disk kept refusing "
                         f"({st.error or 'write error'})")
        if st.dropped_rows:
            parts.append(f"{st.dropped_rows} dropped at the memory bound output.hold_mb")
        if st.failed_rows:
            parts.append(f"{st.failed_rows} failed to write (see the log)")
        n = st.unsaved_rows + st.dropped_rows + st.failed_rows
        return f"{n} integration(s) could not be saved: " + ", ".join(parts) if n else ""

    # -- faults ------------------------------------------------------------------------------
    def _source_fault(self, marker: tuple, rows_q, result: RunResult) -> None:
        """The reader lost the source (``("lost", why)``) or got it back (``("back", s)``)."""
        kind, what = marker
        if kind == "lost":
            self.event("error", f"source lost: {what}; every finished integration is saved, "
                       "reconnecting")
            self._state_before_loss = self.state
            if self.state in ("observing", "paused"):
                self._end_integration(rows_q, result, "source lost")
                self._flush_before_switch(rows_q)
                rows_q.put(("close",))
                self.scan_name = None
                self.state = "reconnecting"
        else:
            self.event("info", f"source back after {what:.0f} s: a new scan segment begins")
            self._restart_stream()
            if self.state == "reconnecting":
                self.state = self._state_before_loss
                self._open_scan(rows_q, Time.now())

    def _clock_stepped(self, block, rows_q, result: RunResult) -> None:
        """Record a step of the system clock; after a forward one no integration spans it."""
        step = block.clock_step_s
        t = Time(block.t0_unix_s, format="unix", scale="utc").isot
        if step > 0:
            text = (f"system clock stepped forward by {step:.1f} s at {t[:19]}: timestamps "
                    "follow it from here; the integration in progress ends at the step")
            self._end_integration(rows_q, result, "clock step")
            self._restart_stream()
        else:
            text = (f"system clock stepped back by {-step:.1f} s near {t[:19]}: timestamps keep "
                    f"counting, now {-step:.1f} s ahead of the system clock; check time sync")
        self.event("warning", text)
        if self.scan_name is not None:
            rows_q.put(("note", {"DATE-OBS": t, "TEXT": text}))

    # -- systemd ---------------------------------------------------------------------------
    def _systemd_start(self):
        """READY=1 (and the watchdog pinger) once observing, when run by systemd."""
        n = self.notifier
        self._sd_status_at = _time.monotonic()
        if not n.enabled:
            return None
        n.ready(f"observing {self.pointing.object}")
        if n.watchdog_interval_s is None:
            return None
        pinger = sd_notify.WatchdogPinger(n, alive=self._heartbeat.alive, log=self.log,
                                          guard=self.supervisor.guard)
        pinger.start()
        return pinger

    def _systemd_status(self) -> None:
        """A STATUS= line for ``systemctl status`` every few seconds."""
        if not self.notifier.enabled or _time.monotonic() - self._sd_status_at < 5.0:
            return
        self._sd_status_at = _time.monotonic()
        tsys = self.tsys_now.tsys_k if self.tsys_now is not None else float("nan")
        lost = self.counters["lost"] + self.counters["dropped"]
        self.notifier.status(f"{self.state}, scan {self.scan_name or 'none'}: "
                             f"{self.row_index} integrations, Tsys {tsys:.1f} K, "
                             f"{lost} samples lost, writing {self.store.state}")

    def _scan_opened(self, name: str) -> None:
        """The writer opened the scan under ``name`` (with -1, -2 ... if the name was taken)."""
        if self.scan_name is not None:
            self.scan_name = name

    # -- scans -------------------------------------------------------------------------------
    def _flush_before_switch(self, rows_q: queue.Queue) -> None:
        """Rows still waiting for a first Tsys belong to the scan being closed: write them
        there now (fully flagged, as at the end of a run)."""
        if self.pending:
            self._gave_up_waiting = True
            self._flush_pending(rows_q)
            self._gave_up_waiting = False

    def _open_scan(self, rows_q: queue.Queue, t: Time) -> None:
        """Start a new scan file (named after its start time; the writer adds -1, -2 if taken)."""
        self._flush_before_switch(rows_q)
        base = name = "scan-" + t.strftime("%Y%m%dT%H%M%S")
        k = 0                 # the name the file will have, so a control reply can say it
        while name in self._scan_names or any(
                (self.out_dir / f"{name}{ext}").exists() for ext in (".fits", ".journal")):
            k += 1
            name = f"{base}-{k}"
        self._scan_names.add(name)
        self.scan_name = name
        self.average.reset()
        self.row_index = 0
        rows_q.put(("open", name, self._header()))

    def _now(self) -> Time:
        end = getattr(self, "_last_block_end", None)
        return Time(end, format="unix", scale="utc") if end else self.t_start

    # -- control commands (applied by the DSP loop between blocks) ---------------------------
    def submit(self, cmd: str, args: dict, timeout_s: float = 5.0) -> dict:
        """Run a control command in the DSP loop and wait for its result (or CommandError)."""
        from spinflip.daemon.live.control import CommandError
        if cmd == "status":
            return self.status()
        box = {"done": threading.Event()}
        self.commands.put((cmd, args, box))
        if not box["done"].wait(timeout_s):
            raise CommandError(f"{cmd}: the daemon did not get to it within {timeout_s:g} s")
        if "error" in box:
            raise CommandError(box["error"])
        return box["result"]

    def _run_commands(self, rows_q: queue.Queue, result: RunResult) -> None:
        while True:
            try:
                cmd, args, box = self.commands.get_nowait()
            except queue.Empty:
                return
            try:
                box["result"] = self._apply(cmd, args, rows_q, result)
                if cmd != "annotate":
                    self.event("info", f"control: {cmd} {_as_words(args)}".rstrip()
                               + f" -> {self.state}, scan {self.scan_name or 'none'}")
            except (ValueError, ConfigError) as exc:
                box["error"] = str(exc).splitlines()[0]
            except Exception as exc:  # a command must never stop acquisition
                box["error"] = f"{cmd} failed: {exc}"
            box["done"].set()

    def _apply(self, cmd: str, args: dict, rows_q: queue.Queue, result: RunResult) -> dict:
        state = self.state
        if cmd == "pause":
            if state != "observing":
                raise ValueError(f"pause: the daemon is {state}, not observing")
            self._end_integration(rows_q, result, "paused")
            self.state = "paused"
        elif cmd == "resume":
            if state != "paused":
                raise ValueError(f"resume: the daemon is {state}, not paused")
            self._restart_stream()
            self.state = "observing"
        elif cmd == "stop":
            if state not in ("observing", "paused", "reconnecting"):
                raise ValueError(f"stop: the daemon is {state}; nothing to stop")
            if state != "reconnecting":     # a lost source's scan is closed already
                self._end_integration(rows_q, result, "stopped")
                self._flush_before_switch(rows_q)
                rows_q.put(("close",))
            self.scan_name = None
            self.state = "idle"
        elif cmd in ("start", "new_scan"):
            if cmd == "start" and state != "idle":
                raise ValueError(f"start: the daemon is already {state} (new_scan starts another)")
            if cmd == "new_scan" and state == "idle":
                raise ValueError("new_scan: the daemon is idle; use start")
            self._end_integration(rows_q, result, "new scan")
            self._restart_stream()
            self._open_scan(rows_q, self._now())
            self.state = "observing"
        elif cmd == "point":
            self._point(args, rows_q, result)
        elif cmd == "set_integration":
            sch = self.source.schedule
            cycle = sch.blocks_per_cycle
            self._end_integration(rows_q, result, "new integration length")
            self.blocks_per_integration = cycle * max(1, math.ceil(
                float(args["seconds"]) / (self.block_s * cycle)))
            return {"integration_s": self.blocks_per_integration * self.block_s}
        elif cmd == "annotate":
            if self.scan_name is None:
                raise ValueError("annotate: no scan is open (start one first)")
            rows_q.put(("note", {"DATE-OBS": self._now().isot, "TEXT": str(args["text"])}))
        elif cmd == "calibrate":
            if self.tsys_plan.kind != "noise_source":
                raise ValueError(f"calibrate: calibration.tsys_from = "
                                 f"'{self.cfg['calibration']['tsys_from']}' has no noise source "
                                 "to fire")
            self.source.fire_now = True
        else:
            raise ValueError(f"{cmd}: not a command this daemon knows")
        return {"state": self.state, "scan": self.scan_name}

    def _point(self, args: dict, rows_q: queue.Queue, result: RunResult) -> None:
        frame, lon, lat = args["frame"], float(args["lon_deg"]), float(args["lat_deg"])
        p = self.cfg["pointing"]
        new = {"frame": frame, "lon": lon, "lat": lat, "object": args.get("object", ""),
               "min_elevation": p["min_elevation"]}
        t = self._now()
        trial = Pointing({"pointing": new}, self.location, t)
        el = lat if frame == "azel" else coordinates.describe(trial(t), self.location, t)["ELEVATIO"]
        if el < p["min_elevation"]:
            raise ValueError(f"point {trial.object}: elevation {el:.1f} deg is below "
                             f"pointing.min_elevation = {p['min_elevation']:g} deg")
        self._end_integration(rows_q, result, "new pointing")
        self.pointing = trial
        if hasattr(self.source, "pointing"):
            self.source.pointing = trial
        self._restart_stream()
        if self.state != "idle":
            self._open_scan(rows_q, t)

    # -- live publishing -----------------------------------------------------------------------
    def _live_setup(self) -> None:
        """Check the endpoints and keys at start-up (ConfigError, exit 2, when refused)."""
        from spinflip.daemon.live.keys import KeysError, ServerSecurity, check_bind
        pub = self.cfg["publish"]
        self.publisher = self.control = self.security = None
        self._insecure = None
        if not (pub["data"] or pub["control"]):
            return
        try:
            self.security = ServerSecurity.from_config(pub)
            for key in ("data", "control"):
                if pub[key]:
                    warning = check_bind(pub[key], self.security, pub["allow_insecure"],
                                         key=f"publish.{key}")
                    self._insecure = warning or self._insecure
        except KeysError as exc:
            raise ConfigError(str(exc)) from None

    def _live_start(self) -> None:
        from spinflip.daemon.live.control import ControlServer
        pub = self.cfg["publish"]
        if not (pub["data"] or pub["control"]):
            return
        if self.security is not None:
            self.security.start(zmq.Context.instance())
        try:
            if pub["data"]:
                self.publisher = Publisher(pub["data"], self.security,
                                           guard=self.supervisor.guard)
                self.publisher.start()
            if pub["control"]:
                self.control = ControlServer(pub["control"], self.submit, self.security,
                                             guard=self.supervisor.guard)
                self.control.start()
        except (PublishError, OSError, RuntimeError) as exc:
            self._live_stop()
            raise ConfigError(str(exc).splitlines()[0]) from None
        if self._insecure:
            self.event("warning", self._insecure)
        self._status_stop = threading.Event()
        self._status_thread = threading.Thread(
            target=self.supervisor.guard("status", self._status_loop), name="status",
            daemon=True)
        self._status_thread.start()

    def _live_stop(self) -> None:
        stop = getattr(self, "_status_stop", None)
        if stop is not None:
            stop.set()
            self._status_thread.join(timeout=2)
        if self.publisher is not None:
            try:
                self.publisher.publish(*self._status_message())
            except Exception:
                pass
            self.publisher.stop()
        if self.control is not None:
            self.control.stop()
        if self.security is not None:
            self.security.stop()

    def _status_loop(self) -> None:
        """Status and progress every second (a failure is the supervisor's: an event, then
        the loop runs again)."""
        while not self._status_stop.wait(1.0):
            if self.publisher is not None:
                self.publisher.publish(*self._status_message())
                self.publisher.publish(*self._progress_message())

    def status(self) -> dict:
        """The daemon's state, as the status message carries it (units in the names)."""
        return self._status_message()[1]

    def _status_message(self):
        from spinflip.daemon.calibration.kelvin import fold_covered
        sch, src = self.source.schedule, self.cfg["source"]
        tsys = self.tsys_now.tsys_k if self.tsys_now is not None else (
            self.tsys_plan.tsys_k if self.tsys_plan.kind in ("fixed", "loads") else None)
        try:
            free = shutil.disk_usage(self.out_dir).free
        except OSError:
            free = -1
        header = {
            "state": self.state, "source": self.source.kind, "lo_hz": sch.sig_lo_hz,
            "gain_db": src["gain"], "sample_rate_hz": src["sample_rate"],
            "tsys_k": float(tsys) if tsys is not None and np.isfinite(tsys) else None,
            "tsys_source": self.tsys_plan.text,
            "samples_received": int(self.counters["received"]),
            "samples_lost": int(self.counters["lost"] + self.counters["dropped"]),
            "queue_depth": int(self._blocks_q.qsize()) if hasattr(self, "_blocks_q") else 0,
            "disk_free_bytes": int(free),
            "writing": self.store.state if self.store is not None else "writing",
            "held_integrations": self.store.held_rows if self.store is not None else 0,
            "dropped_integrations": (self.store.dropped_rows + self.store.failed_rows
                                     if self.store is not None else 0),
            "uptime_s": _time.monotonic() - self.started_mono, "version": __version__,
            "scan": self.scan_name,
            "pointing": {"frame": self.pointing.frame, "lon_deg": self.pointing.lon,
                         "lat_deg": self.pointing.lat, "object": self.pointing.object},
            "drops": dict(self.publisher.drops) if self.publisher is not None else {},
            "worker_failures": self.supervisor.counts(),
            "rfi": dict(self.rfi_totals), "time_utc": schema.now_utc_iso(), "station": "",
        }
        # the newest integration: interference apart from the channels the fold does not cover
        last = getattr(self, "last_row", None)
        rfi = header["rfi"]
        rfi["flagged_rfi_fraction"] = float(last["RFIFRAC"]) if last is not None else None
        rfi["uncovered_fraction"] = float(last["UNCOVFR"]) if last is not None else None
        rfi["uncovered_hz"] = None
        if last is not None and last["FOLDED"]:
            k = np.flatnonzero(~fold_covered(self.nchan, sch.shift_channels))
            if k.size:
                f = sch.sig_lo_hz + (k - self.nchan // 2) * sch.channel_hz
                rfi["uncovered_hz"] = [float(f.min()), float(f.max())]
        return "status", header, {}

    def _progress_message(self):
        integ_total = self.blocks_per_integration * self.block_s
        elapsed = self.integ_blocks * self.block_s
        scan_elapsed = self.total_blocks * self.block_s
        total = self.duration_s
        eta = None if total is None else max(0.0, total - scan_elapsed)
        header = {"scan": self.scan_name, "integration": int(self.row_index),
                  "integration_elapsed_s": elapsed, "integration_total_s": integ_total,
                  "scan_elapsed_s": scan_elapsed, "scan_total_s": total, "eta_s": eta,
                  "time_utc": schema.now_utc_iso(), "station": ""}
        return "progress", header, {}

    def install_signal_handlers(self) -> None:
        def _stop(signum, _frame):
            self.log(f"received signal {signum}: finishing")
            self.stop_event.set()
        signal.signal(signal.SIGTERM, _stop)
        signal.signal(signal.SIGINT, _stop)
