"""Galactic constants: the Sun's distance from the Galactic centre R0 and the circular speed of
the local standard of rest Theta0, selectable by name (``spinflip reduce --constants NAME``)."""

from __future__ import annotations

from dataclasses import dataclass


@dataclass(frozen=True)
class GalacticConstants:
    """R0 (kpc) and Theta0 (km/s) with where they come from."""

    name: str
    r0_kpc: float
    theta0_km_s: float
    reference: str


#: The sets a user may choose. IAU 1985: MNRAS 221, 1023, 1986. The newer set is from maser
#: parallaxes, ApJ 783, 130 (2014): R0 = 8.34 kpc, Theta0 = 240 km/s (values from memory).
CONSTANTS: dict[str, GalacticConstants] = {
    "iau1985": GalacticConstants("iau1985", 8.5, 220.0, "MNRAS 221, 1023, 1986"),
    "maser2014": GalacticConstants("maser2014", 8.34, 240.0,
                                   "ApJ 783, 130, 2014 (maser parallaxes; values from memory)"),
}
DEFAULT_CONSTANTS = "iau1985"
