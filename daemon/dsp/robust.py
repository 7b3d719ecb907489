"""The robust standard deviation of samples: sigma = MAD / Phi^-1(3/4) (about 1.4826 MAD).

For Gaussian data the median absolute deviation from the median is Phi^-1(3/4) sigma, so
``mad / Phi^-1(3/4)`` estimates sigma while a few outliers (a carrier, an impulse, the line)
barely move it. This is the same value as ``scipy.stats.median_abs_deviation(x,
scale="normal")``, computed with numpy and the standard library's normal quantile, because
importing ``scipy.stats`` costs the daemon about 45 MB of memory on a small board.

References
----------
Rousseeuw, P. J. & Croux, C. 1993, JASA 88, 1273 (the MAD as a scale estimator; the factor
1.4826 = 1 / Phi^-1(3/4), from memory).
"""

from __future__ import annotations

from statistics import NormalDist

import numpy as np
import numpy.typing as npt

#: 1 / Phi^-1(3/4) = 1.482602...: sigma per unit of MAD for Gaussian data.
MAD_TO_SIGMA = 1.0 / NormalDist().inv_cdf(0.75)


def robust_sigma(x: npt.ArrayLike) -> float:
    """``MAD_TO_SIGMA * median(|x - median(x)|)`` of all of ``x`` (NaN if ``x`` is empty)."""
    a = np.asarray(x).ravel()           # no copy to float64: float32 spectra stay float32
    if a.size == 0:
        return float("nan")
    return MAD_TO_SIGMA * float(np.median(np.abs(a - np.median(a))))
