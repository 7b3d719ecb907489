"""An independent, low-precision LSRK correction with numpy only (a test helper).

Nothing here uses astropy: it checks :func:`spinflip.daemon.sky.coordinates.vframe_lsrk_m_s` (which
relies on astropy's frames) from textbook formulas. The observer's velocity relative to the
kinematic LSR is the sum of three parts, all in J2000 equatorial axes (taken as ICRS: the two
differ by some tens of milliarcseconds):

1. Earth's heliocentric velocity, minus the time derivative of the Sun's geocentric position
   from the Astronomical Almanac's low-precision formulas;
2. the site's velocity from the Earth's rotation, omega x r;
3. the standard solar motion, 20 km/s toward RA 18h, Dec +30 deg (B1900), precessed to J2000.

VFRAME = (v_1 + v_2 + v_3) . n_hat, n_hat the unit vector toward the target (J2000/ICRS).

Left out, with their size: the Sun's motion about the solar-system barycentre (astropy's LSRK
is barycentric; up to about 13 m/s), the Earth's motion about the Earth-Moon barycentre (about
12 m/s), the formulas' own error (0.01 deg in the Sun's longitude), precession and nutation
of the rotation velocity (0.46 km/s turned by under 0.5 deg: a few m/s). Together well under
0.1 km/s.

References
----------
The Astronomical Almanac, section C, "Low-precision formulas for the Sun" (from memory).
Gordon, M. A. 1976, in Methods of Experimental Physics 12C (standard solar motion).
Lieske, J. H. et al. 1977, A&A 58, 1 (IAU 1976 precession angles; quoted from memory).
ESA 1997, The Hipparcos Catalogue, vol. 1, sect. 1.5.3 (Galactic frame in ICRS; from memory).
NIMA TR8350.2 (WGS84 ellipsoid; from memory).
"""

import numpy as np

AU_M = 149_597_870_700.0          # IAU 2012, exact
DAY_S = 86_400.0
JD_J2000 = 2_451_545.0
JULIAN_CENTURY_D = 36_525.0
JD_B1900 = 2_415_020.3135         # Besselian epoch B1900.0 (from memory)

OMEGA_EARTH_RAD_S = 7.2921150e-5  # Earth's rotation rate (IERS value, from memory)
WGS84_A_M = 6_378_137.0           # WGS84 semi-major axis (from memory)
WGS84_F = 1.0 / 298.257223563     # WGS84 flattening (from memory)

SOLAR_MOTION_M_S = 20_000.0       # standard solar motion (Gordon 1976)
SOLAR_APEX_RA_B1900_DEG = 270.0   # 18h
SOLAR_APEX_DEC_B1900_DEG = 30.0

# General precession in longitude, 5029.0966 arcsec per Julian century (from memory).
PRECESSION_LON_DEG_PER_CENTURY = 5029.0966 / 3600.0

# North Galactic pole and longitude of the ascending node of the Galactic plane on the ICRS
# equator, Hipparcos definition (ESA 1997, from memory).
NGP_RA_DEG = 192.85948
NGP_DEC_DEG = 27.12825
GAL_NODE_L_DEG = 32.93192

# The same rotation as printed in ESA 1997 (ICRS -> Galactic rows; from memory), kept to check
# the pole construction below against.
ICRS_TO_GALACTIC_PRINTED = np.array([
    [-0.0548755604, -0.8734370902, -0.4838350155],
    [+0.4941094279, -0.4448296300, +0.7469822445],
    [-0.8676661490, -0.1980763734, +0.4559837762],
])


def unit_vector(lon_deg, lat_deg) -> np.ndarray:
    """(cos b cos l, cos b sin l, sin b), shape (3, ...)."""
    lon, lat = np.radians(lon_deg), np.radians(lat_deg)
    return np.array([np.cos(lat) * np.cos(lon), np.cos(lat) * np.sin(lon), np.sin(lat)])


