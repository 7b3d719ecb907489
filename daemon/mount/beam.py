"""The tracking step a pointing driver works to, from the beam width
(:func:`spinflip.daemon.sky.beam.beamwidth_deg`)."""

from __future__ import annotations

from spinflip.daemon.sky.beam import beamwidth_deg


def tracking_step_deg(cfg: dict) -> float:
    """How far the target may move before the rotator is commanded again, deg:
    ``min(rotator.track_fraction * FWHM, rotator.tolerance_deg / 2)``.

    A tenth of the beam is common practice for stepped tracking: the gain lost at the edge of
    a step, ``exp(-4 ln 2 (0.1)^2)``, is under 3 % (Gaussian beam). Capping the step at half
    the tolerance keeps a commanded position within the tolerance of the target.
    """
    rot = cfg["rotator"]
    fwhm = beamwidth_deg(cfg["site"]["dish_diameter_m"])
    return min(rot["track_fraction"] * fwhm, rot["tolerance_deg"] / 2.0)
