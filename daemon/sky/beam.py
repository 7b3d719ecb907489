"""The half-power beam width of a dish at the HI line (one home for the simulator, the pointing
drivers and the receiver-chain budget).

``HPBW = k * lambda / D`` rad. ``k`` depends on how the feed illuminates the aperture: about 1.02
for a uniform one, more for a tapered one; ``k = 1.2`` is common practice for the edge tapers of
small dishes (values from memory, standard antenna texts).
"""

from __future__ import annotations

import math

from spinflip.daemon.sky.hi_line import C_M_S, HI_REST_FREQ_HZ

#: HPBW = factor lambda / D for a tapered dish illumination (common practice).
DEFAULT_BEAMWIDTH_FACTOR = 1.2


def beamwidth_deg(dish_diameter_m: float, freq_hz: float = HI_REST_FREQ_HZ,
                  factor: float = DEFAULT_BEAMWIDTH_FACTOR) -> float:
    """Half-power beam width HPBW = factor lambda / D, degrees.

    Parameters
    ----------
    dish_diameter_m : float
        Aperture diameter D, m (> 0).
    freq_hz : float
        Frequency, Hz (default the HI line, 1420.405751768 MHz); lambda = c / freq.
    factor : float
        1.2 for a usual edge-tapered illumination (common practice); 1.02 would be a uniformly
        illuminated circular aperture.

    Returns
    -------
    float
        HPBW, degrees.
    """
    wavelength_m = C_M_S / float(freq_hz)                   # lambda = c / nu
    return math.degrees(float(factor) * wavelength_m / float(dish_diameter_m))
