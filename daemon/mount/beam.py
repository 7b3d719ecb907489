"""The beam of the dish at the HI line, and the tracking step a pointing driver works to.

The half-power beam width of a parabolic dish is ``FWHM = k * lambda / D`` rad. ``k`` depends
on how the feed illuminates the aperture: about 1.02 for a uniform one, more for a tapered
one; ``k = 1.2`` is common practice for the edge tapers of small dishes (values from memory,
standard antenna texts). The simulator uses the same width (``sources/sim.py``).
"""

from __future__ import annotations

import math

from spinflip.daemon.sky.hi_line import C_M_S, HI_REST_FREQ_HZ

#: The factor k in FWHM = k * lambda / D (a tapered illumination; common practice).
BEAM_FACTOR = 1.2


def beam_fwhm_deg(dish_diameter_m: float) -> float:
    """Half-power beam width at 1420.405751768 MHz of a dish of this diameter, deg
    (``1.2 * lambda / D``; lambda = c / f = 0.2111 m)."""
    lam = C_M_S / HI_REST_FREQ_HZ
    return math.degrees(BEAM_FACTOR * lam / dish_diameter_m)


def tracking_step_deg(cfg: dict) -> float:
    """How far the target may move before the rotator is commanded again, deg:
    ``min(rotator.track_fraction * FWHM, rotator.tolerance_deg / 2)``.

    A tenth of the beam is common practice for stepped tracking: the gain lost at the edge of
    a step, ``exp(-4 ln 2 (0.1)^2)``, is under 3 % (Gaussian beam). Capping the step at half
    the tolerance keeps a commanded position within the tolerance of the target.
    """
    rot = cfg["rotator"]
    fwhm = beam_fwhm_deg(cfg["site"]["dish_diameter_m"])
    return min(rot["track_fraction"] * fwhm, rot["tolerance_deg"] / 2.0)
