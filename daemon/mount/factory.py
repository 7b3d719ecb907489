"""The pointing driver that ``[pointing] driver`` names."""

from __future__ import annotations

from collections.abc import Callable

from spinflip.daemon.mount.base import Mount
from spinflip.daemon.mount.fixed import FixedMount
from spinflip.daemon.mount.manual import ManualMount
from spinflip.daemon.mount.rotator import RotatorMount


def make_mount(cfg: dict, prompt: Callable[[str], None]) -> Mount:
    """A :class:`Mount` for ``cfg["pointing"]["driver"]``: ``"rotator"`` (no connection is
    made until the first request), ``"manual"`` (asks through ``prompt``) or ``"none"``."""
    driver = cfg["pointing"]["driver"]
    if driver == "rotator":
        return RotatorMount(cfg)
    if driver == "manual":
        return ManualMount(cfg, prompt)
    if driver == "none":
        return FixedMount(cfg)
    raise ValueError(f"pointing.driver = {driver!r}: expected 'none', 'manual' or 'rotator'")
