"""One target's stacked HI profile (:class:`Stack`), the value every later step of the reduction
works on."""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np


@dataclass(frozen=True, eq=False)
class Stack:
    """The rows of every scan of one target, stacked on a common LSRK velocity grid.

    Arrays are float64 of one length, on ``v_km_s`` (LSRK radio velocity, ascending, uniform
    step). ``tb_k`` is the brightness temperature after the baseline (NaN where no row covered
    the channel or every row had it flagged); ``sigma_k`` its noise per channel (NaN likewise);
    ``weight`` the sum of the weights that went into each channel (0: none).
    """

    object: str
    glon_deg: float
    glat_deg: float
    v_km_s: np.ndarray
    tb_k: np.ndarray
    sigma_k: np.ndarray
    weight: np.ndarray
    exposure_s: float             # sum of the rows' EXPOSURE
    n_rows: int
    n_scans: int
    w_k_km_s: float               # W = integral of T_B dv over the line window, K km/s
    w_err_k_km_s: float
    nhi_cm2: float                # N(HI) optically thin = 1.823e18 W cm^-2
    nhi_err_cm2: float
    line_window_km_s: tuple[float, float]   # where W was integrated
    baseline_order: int           # -1: no baseline fitted
    scans: tuple[str, ...] = ()   # the files that went in (names)

    @property
    def dv_km_s(self) -> float:
        return float(self.v_km_s[1] - self.v_km_s[0])
