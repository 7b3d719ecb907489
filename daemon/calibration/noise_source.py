"""The noise source's state, driven by the switching schedule through the configured switch.

A source asks :meth:`CalControl.state_for` before each block with the state the schedule
wants; the answer is stamped on the block (``Block.cal_on``):

- True / False: the switch did what was asked (or there is no physical switch to drive and the
  state is the simulator's own);
- None: the switch failed, so nobody knows whether the source is on. Such blocks go neither
  into spectra nor into system-temperature measurements, and an error event says why. The next
  change of the wanted state tries the switch again.

A failing switch is therefore always seen and never gives a silent wrong T_sys.
"""

from __future__ import annotations

from collections.abc import Callable
from typing import TYPE_CHECKING

if TYPE_CHECKING:
    from spinflip.daemon.calibration.noise_switch import NoiseSwitch


class CalControl:
    """Follows the wanted noise-source state, drives ``switch``, reports failures.

    Parameters
    ----------
    switch : object with ``set(on)`` raising on failure and ``can_switch``, or None (no
        physical switch: the state is taken as commanded, as in the simulator)
    event : callable(severity, text) for errors the observer must see
    """

    def __init__(self, switch: NoiseSwitch | None = None,
                 event: Callable[[str, str], None] | None = None):
        self.switch = switch
        self.event = event or (lambda severity, text: None)
        self.state: bool | None = False
        self._wanted: bool | None = None
        self.failures = 0

    def state_for(self, wanted: bool) -> bool | None:
        """The noise-source state for the next block, switching if ``wanted`` changed."""
        if wanted == self._wanted:
            return self.state
        self._wanted = wanted
        if self.switch is None or not getattr(self.switch, "can_switch", True):
            self.state = wanted
            return self.state
        if getattr(self.switch, "state", None) is wanted:   # already there (e.g. off at open)
            self.state = wanted
            return self.state
        try:
            self.switch.set(wanted)
        except Exception as exc:  # a failing switch must never stop acquisition
            self.failures += 1
            self.state = None
            self.event("error", f"noise source switch failed turning it {'on' if wanted else 'off'}: "
                       f"{str(exc).splitlines()[0] if str(exc) else type(exc).__name__}; its "
                       "state is unknown, so those samples are left out")
            return None
        self.state = wanted
        return self.state
