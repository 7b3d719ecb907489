"""The acquisition daemon's main loop: source -> spectrometer -> calibrator -> archive.

Threads: a reader thread pulls Blocks from the source into a bounded queue; the DSP loop (the
calling thread; numpy releases the GIL) consumes it; finished rows go to a writer thread whose
journal append (with fsync) never blocks the DSP loop. For a live source (the dongle, or the
simulator in real time) a full queue drops the block and counts its samples as lost; in
``--fast`` mode the reader waits instead, since simulated time does not run away.
"""

from __future__ import annotations

import math
import queue
import signal
import sys
import threading
from dataclasses import dataclass, field
from pathlib import Path

from astropy.time import Time

from . import archive, frames
from .calibrate import calibrate
from .config import ConfigError
from .lines import HI_REST_FREQ_HZ
from .sources import SourceError, make_source
from .spectrometer import Spectrometer

_QUEUE_BLOCKS = 8                # about 0.9 s of samples at 2.4 MS/s
_STOP = object()


@dataclass
class RunResult:
    files: list = field(default_factory=list)
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


class Pointing:
    """Resolves the configured pointing to a sky position at any time."""

    def __init__(self, cfg: dict, location, t_start: Time):
        p = cfg["pointing"]
        self.frame, self.lon, self.lat = p["frame"], p["lon"], p["lat"]
        if self.frame == "auto":
            self.frame, self.lon, self.lat = "galactic", frames.best_plane_longitude(
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
        return frames.pointing_coord(self.frame, self.lon, self.lat, self.location, t)



class Daemon:
    """One observation run; see :meth:`run`."""

    def __init__(self, cfg: dict, fast: bool = False, duration_s: float | None = None,
                 log=None):
        self.cfg = cfg
        self.fast = fast
        self.duration_s = duration_s
        self.log = log or (lambda msg: print(msg, file=sys.stderr, flush=True))
        self.stop_event = threading.Event()
        self.out_dir = check_output_dir(Path(cfg["output"]["dir"]))
        self.source = make_source(cfg, fast=fast)
        site = cfg["site"]
        self.location = frames.site_location(site["lat"], site["lon"], site["height_m"])
        t_start = getattr(self.source, "t_start", None) or Time.now()
        self.t_start = t_start
        self.pointing = Pointing(cfg, self.location, t_start)
        if self.pointing.frame != "azel":
            el = frames.describe(self.pointing(t_start), self.location, t_start)["ELEVATIO"]
        else:
            el = self.pointing.lat
        if el < cfg["pointing"]["min_elevation"]:
            raise ConfigError(f"pointing {self.pointing.object}: elevation {el:.1f} deg at "
                              f"{t_start.isot[:19]} UTC is below pointing.min_elevation = "
                              f"{cfg['pointing']['min_elevation']:g} deg")
        if hasattr(self.source, "pointing"):
            self.source.pointing = self.pointing
        sp = cfg["spectrometer"]
        self.nchan = sp["channels"]
        self.spectrometer = Spectrometer(self.nchan, sp["method"], sp["taps"])
        sch = self.source.schedule
        block_s = self.source.block_samples / cfg["source"]["sample_rate"]
        self.block_s = block_s
        cycle = sch.blocks_per_cycle
        self.blocks_per_integration = cycle * max(1, math.ceil(sp["integration_s"] / (block_s * cycle)))


    # -- the threads -----------------------------------------------------------------------
    def _reader(self, q: queue.Queue, counters: dict) -> None:
        try:
            while not self.stop_event.is_set():
                block = self.source.read()
                if block is None:
                    break
                if self.fast:
                    while not self.stop_event.is_set():
                        try:
                            q.put(block, timeout=0.2)
                            break
                        except queue.Full:
                            continue
                else:
                    try:
                        q.put_nowait(block)
                    except queue.Full:
                        counters["dropped"] += block.n_samples
        except (SourceError, OSError) as exc:
            counters["error"] = exc
        finally:
            q.put(_STOP)

    def _writer(self, q: queue.Queue, writer: archive.ScanWriter, counters: dict) -> None:
        while True:
            row = q.get()
            if row is _STOP:
                break
            try:
                writer.append(row)
            except OSError as exc:
                counters["write_error"] = exc
                self.log(f"error: cannot write integration to {writer}: {exc}")

    # -- one row ---------------------------------------------------------------------------
    def _row(self, integ) -> dict:
        cfg = self.cfg
        sch = self.source.schedule
        switched = sch.mode == "frequency"
        spec = calibrate(integ, self.nchan, sch.shift_channels, switched,
                         cfg["calibration"]["tsys_k"], cfg["rfi"]["flag_dc"])
        t_mid = Time((integ.t_first_s + integ.t_last_s) / 2, format="unix", scale="utc")
        coord = self.pointing(t_mid)
        pos = frames.describe(coord, self.location, t_mid)
        vframe = frames.vframe_lsrk_m_s(coord, self.location, t_mid)
        fs = self.source.schedule.channel_hz * self.nchan
        row = {
            "DATA": spec.data, "FLAGGED": spec.flagged,
            "TSYS": cfg["calibration"]["tsys_k"] if spec.unit == "K" else 0.0,
            "EXPOSURE": spec.exposure_s,
            "DATE-OBS": t_mid.isot,
            "CRVAL1": sch.sig_lo_hz, "CDELT1": fs / self.nchan, "CRPIX1": self.nchan // 2 + 1.0,
            "CTYPE1": "FREQ", "RESTFREQ": HI_REST_FREQ_HZ, "VFRAME": vframe,
            "OBJECT": self.pointing.object, **pos,
            "LOSTSAMP": int(integ.lost_samples), "BLANKSMP": int(integ.blanked_samples),
            "CALSTATE": int(integ.cal_on), "FOLDED": int(spec.folded),
        }
        return row

    def _header(self) -> dict:
        cfg = self.cfg
        site = cfg["site"]
        sch = self.source.schedule
        unit = "K" if sch.mode == "frequency" else "count"
        return {
            "TELESCOP": site["telescope"], "SITENAME": site["name"],
            "SITELAT": site["lat"], "SITELONG": site["lon"], "SITEELEV": site["height_m"],
            "SPECSYS": "TOPOCENT", "SSYSOBS": "TOPOCENT", "VELDEF": "RADI-LSR", "BUNIT": unit,
            "SOURCE": self.source.kind, "SWMODE": sch.mode, "SWOFFSET": sch.shift_channels *
            sch.channel_hz, "SWDWELL": sch.blocks_per_dwell * self.block_s,
            "CHANMETH": cfg["spectrometer"]["method"], "PFBTAPS": cfg["spectrometer"]["taps"],
            "TSYSSRC": "config calibration.tsys_k" if unit == "K" else "none",
            "SAMPRATE": self.cfg["source"]["sample_rate"], "GAIN": cfg["source"]["gain"],
        }

    def _keep_partial(self, n_blocks: int, rows_q: queue.Queue, result: RunResult) -> int:
        """At a planned end (duration reached, replay file ended) keep the last, shorter
        integration if it holds at least one whole switching cycle; its EXPOSURE says how long."""
        partial = n_blocks % self.blocks_per_integration
        if partial >= self.source.schedule.blocks_per_cycle:
            rows_q.put(self._row(self.spectrometer.take()))
            result.rows += 1
            result.observed_s += partial * self.block_s
            return n_blocks + self.blocks_per_integration - partial
        return n_blocks

    # -- the run ---------------------------------------------------------------------------
    def run(self) -> RunResult:
        """Acquire until the duration is reached, the source ends, or a stop signal."""
        result = RunResult()
        self.source.open()            # a source that cannot start leaves nothing behind
        result.recovered = archive.recover(self.out_dir)
        for p in result.recovered:
            self.log(f"recovered integrations of an interrupted scan into {p}")
        scan = "scan-" + self.t_start.strftime("%Y%m%dT%H%M%S")   # the writer adds -1, -2 if taken
        writer = archive.ScanWriter(self.out_dir, scan, self._header(), self.nchan)
        blocks_q: queue.Queue = queue.Queue(maxsize=_QUEUE_BLOCKS)
        rows_q: queue.Queue = queue.Queue()
        counters = {"dropped": 0, "error": None, "write_error": None}
        reader = threading.Thread(target=self._reader, args=(blocks_q, counters), daemon=True,
                                  name="reader")
        wthread = threading.Thread(target=self._writer, args=(rows_q, writer, counters),
                                   name="writer")
        reader.start()
        wthread.start()
        max_blocks = None if self.duration_s is None else max(
            1, round(self.duration_s / self.block_s))
        n_blocks = 0
        try:
            while not self.stop_event.is_set():
                block = blocks_q.get()
                if block is _STOP:
                    if counters["error"] is None and not self.stop_event.is_set():
                        n_blocks = self._keep_partial(n_blocks, rows_q, result)   # replay's end
                    break
                self.spectrometer.add(block)
                result.lost_samples += block.lost_before
                n_blocks += 1
                if n_blocks % self.blocks_per_integration == 0:
                    rows_q.put(self._row(self.spectrometer.take()))
                    result.rows += 1
                    result.observed_s += self.blocks_per_integration * self.block_s
                if max_blocks is not None and n_blocks >= max_blocks:
                    n_blocks = self._keep_partial(n_blocks, rows_q, result)   # planned end
                    break
        finally:
            self.stop_event.set()
            if n_blocks % self.blocks_per_integration:
                self.log(f"note: the unfinished integration ({(n_blocks % self.blocks_per_integration) * self.block_s:.1f} s) "
                         "was dropped; every finished one is saved")
            rows_q.put(_STOP)
            wthread.join()
            reader.join(timeout=5)
            self.source.close()
            path = writer.close()
            if path:
                result.files.append(path)
        result.lost_samples += counters["dropped"]
        if counters["write_error"] is not None:
            raise OSError(f"writing {self.out_dir}: {counters['write_error']}")
        if counters["error"] is not None:
            raise SourceError(str(counters["error"]))
        return result

    def install_signal_handlers(self) -> None:
        def _stop(signum, _frame):
            self.log(f"received signal {signum}: finishing")
            self.stop_event.set()
        signal.signal(signal.SIGTERM, _stop)
        signal.signal(signal.SIGINT, _stop)
