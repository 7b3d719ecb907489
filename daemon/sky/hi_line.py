"""Physical constants of the 21 cm line and the radio velocity convention.

References
----------
Hellwig, H. et al. 1970, IEEE Trans. Instrum. Meas. 19, 200 (HI hyperfine frequency; value
quoted from memory).
Greisen, E. W. et al. 2006, A&A 446, 747 (FITS WCS paper III: radio velocity convention).
Dickey, J. M. & Lockman, F. J. 1990, ARA&A 28, 215 (N_HI = 1.823e18 int T_B dv, optically
thin).
"""

import numpy as np
import numpy.typing as npt

from spinflip.daemon.sky.line_constants import (  # noqa: F401 - re-exported here
    C_M_S,
    HI_COLUMN_PER_K_KM_S_CM2,
    HI_REST_FREQ_HZ,
)


def radio_velocity_m_s(freq_hz: npt.ArrayLike, rest_hz: float = HI_REST_FREQ_HZ) -> np.ndarray:
    """Radio velocity v = c (nu0 - nu) / nu0, in m/s (Greisen et al. 2006, table 1)."""
    return C_M_S * (rest_hz - np.asarray(freq_hz, dtype=float)) / rest_hz


def radio_frequency_hz(velocity_m_s: npt.ArrayLike,
                       rest_hz: float = HI_REST_FREQ_HZ) -> np.ndarray:
    """Inverse of :func:`radio_velocity_m_s`: nu = nu0 (1 - v / c), in Hz."""
    return rest_hz * (1.0 - np.asarray(velocity_m_s, dtype=float) / C_M_S)
