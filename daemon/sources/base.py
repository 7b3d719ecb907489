"""Sources of Blocks behind one interface: ``open()``, ``read() -> Block | None``, ``close()``,
``set_cal(on)``, ``schedule`` and ``kind``. ``read`` returns None when a finite source ends.

Choose one with :func:`make_source`; all three (sim, rtlsdr, replay) look the same to the rest.
"""

from __future__ import annotations

from spinflip.daemon.config import ConfigError


class SourceError(RuntimeError):
    """A source that cannot start or has failed; the message says what to do about it."""


def parse_source_option(text: str) -> dict:
    """``sim``, ``rtlsdr`` or ``replay:PATH`` from the command line -> [source] overrides."""
    if text in ("sim", "rtlsdr"):
        return {"kind": text}
    if text.startswith("replay:") and len(text) > len("replay:"):
        return {"kind": "replay", "path": text[len("replay:"):]}
    raise ConfigError(f"--source {text!r}: expected sim, rtlsdr or replay:PATH")


def make_source(cfg: dict, fast: bool = False):
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