def lon_lat_deg(v: np.ndarray) -> tuple:
    """Inverse of :func:`unit_vector`: longitude in [0, 360) and latitude, deg."""
    lon = np.degrees(np.arctan2(v[1], v[0])) % 360.0
    lat = np.degrees(np.arctan2(v[2], np.hypot(v[0], v[1])))
    return lon, lat


def icrs_to_galactic_matrix() -> np.ndarray:
    """Rows are the Galactic x, y, z axes in ICRS, built from the pole and the node.

    z_G points at the north Galactic pole (alpha_G, delta_G). The ascending node N of the
    Galactic plane on the equator lies at RA alpha_G + 90 deg, Dec 0, and has Galactic
    longitude l_N; with v(l) = cos l x_G + sin l y_G in the plane, N = v(l_N) and
    z_G x N = cos l_N y_G - sin l_N x_G, so x_G = cos l_N N - sin l_N (z_G x N), y_G = z_G x x_G.
    """
    z = unit_vector(NGP_RA_DEG, NGP_DEC_DEG)
    node = unit_vector(NGP_RA_DEG + 90.0, 0.0)
    ln = np.radians(GAL_NODE_L_DEG)
    x = np.cos(ln) * node - np.sin(ln) * np.cross(z, node)
    y = np.cross(z, x)
    return np.array([x, y, z])


def galactic_to_radec_deg(l_deg, b_deg) -> tuple:
    """ICRS (RA, Dec) in deg of Galactic (l, b), by the rotation above (transposed)."""
    v = icrs_to_galactic_matrix().T @ unit_vector(l_deg, b_deg)
    return lon_lat_deg(v)


def sun_geocentric_au(jd) -> np.ndarray:
    """Geocentric Sun in J2000 equatorial axes, AU (Astronomical Almanac, section C).

    n = JD - 2451545.0
    L = 280.460 + 0.9856474 n       (mean longitude, deg)
    g = 357.528 + 0.9856003 n       (mean anomaly, deg)
    lambda = L + 1.915 sin g + 0.020 sin 2g      (ecliptic longitude, equinox of date)
    R = 1.00014 - 0.01671 cos g - 0.00014 cos 2g (distance, AU)

    The longitude is referred to the J2000 equinox by subtracting the general precession
    p_A = 1.39697 deg per Julian century; the ecliptic is turned to the equator by the J2000
    obliquity epsilon = 23.439 deg (the Almanac's 23.439 - 0.0000004 n at n = 0: the ecliptic
    is then that of J2000, whose tilt against the ecliptic of date, under 0.01 deg here, is
    left out).
    """
    n = np.asarray(jd, dtype=float) - JD_J2000
    L = 280.460 + 0.9856474 * n
    g = np.radians(357.528 + 0.9856003 * n)
    lam_deg = L + 1.915 * np.sin(g) + 0.020 * np.sin(2 * g)
    lam_deg = lam_deg - PRECESSION_LON_DEG_PER_CENTURY * n / JULIAN_CENTURY_D
    r_au = 1.00014 - 0.01671 * np.cos(g) - 0.00014 * np.cos(2 * g)
    lam, eps = np.radians(lam_deg), np.radians(23.439)
    return r_au * np.array([np.cos(lam), np.cos(eps) * np.sin(lam), np.sin(eps) * np.sin(lam)])


def earth_velocity_m_s(jd, step_d: float = 0.05) -> np.ndarray:
    """Earth's heliocentric velocity: - d/dt of the Sun's geocentric position (central
    difference, error of order (2 pi step / year)^2 / 6, about 1e-7 relative), m/s."""
    d_au = sun_geocentric_au(np.asarray(jd) + step_d) - sun_geocentric_au(np.asarray(jd) - step_d)
    return -d_au / (2 * step_d) * AU_M / DAY_S


