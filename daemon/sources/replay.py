"""Replay of raw ``.cu8`` captures: interleaved unsigned 8-bit I/Q, the trade's usual format.

A capture holds one LO setting, so switching is off on replay (the schedule is total power);
sample rate and centre frequency come from the configuration or the command line. With
``source.replay_loop`` the file starts again at its end (time running on), so a short capture
can pace a long soak of the daemon's own cost. The file is
checked before anything is processed: missing, empty, odd-length, or shorter than one block
of samples each stop with a one-line message (exit 2), so nothing is written half.
"""

from __future__ import annotations

import os
import time as _time
from collections.abc import Callable
from dataclasses import replace
from pathlib import Path
from typing import TYPE_CHECKING, BinaryIO

import numpy as np
from astropy.time import Time

from spinflip.daemon.calibration.noise_source import CalControl
from spinflip.daemon.config import ConfigError
from spinflip.daemon.dsp.block import SIG, Block
from spinflip.daemon.dsp.switching import Schedule
from spinflip.daemon.sources.base import SourceError, WallClock

if TYPE_CHECKING:
    from astropy.coordinates import SkyCoord


class ReplaySource(WallClock):
    kind = "replay"

    def __init__(self, cfg: dict, fast: bool = False):
        self.cfg = cfg
        self.fast = fast
        src = cfg["source"]
        self.path = Path(src["path"]).expanduser()
        self.fs = src["sample_rate"]
        self.block_samples = src["block_samples"]
        self.schedule = replace(Schedule.from_config(cfg, noise_source=False), mode="none",
                                shift_channels=0)
        if not src["path"]:
            raise ConfigError("source.path is empty: replay needs a .cu8 file (--source replay:PATH)")
        try:
            size = os.path.getsize(self.path)
        except OSError:
            raise ConfigError(f"replay file {self.path}: not found or not readable") from None
        if size == 0:
            raise ConfigError(f"replay file {self.path}: empty")
        if size % 2:
            raise ConfigError(f"replay file {self.path}: odd length ({size} bytes): a .cu8 capture "
                              "holds I/Q byte pairs (truncated or not a .cu8 file?)")
        nchan = cfg["spectrometer"]["channels"]
        if size // 2 < 4 * nchan * cfg["spectrometer"]["taps"]:
            raise ConfigError(f"replay file {self.path}: only {size // 2} samples, too short for "
                              f"{nchan}-channel spectra (truncated?)")
        self.size = size
        start = cfg["sim"]["start"]
        self.t_start = Time.now() if start == "now" else Time(start, scale="utc")
        self._fh: BinaryIO | None = None
        self._index = 0

    def open(self) -> None:
        self._fh = open(self.path, "rb")
        self._wall0 = _time.monotonic()

    def close(self) -> None:
        if self._fh:
            self._fh.close()
            self._fh = None

    def set_cal(self, on: bool | None) -> None:
        if on:
            raise ConfigError("replay cannot switch a calibration noise source")

    def can_fire_noise_source(self) -> bool:
        return False

    def attach_noise_source(self, control: CalControl) -> None:
        """A capture has no noise source to fire."""

    def request_firing(self) -> None:
        raise ConfigError("replay cannot fire a calibration noise source")

    def set_pointing(self, pointing: Callable[[Time], SkyCoord] | None) -> None:
        """A capture's samples do not depend on the pointing."""

    def can_reopen(self) -> bool:
        return False

    def reopen(self) -> None:
        raise SourceError(f"replay file {self.path}: cannot be reopened")

    def read(self) -> Block | None:
        assert self._fh is not None, "read() after open()"
        data = self._fh.read(2 * self.block_samples)
        if len(data) < 2 * self.block_samples and self.cfg["source"]["replay_loop"]:
            self._fh.seek(0)                  # looped: the capture again, time running on
            data = self._fh.read(2 * self.block_samples)
        if len(data) < 2:
            return None
        data = data[: len(data) // 2 * 2]
        i = self._index
        self._index += 1
        t_rel = i * self.block_samples / self.fs
        if not self.fast:
            delay = self._wall0 + t_rel + len(data) / 2 / self.fs - _time.monotonic()
            if delay > 0:
                _time.sleep(delay)
        return Block(raw=np.frombuffer(data, dtype=np.uint8), lo_hz=self.cfg["source"]["center_freq"],
                     sample_rate=self.fs, t0_unix_s=float(self.t_start.unix) + t_rel, phase=SIG,
                     index=i)
