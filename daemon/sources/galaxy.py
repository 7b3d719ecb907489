"""A model Milky Way for the built-in simulator: HI emission and radio continuum on the sky.

The model is our own and deliberately simple. It is good enough to give the simulated
spectrometer a sky with the features a 21 cm observer expects (first-quadrant emission up to
the terminal velocity, outer-Galaxy gas at negative velocities, self-absorbed peaks near the
spin temperature, faint high-latitude lines), and it knows its own true column density, so the
reduction can be checked against it. It is not a fit to any survey.

Ingredients
-----------
Gas disk (galactocentric cylinder R, azimuth phi, height z), volume density of HI atoms::

    n(R, phi, z) = n0 * S(R) * A(R, phi) * (h0 / h(R)) * exp(-z^2 / (2 h(R)^2))

- ``S(R) = exp(-(R - R0) / R_d) * (1 - exp(-(R / R_hole)^4))``: exponential surface density,
  normalised to 1 at the Sun, with a central depression inside ~3 kpc.
- ``h(R) = h0`` inside the solar circle and ``h0 exp((R - R0) / R_flare)`` beyond it (flaring);
  the factor ``h0 / h`` keeps the *surface* density ``sqrt(2 pi) h n_mid`` equal to S(R).
- ``A(R, phi)``: m logarithmic spiral arms of pitch angle p, trailing, as a density contrast
  with azimuthal mean 1 (so the arms move gas about without changing S(R))::

      psi = m (phi + ln(R / R_arm) / tan p)
      A   = (1 - a) + a cos^{2q}(psi / 2) / <cos^{2q}>,   <cos^{2q}(x/2)> = C(2q, q) / 4^q

- Circular rotation ``Theta(R) = Theta0 (1 - exp(-R/R_rise)) / (1 - exp(-R0/R_rise))``: rises,
  then stays flat, and equals Theta0 at the Sun exactly. Velocity dispersion sigma (Gaussian).

Line of sight from the Sun (at R0, z = 0) toward (l, b), distance d::

    R^2 = R0^2 + (d cos b)^2 - 2 R0 d cos b cos l,      z = d sin b
    v_LSR = (Theta(R) R0 / R - Theta0) sin l cos b            (pure circular rotation)

(Binney & Merrifield 1998, sect. 9.1; common practice.) The path runs to 25 kpc in the plane, in
N = 500 equal steps (50 pc); away from the plane it stops 5 kpc above or below the disk, which
gives finer steps (10 pc toward the poles) through the thin layer.

Radiative transfer, channel by channel. Element i holds column ``N_i = n_i ds`` spread over
velocity as a Gaussian ``phi_i(v)`` [per km/s]; its optical depth is (Dickey & Lockman 1990)::

    dtau_i(v) = N_i phi_i(v) / (1.823e18 T_s)          [N in cm^-2, T_s in K, v in km/s]

and the brightness temperature, with each element absorbed by all gas in front of it::

    T_B(v) = sum_i T_s,i (1 - exp(-dtau_i(v))) exp(-sum_{j<i} dtau_j(v))

For a uniform spin temperature the sum telescopes to ``T_s (1 - exp(-tau_total))``; the sum is
kept in its general form so a varying T_s along the path needs no other change. T_B here is the
line brightness; absorption of the continuum behind the gas is not modelled. In the optically
thin limit ``integral T_B dv = N_HI / 1.823e18`` (the standard column-density relation).

Velocities are LSR velocities in km/s. The model does not distinguish the radio and optical
conventions: at |v| < 400 km/s they differ by at most v^2/c ~ 0.5 km/s, well inside the
model's 8 km/s dispersion, so the grid may be read as radio-convention velocities.

Continuum at 1420 MHz: the CMB (2.725 K) plus a rough analytic Galactic component (synchrotron
and free-free together), a few kelvin along the plane, brightest toward the centre, ~0.6 K at
the poles. Shape and numbers are a rough model from memory of all-sky maps, nothing more.

References
----------
Binney, J. & Merrifield, M. 1998, *Galactic Astronomy* (Princeton), ch. 9 (kinematics of
the gas disk, terminal velocity).
Dickey, J. M. & Lockman, F. J. 1990, ARA&A 28, 215 (N_HI = 1.823e18 int T_B dv; tau relation;
HI layer thickness; values from memory).
IAU 1985 Galactic constants, MNRAS 221, 1023 (1986): R0 = 8.5 kpc, Theta0 = 220 km/s.
Fixsen, D. J. 2009, ApJ 707, 916 (CMB temperature 2.725 K; from memory).
"""

