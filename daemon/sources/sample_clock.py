"""Timestamps for live samples that never run backwards, and steps of the system clock noticed.

A live source stamps its samples from the monotonic clock (``CLOCK_MONOTONIC``: NTP slews its
rate but never steps it) anchored once to the system clock (``CLOCK_REALTIME``, which NTP, an
operator or ``fake-hwclock`` at boot may step)::

    t_unix = wall_anchor + (mono - mono_anchor)

A step of the system clock shows as a change of ``offset = wall - mono``. Forward steps
(the usual case: a board without a real-time clock boots with a stale time and NTP puts it
right minutes later) re-anchor, so the data jump forward with the clock and stay monotonic.
Backward steps are reported once but not followed: the data time keeps counting and is then
ahead of the system clock by the step, which the daemon records as an event, so a reduction
can correct it. Either way, timestamps in the data never decrease.

References
----------
POSIX ``clock_gettime``: CLOCK_REALTIME may be set; CLOCK_MONOTONIC cannot be set.
Linux ``clock_gettime(2)`` manual page (adjtime/NTP affect MONOTONIC's rate, not its value).
"""

from __future__ import annotations

import time as _time
from collections.abc import Callable

#: Smallest change of (system - monotonic) taken for a step, s. NTP slews at most 500 ppm, so
#: within any block a true slew is far below this (common practice: ntpd steps above 0.128 s).
STEP_THRESHOLD_S = 0.5


class SampleClock:
    """Unix time of live samples from the monotonic clock, anchored to the system clock.

    Parameters
    ----------
    wall, mono : callables returning seconds
        The system and monotonic clocks (``time.time`` and ``time.monotonic``); tests pass
        their own to step the system clock.
    step_threshold_s : float
        Smallest change of the system clock against the monotonic one reported as a step.
    """

    def __init__(self, wall: Callable[[], float] = _time.time,
                 mono: Callable[[], float] = _time.monotonic,
                 step_threshold_s: float = STEP_THRESHOLD_S):
        self.wall, self.mono = wall, mono
        self.step_threshold_s = float(step_threshold_s)
        self.start()

    def start(self) -> None:
        """Anchor to the system clock now (at open, and after a reconnection)."""
        m = self.mono()
        self._offset_s = self.wall() - m          # wall - mono at the anchor
        self._seen_offset_s = self._offset_s      # the offset last looked at

    def now_mono(self) -> float:
        return self.mono()

    def time_of(self, mono_s: float) -> float:
        """Unix time (s) of the instant the monotonic clock read ``mono_s``."""
        return self._offset_s + mono_s

    def check(self) -> float:
        """Look for a step of the system clock since the last look; return it in s (0 if none).

        A forward step moves the anchor (later times follow the system clock); a backward
        step is returned once and the anchor is kept, so :meth:`time_of` never decreases.
        """
        m = self.mono()
        offset = self.wall() - m
        step = offset - self._seen_offset_s
        if abs(step) < self.step_threshold_s:
            return 0.0
        self._seen_offset_s = offset
        if offset > self._offset_s:              # ahead of the data time: follow it
            self._offset_s = offset
        return step
