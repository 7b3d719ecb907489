"""UTC times as ISO 8601 text: the one place that reads the clock for a time stamp.

FITS ``DATE`` cards and the calibration record use whole seconds without a zone letter
(``2026-05-01T12:00:00``, UTC by the FITS standard, section 4.4.2.1); the wire's ``time_utc``
uses microseconds and ``Z`` (``2026-05-01T12:00:00.000000Z``).
"""

from __future__ import annotations

import datetime as _dt


def utc_iso(time_unix_s: float | None = None, *, micro: bool = False, zulu: bool = False) -> str:
    """A UTC time as ISO 8601 text.

    Parameters
    ----------
    time_unix_s : float or None
        POSIX seconds; None for now.
    micro : bool
        Six decimals of the second (else whole seconds, truncated).
    zulu : bool
        End with ``Z``.
    """
    t = (_dt.datetime.now(_dt.UTC) if time_unix_s is None
         else _dt.datetime.fromtimestamp(time_unix_s, _dt.UTC))
    text = t.replace(tzinfo=None).isoformat(timespec="microseconds" if micro else "seconds")
    return text + "Z" if zulu else text