from __future__ import annotations

import functools
import math
from dataclasses import dataclass
from typing import NamedTuple

import numpy as np
import numpy.typing as npt

from spinflip.daemon.sky.hi_line import HI_COLUMN_PER_K_KM_S_CM2

#: Column density per unit brightness-temperature integral, cm^-2 per (K km/s): the one value,
#: :data:`spinflip.daemon.sky.hi_line.HI_COLUMN_PER_K_KM_S_CM2` (Dickey & Lockman 1990).
NHI_PER_K_KMS = HI_COLUMN_PER_K_KM_S_CM2

#: Centimetres per kiloparsec (IAU 2012 parsec = 648000/pi au).
CM_PER_KPC = 3.0856775814913673e21

#: Cosmic microwave background temperature, K (Fixsen 2009, from memory).
T_CMB_K = 2.725

_N_STEPS = 500          # path elements per line of sight
_Z_LIMIT_KPC = 5.0      # the path stops this far from the plane (no gas there)
_KEEP_FRACTION = 1e-9   # elements with less column than this x the largest are dropped in T_B
_PROFILE_SIGMAS = 7.0   # Gaussian velocity profiles are evaluated within this many sigma


def rotation_speed_kms(r_kpc: npt.ArrayLike, theta0_kms: float = 220.0, r0_kpc: float = 8.5,
                       r_rise_kpc: float = 1.0) -> np.ndarray:
    """Circular speed of the model: a rise, then a flat curve.

    Parameters
    ----------
    r_kpc : array_like
        Galactocentric radius, kpc (R >= 0).
    theta0_kms : float
        Circular speed at the Sun, km/s.
    r0_kpc : float
        Sun's galactocentric radius, kpc.
    r_rise_kpc : float
        Radius scale of the rise, kpc.

    Returns
    -------
    numpy.ndarray
        Theta(R) in km/s, same shape as ``r_kpc``.

    Notes
    -----
    ``Theta(R) = Theta0 (1 - exp(-R/R_rise)) / (1 - exp(-R0/R_rise))``: linear near the centre
    (solid body), flat beyond a few R_rise, and exactly Theta0 at R = R0 so that gas at the
    Sun's radius has zero LSR velocity.

    References
    ----------
    Binney, J. & Merrifield, M. 1998, *Galactic Astronomy*, sect. 9.1 (flat rotation curve).
    """
    r = np.asarray(r_kpc, dtype=float)
    return theta0_kms * (-np.expm1(-r / r_rise_kpc)) / (-math.expm1(-r0_kpc / r_rise_kpc))


class Sightline(NamedTuple):
    """Path elements along one line of sight, ordered from the Sun outward.

    Attributes
    ----------
    distance_kpc : numpy.ndarray
        Heliocentric distance of each element's centre, kpc.
    radius_kpc : numpy.ndarray
        Galactocentric cylindrical radius, kpc.
    height_kpc : numpy.ndarray
        Height above the plane, kpc.
    density_cm3 : numpy.ndarray
        HI volume density, cm^-3.
    velocity_kms : numpy.ndarray
        LSR line-of-sight velocity of circular rotation, km/s.
    column_cm2 : numpy.ndarray
        HI column of each element, n ds, cm^-2.
    step_kpc : float
        Path length of each element, kpc.
    """

    distance_kpc: np.ndarray
    radius_kpc: np.ndarray
    height_kpc: np.ndarray
    density_cm3: np.ndarray
    velocity_kms: np.ndarray
    column_cm2: np.ndarray
    step_kpc: float