def site_velocity_m_s(jd_ut, lat_deg, lon_deg, height_m) -> np.ndarray:
    """Velocity of a site from the Earth's rotation, omega x r, equator of date, m/s.

    Geodetic (WGS84) to the distance from the rotation axis:
    N = a / sqrt(1 - e^2 sin^2 phi), e^2 = f (2 - f), rho = (N + h) cos phi.
    Local sidereal angle theta = GMST + east longitude, with
    GMST = 18.697374558 h + 24.06570982441908 h * D, D = JD_UT - 2451545.0 (USNO's
    approximate formula, from memory; UTC stands in for UT1, an error under 1 s).
    omega x r = omega rho (-sin theta, cos theta, 0).
    """
    phi = np.radians(lat_deg)
    e2 = WGS84_F * (2 - WGS84_F)
    n_m = WGS84_A_M / np.sqrt(1 - e2 * np.sin(phi) ** 2)
    rho_m = (n_m + height_m) * np.cos(phi)
    gmst_h = 18.697374558 + 24.06570982441908 * (np.asarray(jd_ut, dtype=float) - JD_J2000)
    theta = np.radians(15.0 * gmst_h + lon_deg)
    return OMEGA_EARTH_RAD_S * rho_m * np.array([-np.sin(theta), np.cos(theta),
                                                 np.zeros_like(theta)])


def precession_matrix_iau1976(jd_from: float, jd_to: float) -> np.ndarray:
    """Mean equator and equinox of ``jd_from`` -> those of ``jd_to`` (Lieske et al. 1977).

    T = (jd_from - J2000) / 36525, t = (jd_to - jd_from) / 36525, in arcsec:
    zeta  = (2306.2181 + 1.39656 T - 0.000139 T^2) t + (0.30188 - 0.000344 T) t^2 + 0.017998 t^3
    z     = (2306.2181 + 1.39656 T - 0.000139 T^2) t + (1.09468 + 0.000066 T) t^2 + 0.018203 t^3
    theta = (2004.3109 - 0.85330 T - 0.000217 T^2) t - (0.42665 + 0.000217 T) t^2 - 0.041833 t^3
    P = R3(-z) R2(theta) R3(-zeta), with R_k(a) the rotation of the axes by a about axis k.
    """
    T = (jd_from - JD_J2000) / JULIAN_CENTURY_D
    t = (jd_to - jd_from) / JULIAN_CENTURY_D
    a = 2306.2181 + 1.39656 * T - 0.000139 * T ** 2
    zeta = a * t + (0.30188 - 0.000344 * T) * t ** 2 + 0.017998 * t ** 3
    z = a * t + (1.09468 + 0.000066 * T) * t ** 2 + 0.018203 * t ** 3
    theta = ((2004.3109 - 0.85330 * T - 0.000217 * T ** 2) * t
             - (0.42665 + 0.000217 * T) * t ** 2 - 0.041833 * t ** 3)
    zeta, z, theta = (np.radians(x / 3600.0) for x in (zeta, z, theta))

    def r2(x):
        c, s = np.cos(x), np.sin(x)
        return np.array([[c, 0, -s], [0, 1, 0], [s, 0, c]])

    def r3(x):
        c, s = np.cos(x), np.sin(x)
        return np.array([[c, s, 0], [-s, c, 0], [0, 0, 1]])

    return r3(-z) @ r2(theta) @ r3(-zeta)


def solar_motion_m_s() -> np.ndarray:
    """The standard solar motion as a J2000 vector, m/s (Gordon 1976; Lieske et al. 1977)."""
    apex_b1900 = unit_vector(SOLAR_APEX_RA_B1900_DEG, SOLAR_APEX_DEC_B1900_DEG)
    return SOLAR_MOTION_M_S * precession_matrix_iau1976(JD_B1900, JD_J2000) @ apex_b1900


def vframe_lsrk_m_s(jd_utc, lat_deg, lon_deg, height_m, ra_deg, dec_deg) -> float:
    """VFRAME (m/s) = (v_Earth,helio + v_rotation + v_solar motion) . n_hat (see module)."""
    v = earth_velocity_m_s(jd_utc) + site_velocity_m_s(jd_utc, lat_deg, lon_deg, height_m) \
        + solar_motion_m_s()
    return float(v @ unit_vector(ra_deg, dec_deg))
