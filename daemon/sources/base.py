"""Sources of Blocks behind one interface, :class:`Source`: ``open()``, ``read() -> Block |
None``, ``close()``, ``set_cal(on)``, ``schedule``, ``kind``, ``block_samples``, ``t_start``,
``fs`` (the sample rate), and the capabilities a source may lack, asked for by name rather than
guessed from its attributes:

* a noise source it can fire: :meth:`Source.can_fire_noise_source`,
  :meth:`Source.attach_noise_source` (the switch it fires through), :meth:`Source.request_firing`
  (an extra firing as soon as possible; safe from any thread);
* a sky that depends on the pointing (the simulator): :meth:`Source.set_pointing` (safe from any
  thread; a source that does not need it ignores it);
* reopening after a :class:`SourceError` (the dongle unplugged): :meth:`Source.can_reopen`,
  :meth:`Source.reopen`;
* a clock of its own (the simulator under ``--fast``): :meth:`Source.set_real_time` holds it to
  the wall clock while a plan waits on the mount, :meth:`Source.skip` jumps it ahead while a
  plan waits for a target to rise; a source in real time (the dongle) ignores the one and
  refuses the other (:class:`WallClock`).

``read`` returns None when a finite source ends. Choose one with :func:`make_source`; all three
(sim, rtlsdr, replay) look the same to the rest.
"""

from __future__ import annotations

import threading
from collections.abc import Callable
from typing import Any, Protocol, runtime_checkable

from spinflip.daemon.calibration.noise_source import CalControl
from spinflip.daemon.config import ConfigError


class SourceError(RuntimeError):
    """A source that cannot start or has failed; the message says what to do about it."""


@runtime_checkable
class Source(Protocol):
    """What the daemon asks of a source of Blocks (sim, rtlsdr, replay)."""

    kind: str
    block_samples: int
    fs: float                     # sample rate, complex samples per second
    schedule: Any                 # spinflip.daemon.dsp.switching.Schedule
    t_start: Any                  # astropy Time of the first sample, or None (the wall clock)

    def open(self) -> None: ...
    def read(self) -> Any: ...    # Block, or None when a finite source ends
    def close(self) -> None: ...
    def set_cal(self, on: bool | None) -> None: ...

    def can_fire_noise_source(self) -> bool:
        """True when the source drives a noise source on the switching schedule."""
        ...

    def attach_noise_source(self, control: Any) -> None:
        """Fire through ``control`` (a :class:`~spinflip.daemon.calibration.noise_source.
        CalControl`); called before :meth:`open`."""
        ...

    def request_firing(self) -> None:
        """An extra firing as soon as possible (from any thread)."""
        ...

    def set_pointing(self, pointing: Callable[[Any], Any] | None) -> None:
        """Where the telescope points: callable(Time) -> SkyCoord (from any thread)."""
        ...

    def can_reopen(self) -> bool:
        """True when :meth:`reopen` can bring the source back after a :class:`SourceError`."""
        ...

    def reopen(self) -> None:
        """Open the source again after a :class:`SourceError` (SourceError if still absent)."""
        ...

    def set_real_time(self, on: bool) -> None:
        """Pace the samples to the wall clock (True) or as the source was started (False)."""
        ...

    def skip(self, seconds: float) -> bool:
        """Move the source's time ahead by ``seconds`` without samples in between; False when
        it runs on the wall clock and cannot."""
        ...


class WallClock:
    """The clock capabilities of a source whose time is the wall clock's (the dongle, a
    replayed capture): always real time, never skipped."""

    def set_real_time(self, on: bool) -> None:
        pass

    def skip(self, seconds: float) -> bool:
        return False


class FiresNoiseSource:
    """The noise-source capabilities of a source whose samples the noise source reaches (the
    simulator and the dongle). The source makes ``cal`` (a :class:`CalControl`) and ``_fire``
    (a :class:`threading.Event`, set by :meth:`request_firing` from any thread, cleared by the
    source's reading when it fires) in its ``__init__``."""

    cal: CalControl
    _fire: threading.Event

    def can_fire_noise_source(self) -> bool:
        return True

    def attach_noise_source(self, control: CalControl) -> None:
        self.cal = control

    def request_firing(self) -> None:
        self._fire.set()


def parse_source_option(text: str) -> dict:
    """``sim``, ``rtlsdr`` or ``replay:PATH`` from the command line -> [source] overrides."""
    if text in ("sim", "rtlsdr"):
        return {"kind": text}
    if text.startswith("replay:") and len(text) > len("replay:"):
        return {"kind": "replay", "path": text[len("replay:"):]}
    raise ConfigError(f"--source {text!r}: expected sim, rtlsdr or replay:PATH")


def make_source(cfg: dict, fast: bool = False) -> Source:
    """Build the configured source (not yet opened)."""
    kind = cfg["source"]["kind"]
    if kind == "sim":
        from spinflip.daemon.sources.sim import SimSource
        return SimSource(cfg, fast=fast)
    if kind == "replay":
        from spinflip.daemon.sources.replay import ReplaySource
        return ReplaySource(cfg, fast=fast)
    from spinflip.daemon.sources.dongle import RtlSdrSource
    return RtlSdrSource(cfg)