@dataclass(frozen=True)
class ModelGalaxy:
    """Model gas disk, rotation curve and continuum of the Milky Way (seedless, deterministic).

    Parameters
    ----------
    r0_kpc, theta0_kms : float
        Galactic constants: Sun's galactocentric radius and circular speed. Defaults are the
        IAU 1985 values (MNRAS 221, 1023, 1986); e.g. ``ModelGalaxy(8.15, 236.0)`` uses the
        newer values of Reid et al. 2019 (from memory).
    r_rise_kpc : float
        Radius scale of the rotation curve's rise, kpc.
    sigma_v_kms : float
        One-dimensional velocity dispersion of the gas (turbulent plus thermal), km/s.
    spin_temperature_k : float
        HI spin temperature, K (uniform).
    midplane_density_cm3 : float
        Azimuthally averaged HI density in the plane at R0, cm^-3 (the Sun itself lies
        between arms, where the density is lower by ``1 - arm_amplitude``).
    scale_length_kpc : float
        Exponential scale length of the surface density, kpc.
    hole_radius_kpc : float
        Radius of the central depression, kpc.
    scale_height_kpc : float
        Gaussian scale height (sigma_z) of the layer inside the solar circle, kpc.
    flare_length_kpc : float
        The scale height grows as exp((R - R0)/flare_length) beyond R0.
    n_arms : int
        Number of logarithmic spiral arms.
    pitch_angle_deg : float
        Pitch angle of the arms, degrees.
    arm_amplitude : float
        Fraction of the gas gathered into the arms, 0..1 (0: no arms).
    arm_sharpness : int
        Exponent q of the arm profile cos^{2q}(psi/2); larger is narrower.
    arm_reference_kpc : float
        Radius at which an arm crosses the Sun-centre line (phi = 0) inside the solar circle.
    max_distance_kpc : float
        Length of the path in the plane, kpc.

    Notes
    -----
    The formulas are in the module docstring. All methods take Galactic longitude and
    latitude in degrees and velocities in km/s (LSR); temperatures are in kelvin.
    """

    r0_kpc: float = 8.5
    theta0_kms: float = 220.0
    r_rise_kpc: float = 1.0
    sigma_v_kms: float = 8.0
    spin_temperature_k: float = 120.0
    midplane_density_cm3: float = 0.6
    scale_length_kpc: float = 3.5
    hole_radius_kpc: float = 2.5
    scale_height_kpc: float = 0.12
    flare_length_kpc: float = 8.0
    n_arms: int = 4
    pitch_angle_deg: float = 12.0
    arm_amplitude: float = 0.4
    arm_sharpness: int = 4
    arm_reference_kpc: float = 7.0
    max_distance_kpc: float = 25.0

    # -- structure ---------------------------------------------------------------------------
    def rotation_speed_kms(self, r_kpc: npt.ArrayLike) -> np.ndarray:
        """Circular speed Theta(R) in km/s; see :func:`rotation_speed_kms`."""
        return rotation_speed_kms(r_kpc, self.theta0_kms, self.r0_kpc, self.r_rise_kpc)

    def scale_height_at_kpc(self, r_kpc: npt.ArrayLike) -> np.ndarray:
        """Gaussian scale height h(R) of the layer, kpc: h0 inside R0, flaring outside.

        ``h(R) = h0 exp(max(R - R0, 0) / R_flare)``. The value 0.12 kpc for h0 follows the
        cold-plus-warm layer of Dickey & Lockman 1990 roughly (from memory).
        """
        r = np.asarray(r_kpc, dtype=float)
        return self.scale_height_kpc * np.exp(np.maximum(r - self.r0_kpc, 0.0)
                                              / self.flare_length_kpc)

    def density_cm3(self, r_kpc: npt.ArrayLike, phi_rad: npt.ArrayLike,
                    z_kpc: npt.ArrayLike) -> np.ndarray:
        """HI volume density n(R, phi, z) in cm^-3.

        Parameters
        ----------
        r_kpc, phi_rad, z_kpc : array_like
            Galactocentric cylindrical radius (kpc), azimuth (rad, 0 toward the Sun,
            increasing in the sense of rotation, i.e. toward l = 90 deg at the Sun) and height.

        Returns
        -------
        numpy.ndarray
            Density, cm^-3, broadcast shape of the inputs.

        Notes
        -----
        ``n = n0 S(R) A(R, phi) (h0/h) exp(-z^2 / 2h^2)``; S, A and h as in the module
        docstring. The arm term has azimuthal mean 1: mean of cos^{2q}(x/2) over x is
        C(2q, q)/4^q.
        """
        r = np.maximum(np.asarray(r_kpc, dtype=float), 1e-6)
        phi = np.asarray(phi_rad, dtype=float)
        z = np.asarray(z_kpc, dtype=float)
        surface = (np.exp(-(r - self.r0_kpc) / self.scale_length_kpc)
                   * -np.expm1(-(r / self.hole_radius_kpc) ** 4))
        q = int(self.arm_sharpness)
        mean = math.comb(2 * q, q) / 4.0 ** q
        psi = self.n_arms * (phi + np.log(r / self.arm_reference_kpc)
                             / math.tan(math.radians(self.pitch_angle_deg)))
        arms = (1.0 - self.arm_amplitude) + self.arm_amplitude * np.cos(psi / 2) ** (2 * q) / mean
        h = self.scale_height_at_kpc(r)
        vertical = (self.scale_height_kpc / h) * np.exp(-0.5 * (z / h) ** 2)
        return self.midplane_density_cm3 * surface * arms * vertical

    # -- lines of sight ----------------------------------------------------------------------
    def sightline(self, glon_deg: float, glat_deg: float) -> Sightline:
        """Path elements toward (l, b): positions, density, velocity and column.

        Parameters
        ----------
        glon_deg, glat_deg : float
            Galactic longitude and latitude, degrees.

        Returns
        -------
        Sightline
            Read-only arrays, ordered from the Sun outward (cached per direction, rounded to
            1e-6 deg).

        Notes
        -----
        ``x = R0 - d cos b cos l`` (toward the Sun from the centre), ``y = d cos b sin l``,
        ``R = hypot(x, y)``, ``phi = atan2(y, x)``, ``z = d sin b``;
        ``v = (Theta(R) R0/R - Theta0) sin l cos b`` (Binney & Merrifield 1998, sect. 9.1).
        """
        return _sightline(self, round(float(glon_deg) % 360.0, 6), round(float(glat_deg), 6))

    def column_density_cm2(self, glon_deg: float, glat_deg: float) -> float:
        """The model's true HI column density toward (l, b), cm^-2.

        ``N_HI = sum_i n_i ds`` over the same path elements that the radiative transfer uses,
        so it is the exact counterpart of ``1.823e18 int T_B dv`` in the optically thin limit.
        """
        return float(self.sightline(glon_deg, glat_deg).column_cm2.sum())

    def optical_depth(self, glon_deg: float, glat_deg: float,
                      v_lsr_kms: npt.ArrayLike) -> np.ndarray:
        """Total HI optical depth tau(v) toward (l, b), same shape as ``v_lsr_kms``.

        ``tau(v) = sum_i N_i phi_i(v) / (1.823e18 T_s)`` (Dickey & Lockman 1990).
        """
        v = np.asarray(v_lsr_kms, dtype=float)
        tau, _ = self._element_tau(glon_deg, glat_deg, v.ravel())
        return tau.sum(axis=0).reshape(v.shape)

    def brightness_temperature(self, glon_deg: float, glat_deg: float, v_lsr_kms: npt.ArrayLike,
                               beam_fwhm_deg: float = 0.0) -> np.ndarray:
        """HI line brightness temperature T_B(v) toward (l, b), kelvin.

        Parameters
        ----------
        glon_deg, glat_deg : float
            Galactic longitude and latitude of the beam centre, degrees.
        v_lsr_kms : array_like
            LSR velocities (radio convention; see the module notes), km/s, any shape.
        beam_fwhm_deg : float
            Beam full width at half maximum, degrees. 0 gives the pencil-beam profile; above 0
            the profile is the Gaussian-weighted mean over 7 directions: the centre (weight 1)
            and a hexagon at radius FWHM/2 (weight exp(-4 ln 2 (1/2)^2) = 1/2 each).

        Returns
        -------
        numpy.ndarray
            T_B in K, same shape as ``v_lsr_kms``.

        Notes
        -----
        Radiative transfer with foreground absorption::

            T_B(v) = sum_i T_s (1 - exp(-dtau_i(v))) exp(-sum_{j<i} dtau_j(v))

        References
        ----------
        Dickey, J. M. & Lockman, F. J. 1990, ARA&A 28, 215.
        """
        v = np.asarray(v_lsr_kms, dtype=float)
        flat = v.ravel()
        if beam_fwhm_deg <= 0.0:
            return self._pencil_tb(glon_deg, glat_deg, flat).reshape(v.shape)
        total = np.zeros_like(flat)
        weights = 0.0
        for lon, lat, w in beam_directions(glon_deg, glat_deg, beam_fwhm_deg):
            total += w * self._pencil_tb(lon, lat, flat)
            weights += w
        return (total / weights).reshape(v.shape)

    def continuum_temperature(self, glon_deg: float, glat_deg: float,
                              beam_fwhm_deg: float = 0.0) -> float:
        """Continuum brightness temperature at 1420 MHz toward (l, b), kelvin (rough model).

        Parameters
        ----------
        glon_deg, glat_deg : float
            Galactic longitude and latitude, degrees.
        beam_fwhm_deg : float
            Accepted for symmetry with :meth:`brightness_temperature`; the continuum model is
            smooth on scales of degrees, so it is evaluated at the beam centre.

        Returns
        -------
        float
            ``T_CMB + T_gal``, K.

        Notes
        -----
        A rough analytic form, from memory of the look of 1.4 GHz all-sky maps, not a fit::

            theta    = arccos(cos l cos b)                  angle from the Galactic centre
            g(w)     = exp(-theta^2 / (2 w^2))
            T_gal    = 0.6                                  isotropic halo, K
                     + 1.2 exp(-|b| / 12) (0.3 + 0.7 g(40))    thick synchrotron disk
                     + 4.0 exp(-b^2 / (2 * 2^2)) (0.25 + 0.75 g(30))   thin disk + HII

        (angles in degrees); using theta rather than l keeps the model single-valued at the
        poles.

        giving about 8.5 K at the centre, 5-6 K along the inner plane, ~4.5 K toward the
        anticentre and ~3.3 K at the poles (all including the CMB).

        References
        ----------
        Fixsen, D. J. 2009, ApJ 707, 916 (T_CMB = 2.725 K, from memory).
        """
        del beam_fwhm_deg
        lat = abs(float(glat_deg))
        cos_theta = math.cos(math.radians(glon_deg)) * math.cos(math.radians(lat))
        theta = math.degrees(math.acos(max(-1.0, min(1.0, cos_theta))))

        def g(width: float) -> float:
            return math.exp(-0.5 * (theta / width) ** 2)

        t_gal = (0.6
                 + 1.2 * math.exp(-lat / 12.0) * (0.3 + 0.7 * g(40.0))
                 + 4.0 * math.exp(-0.5 * (lat / 2.0) ** 2) * (0.25 + 0.75 * g(30.0)))
        return T_CMB_K + t_gal

    # -- internals ---------------------------------------------------------------------------
    def _element_tau(self, glon_deg: float, glat_deg: float,
                     v_kms: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
        """Optical depth of each kept element at each channel: (tau[n_el, n_chan], T_s)."""
        sl = self.sightline(glon_deg, glat_deg)
        col = sl.column_cm2
        keep = col > _KEEP_FRACTION * col.max() if col.size and col.max() > 0 else col > 0
        col, vel = col[keep], sl.velocity_kms[keep]
        sigma = self.sigma_v_kms
        # phi(v) = exp(-(v - v_i)^2 / 2 sigma^2) / (sqrt(2 pi) sigma)      [per km/s]
        # dtau   = N_i phi(v) / (1.823e18 T_s)                              (Dickey & Lockman)
        x = (v_kms[None, :] - vel[:, None]) / sigma
        norm = col / (NHI_PER_K_KMS * self.spin_temperature_k * math.sqrt(2 * math.pi) * sigma)
        tau = norm[:, None] * np.exp(-0.5 * x * x)
        return tau, np.full(col.shape, self.spin_temperature_k)

    def _pencil_tb(self, glon_deg: float, glat_deg: float, v_kms: np.ndarray) -> np.ndarray:
        """T_B for a pencil beam on a flat velocity array (only channels near the gas)."""
        out = np.zeros(v_kms.shape)
        sl = self.sightline(glon_deg, glat_deg)
        if sl.velocity_kms.size == 0 or v_kms.size == 0:
            return out
        reach = _PROFILE_SIGMAS * self.sigma_v_kms
        near = ((v_kms > sl.velocity_kms.min() - reach)
                & (v_kms < sl.velocity_kms.max() + reach))
        if not near.any():
            return out
        tau, t_spin = self._element_tau(glon_deg, glat_deg, v_kms[near])
        # absorption by the gas in front of element i: exp(-sum_{j<i} tau_j)
        in_front = np.cumsum(tau, axis=0) - tau
        emitted = t_spin[:, None] * -np.expm1(-tau)
        out[near] = (emitted * np.exp(-in_front)).sum(axis=0)
        return out


def beam_directions(glon_deg: float, glat_deg: float,
                    beam_fwhm_deg: float) -> list[tuple[float, float, float]]:
    """Seven sample directions within a Gaussian beam and their weights.

    Parameters
    ----------
    glon_deg, glat_deg : float
        Beam centre, degrees.
    beam_fwhm_deg : float
        Beam FWHM, degrees.

    Returns
    -------
    list of (float, float, float)
        ``(l, b, weight)``: the centre with weight 1 and six points on a hexagon of angular
        radius r = FWHM/2 at position angles 0, 60, ..., 300 deg, each weighted by the beam
        ``exp(-4 ln 2 (r/FWHM)^2) = 1/2``.

    Notes
    -----
    Offsets are true angular offsets on the sphere (valid at the poles), by the spherical
    cosine and sine rules::

        sin b' = sin b cos r + cos b sin r cos theta
        l'     = l + atan2(sin theta sin r cos b, cos r - sin b sin b')
    """
    lon0, lat0 = math.radians(glon_deg), math.radians(glat_deg)
    r = math.radians(0.5 * beam_fwhm_deg)
    weight = math.exp(-4.0 * math.log(2.0) * 0.25)
    out = [(float(glon_deg), float(glat_deg), 1.0)]
    for k in range(6):
        theta = math.radians(60.0 * k)
        sin_lat = (math.sin(lat0) * math.cos(r)
                   + math.cos(lat0) * math.sin(r) * math.cos(theta))
        lat = math.asin(max(-1.0, min(1.0, sin_lat)))
        lon = lon0 + math.atan2(math.sin(theta) * math.sin(r) * math.cos(lat0),
                                math.cos(r) - math.sin(lat0) * sin_lat)
        out.append((math.degrees(lon) % 360.0, math.degrees(lat), weight))
    return out


# 24 kB per sightline: 256 of them is 6 MB. A fixed pointing's beam needs a few dozen; a drift
# scan never comes back to a position, so a bigger cache would only grow the daemon's memory.
@functools.lru_cache(maxsize=256)
def _sightline(galaxy: ModelGalaxy, glon_deg: float, glat_deg: float) -> Sightline:
    """Build (and cache) the path elements toward (l, b); see :meth:`ModelGalaxy.sightline`."""
    lon, lat = math.radians(glon_deg), math.radians(glat_deg)
    sin_b, cos_b = math.sin(lat), math.cos(lat)
    d_max = galaxy.max_distance_kpc
    if abs(sin_b) > 0.0:
        d_max = min(d_max, _Z_LIMIT_KPC / abs(sin_b))
    step = d_max / _N_STEPS
    d = (np.arange(_N_STEPS) + 0.5) * step
    x = galaxy.r0_kpc - d * cos_b * math.cos(lon)
    y = d * cos_b * math.sin(lon)
    r = np.maximum(np.hypot(x, y), 1e-6)
    phi = np.arctan2(y, x)
    z = d * sin_b
    n = galaxy.density_cm3(r, phi, z)
    # v_LSR = (Theta(R) R0 / R - Theta0) sin l cos b       (Binney & Merrifield 1998, 9.1)
    v = ((galaxy.rotation_speed_kms(r) * galaxy.r0_kpc / r - galaxy.theta0_kms)
         * math.sin(lon) * cos_b)
    col = n * step * CM_PER_KPC
    arrays = [d, r, z, n, v, col]
    for a in arrays:
        a.setflags(write=False)
    return Sightline(d, r, z, n, v, col, step_kpc=step)
