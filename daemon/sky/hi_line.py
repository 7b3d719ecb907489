"""Physical constants of the 21 cm line and the radio velocity convention.

References
----------
Hellwig, H. et al. 1970, IEEE Trans. Instrum. Meas. 19, 200 (HI hyperfine frequency; value
quoted from memory).
Greisen, E. W. et al. 2006, A&A 446, 747 (FITS WCS paper III: radio velocity convention).
"""

import numpy as np
import numpy.typing as npt

#: Rest frequency of the HI hyperfine (spin-flip) transition, Hz (Hellwig et al. 1970).
HI_REST_FREQ_HZ = 1_420_405_751.768

#: Speed of light in vacuum, m/s (exact, SI).
C_M_S = 299_792_458.0


def radio_velocity_m_s(freq_hz: npt.ArrayLike, rest_hz: float = HI_REST_FREQ_HZ) -> np.ndarray:
    """Radio velocity v = c (nu0 - nu) / nu0, in m/s (Greisen et al. 2006, table 1)."""
    return C_M_S * (rest_hz - np.asarray(freq_hz, dtype=float)) / rest_hz


def radio_frequency_hz(velocity_m_s: npt.ArrayLike,
                       rest_hz: float = HI_REST_FREQ_HZ) -> np.ndarray:
    """Inverse of :func:`radio_velocity_m_s`: nu = nu0 (1 - v / c), in Hz."""
    return rest_hz * (1.0 - np.asarray(velocity_m_s, dtype=float) / C_M_S)
