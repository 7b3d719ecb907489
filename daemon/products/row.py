"""One finished integration as the daemon makes it: a typed :class:`Row`.

The daemon builds rows (:mod:`spinflip.daemon.run.rows`); storage turns them into FITS columns
(:func:`spinflip.daemon.storage.row_columns.row_columns`) and the live socket into spectrum
messages (:func:`spinflip.daemon.live.messages.spectrum_message`); nothing else knows a column
name.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

from spinflip.daemon.sky.coordinates import SkyPosition
from spinflip.daemon.sky.hi_line import HI_REST_FREQ_HZ


@dataclass(frozen=True, eq=False)
class Row:
    """One integration: its spectrum, its frequency axis and where and how it was taken.

    The frequency axis is channel k at ``lo_hz + (k + 1 - crpix) * channel_hz`` (topocentric);
    the velocity axis (LSRK radio velocity, m/s) is ``vel_crval_m_s + (k + 1 - crpix) *
    vel_cdelt_m_s``. Fractions are of the spectrum's channels (``flag_freq_fraction``,
    ``rfi_fraction``, ``uncovered_fraction``), of its spectra (``flag_time_fraction``) or of
    its channel-blocks (``sk_fraction``).
    """

    data: np.ndarray                  # float32[nchan], K or counts
    flagged: np.ndarray               # bool[nchan]
    date_obs: str                     # ISO 8601 UTC, middle of the integration
    exposure_s: float
    tsys_k: float = float("nan")
    lo_hz: float = 0.0                # CRVAL1
    channel_hz: float = 1.0           # CDELT1
    crpix: float = 1.0                # CRPIX1 (and CRPIX1A)
    restfreq_hz: float = HI_REST_FREQ_HZ
    vframe_m_s: float = 0.0           # LSRK minus topocentric
    object: str = ""
    position: SkyPosition = SkyPosition(0.0, 0.0, 0.0, 0.0, 0.0, 90.0)
    chan_exposure_s: np.ndarray | None = None   # float32[nchan]
    vel_crval_m_s: float | None = None          # CRVAL1A; None: no velocity axis columns
    vel_cdelt_m_s: float | None = None          # CDELT1A
    tsys_age_s: float = float("nan")
    lost_samples: int = 0
    blanked_samples: int = 0
    cal_s: float = 0.0                # noise source on, s
    unknown_s: float = 0.0            # noise source state unknown, s
    folded: bool = False
    flag_time_fraction: float = 0.0
    flag_freq_fraction: float = 0.0
    rfi_fraction: float = 0.0
    uncovered_fraction: float = 0.0
    sk_fraction: float = 0.0
    n_impulse: int = 0
    n_carrier: int = 0
    pointing_error_deg: float = float("nan")   # reached position against the target; NaN: none reported

    @property
    def nbytes(self) -> int:
        """Memory its arrays hold, bytes."""
        return sum(a.nbytes for a in (self.data, self.flagged, self.chan_exposure_s)
                   if a is not None)
