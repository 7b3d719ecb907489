"""Receiver-chain noise maths: Friis cascade, passive loss, beam, noise power, radiometer noise.

Pure functions of numbers; the profile files and the budget built from them are
:mod:`spinflip.daemon.commands.receiver_chain`.

Noise temperature of a stage given by its noise figure (IEEE/IRE definition, T0 = 290 K)::

    F = 10^(NF / 10),      T = T0 (F - 1),      NF = 10 log10(1 + T / T0)

A passive lossy stage (cable, filter, feed probe) of loss L = 10^(loss_db / 10) >= 1 at the
physical temperature T_phys::

    G = 1 / L,             T = (L - 1) T_phys

(so at T_phys = T0 its noise figure equals its loss in dB).

Friis cascade, every term referred to the input of the first stage::

    T_cascade = T1 + T2 / G1 + T3 / (G1 G2) + ... + T_n / (G1 ... G_{n-1})

the i-th term being that stage's *contribution*. The dongle is the last stage; its own gain
(tuner gain) does not enter.

System temperature, referred to the feed input (the input of the first listed stage, so a feed
or cable loss listed before the first amplifier raises it through its (L - 1) T_phys term)::

    T_sys = T_sky + T_continuum + T_spillover + T_cascade

Beam (half-power beam width of a dish of diameter D at the HI line, lambda = c / nu_HI); the
factor 1.2 is common practice for a tapered illumination (profile key ``beamwidth_factor``)::

    HPBW = 1.2 lambda / D                 [rad]

Radiometer noise of one channel (B = sample_rate_hz / channels, the nominal channel width,
taken as the noise bandwidth) in an integration of tau seconds (Wilson, Rohlfs & Huttemeister,
K = 1 total power, K = sqrt 2 for a switched difference with t the time in each phase)::

    total power            Delta T = T_sys / sqrt(B tau)
    frequency-switched     Delta T = sqrt 2 T_sys / sqrt(B tau / 2) = 2 T_sys / sqrt(B tau)
    switched and folded    Delta T = 2 T_sys / sqrt(B tau) / sqrt 2 = sqrt 2 T_sys / sqrt(B tau)

Switching spends half of tau on each phase and differences them: a factor 2 in noise against a
total-power measurement of the same length. Folding (in-band switching, both copies of the line
averaged, as :mod:`spinflip.daemon.calibration.kelvin` does) wins back sqrt 2.

Antenna temperature of Galactic HI, for emission extended enough to fill the beam::

    T_A ~ eta_A T_B

with eta_A the aperture efficiency from the profile. It is a rough, cautious figure: the
main-beam efficiency that strictly applies to a beam-filling source is usually somewhat above
eta_A (Kutner & Ulich 1981), and a beam wider than the HI layer's latitude extent (a few
degrees near the plane) is diluted. T_B defaults to 80 K: Galactic-plane HI profiles peak at
roughly 50-100 K in the all-sky surveys (e.g. Kalberla et al. 2005; from memory).

References
----------
Friis, H. T. 1944, Proc. IRE 32, 419 (noise figures of radio receivers; from memory).
IRE Standards on Methods of Measuring Noise in Linear Twoports, Proc. IRE 48, 60 (1960):
T0 = 290 K (from memory).
Wilson, T. L., Rohlfs, K. & Huttemeister, S., *Tools of Radio Astronomy* (radiometer equation,
switched measurements, antenna temperature, passive loss as a noise source).
Kutner, M. L. & Ulich, B. L. 1981, ApJ 250, 341 (temperature scales, efficiencies).
Kalberla, P. M. W. et al. 2005, A&A 440, 775 (Leiden/Argentine/Bonn HI survey; from memory).
"""

from __future__ import annotations

__all__ = ["DEFAULT_BEAMWIDTH_FACTOR", "beamwidth_deg"]  # re-exported: the beam lives in sky/beam.py

import math
from collections.abc import Sequence
from dataclasses import dataclass

from spinflip.daemon.calibration.y_factor import T0_K
from spinflip.daemon.products.line_integral import (
    K_SWITCHED,
    K_TOTAL_POWER,
    radiometer_noise_k,
)
from spinflip.daemon.sky.beam import DEFAULT_BEAMWIDTH_FACTOR, beamwidth_deg

#: Boltzmann constant, J/K (exact, SI 2019).
BOLTZMANN_J_K = 1.380649e-23



def db_to_linear(value_db: float) -> float:
    """Power ratio of a value in dB: 10^(dB / 10)."""
    return 10.0 ** (float(value_db) / 10.0)


def linear_to_db(ratio: float) -> float:
    """dB of a power ratio: 10 log10(ratio)."""
    return 10.0 * math.log10(float(ratio))


def passive_noise_temp_k(loss_db: float, physical_temp_k: float = T0_K) -> float:
    """Noise temperature of a matched passive loss, T = (L - 1) T_phys, K.

    Parameters
    ----------
    loss_db : float
        Loss, dB (>= 0); L = 10^(loss_db / 10), the stage's gain is 1 / L.
    physical_temp_k : float
        Physical temperature of the lossy part, K (> 0).

    Returns
    -------
    float
        Noise temperature referred to the stage's input, K.

    Notes
    -----
    At T_phys = T0 = 290 K, F = 1 + T / T0 = L: the noise figure equals the loss in dB.

    References
    ----------
    Wilson, Rohlfs & Huttemeister, *Tools of Radio Astronomy* (attenuating medium as a noise
    source); Pozar, *Microwave Engineering* (noise of a lossy line; from memory).
    """
    loss = db_to_linear(loss_db)
    return (loss - 1.0) * float(physical_temp_k)            # T = (L - 1) T_phys


@dataclass(frozen=True)
class Cascade:
    """Result of :func:`friis_cascade_k`.

    Attributes
    ----------
    total_k : cascade noise temperature referred to the first stage's input, K
    contributions_k : each stage's term T_i / (G_1 ... G_{i-1}), K
    gains_before : the linear gain ahead of each stage, G_1 ... G_{i-1} (1 for the first)
    cumulative_gains : the linear gain after each stage, G_1 ... G_i
    """

    total_k: float
    contributions_k: tuple[float, ...]
    gains_before: tuple[float, ...]
    cumulative_gains: tuple[float, ...]


def friis_cascade_k(noise_temps_k: Sequence[float], gains: Sequence[float]) -> Cascade:
    """Friis cascade: T = T1 + T2 / G1 + T3 / (G1 G2) + ..., K.

    Parameters
    ----------
    noise_temps_k : sequence of float
        Noise temperature of each stage referred to its own input, K (>= 0), in signal order.
    gains : sequence of float
        Linear power gain of each stage (> 0), same length. The last stage's gain only enters
        ``cumulative_gains``.

    Returns
    -------
    Cascade
        Total, per-stage contributions referred to the first input, and running gains.

    References
    ----------
    Friis, H. T. 1944, Proc. IRE 32, 419 (from memory).
    """
    temps = [float(t) for t in noise_temps_k]
    gs = [float(g) for g in gains]
    if len(temps) != len(gs) or not temps:
        raise ValueError(f"friis_cascade_k needs one gain per stage and at least one stage; got "
                         f"{len(temps)} temperatures and {len(gs)} gains")
    for i, (t, g) in enumerate(zip(temps, gs, strict=True)):
        if not (math.isfinite(t) and t >= 0.0):
            raise ValueError(f"stage {i} noise temperature = {t!r} K: expected a finite "
                             "number >= 0")
        if not (math.isfinite(g) and g > 0.0):
            raise ValueError(f"stage {i} gain = {g!r}: expected a finite linear gain > 0")
    contributions, before, after = [], [], []
    g_before = 1.0
    for t, g in zip(temps, gs, strict=True):
        before.append(g_before)
        contributions.append(t / g_before)                  # T_i / (G_1 ... G_{i-1})
        g_before *= g
        after.append(g_before)
    return Cascade(total_k=math.fsum(contributions), contributions_k=tuple(contributions),
                   gains_before=tuple(before), cumulative_gains=tuple(after))


def noise_power_dbm(noise_temp_k: float, bandwidth_hz: float, gain_db: float = 0.0) -> float:
    """Noise power k T B G, dBm.

    Parameters
    ----------
    noise_temp_k : float
        Noise temperature at the reference point, K (> 0).
    bandwidth_hz : float
        Bandwidth, Hz (> 0).
    gain_db : float
        Gain from the reference point to where the power is wanted, dB.

    Returns
    -------
    float
        Power, dBm (dB relative to 1 mW).
    """
    p_w = BOLTZMANN_J_K * float(noise_temp_k) * float(bandwidth_hz) * db_to_linear(gain_db)
    return 10.0 * math.log10(p_w / 1e-3)


@dataclass(frozen=True)
class Sensitivity:
    """Radiometer noise of one channel in one integration, K (see :func:`sensitivity_k`)."""

    total_power_k: float
    switched_k: float
    folded_k: float


def sensitivity_k(tsys_k: float, channel_hz: float, integration_s: float) -> Sensitivity:
    """Radiometer noise per channel: total power, frequency-switched, switched and folded.

    Parameters
    ----------
    tsys_k : float
        System temperature, K.
    channel_hz : float
        Channel (noise) bandwidth B, Hz.
    integration_s : float
        Integration time tau, s; when switching, half of it is spent in each phase.

    Returns
    -------
    Sensitivity
        total power T_sys / sqrt(B tau); switched sqrt 2 T_sys / sqrt(B tau / 2)
        = 2 T_sys / sqrt(B tau); folded = switched / sqrt 2.

    References
    ----------
    Wilson, T. L., Rohlfs, K. & Huttemeister, S., *Tools of Radio Astronomy* (radiometer
    equation; a switched measurement costs a factor 2 in noise for the same time).
    """
    total = radiometer_noise_k(tsys_k, channel_hz, integration_s, K_TOTAL_POWER)
    switched = radiometer_noise_k(tsys_k, channel_hz, integration_s / 2.0, K_SWITCHED)
    return Sensitivity(total_power_k=total, switched_k=switched,
                       folded_k=switched / math.sqrt(2.0))


def hi_antenna_temperature_k(hi_brightness_k: float, aperture_efficiency: float) -> float:
    """Rough antenna temperature of beam-filling HI, T_A ~ eta_A T_B, K (a cautious figure)."""
    return float(aperture_efficiency) * float(hi_brightness_k)
