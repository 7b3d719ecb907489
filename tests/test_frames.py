"""Velocity axis and LSRK correction against astropy (independent code paths)."""

import numpy as np
import pytest
from astropy import units as u
from astropy.coordinates import Galactic, SkyCoord, SpectralCoord
from astropy.time import Time

from spinflip.daemon import frames
from spinflip.daemon.lines import C_M_S, HI_REST_FREQ_HZ, radio_frequency_hz, radio_velocity_m_s


def test_rest_frequency():
    # Hellwig et al. 1970 (value from memory): 1420.405751768 MHz
    assert HI_REST_FREQ_HZ == pytest.approx(1420.405751768e6, abs=1e-3)


def test_radio_velocity_matches_astropy_doppler_radio():
    # FITS WCS paper III (Greisen et al. 2006) radio convention, as astropy's doppler_radio
    f = np.linspace(1419.0e6, 1421.5e6, 101)
    ref = (f * u.Hz).to(u.m / u.s, equivalencies=u.doppler_radio(HI_REST_FREQ_HZ * u.Hz)).value
    np.testing.assert_allclose(radio_velocity_m_s(f), ref, rtol=0, atol=1e-6)
    np.testing.assert_allclose(radio_frequency_hz(ref), f, rtol=1e-13)


@pytest.mark.parametrize("iso, lat, lon, l, b", [
    ("2026-03-01T02:00:00", 46.82, 8.37, 30.0, 0.0),
    ("2026-09-15T20:00:00", -33.9, 18.4, 120.0, 5.0),
    ("2027-06-21T12:00:00", 60.1, -150.0, 200.0, -10.0),
    ("2025-12-24T23:30:00", 0.0, 100.0, 330.0, 40.0),
])
def test_vframe_against_astropy_spectralcoord(iso, lat, lon, l, b):
    """VFRAME from our velocity projection vs astropy's SpectralCoord LSRK transform."""
    t = Time(iso, scale="utc")
    loc = frames.site_location(lat, lon, 300.0)
    target = SkyCoord(l=l * u.deg, b=b * u.deg, frame=Galactic(), distance=1 * u.kpc,
                      radial_velocity=0 * u.km / u.s, pm_l_cosb=0 * u.mas / u.yr, pm_b=0 * u.mas / u.yr)
    sc = SpectralCoord(HI_REST_FREQ_HZ * u.Hz, observer=loc.get_itrs(t), target=target)
    f_lsrk = sc.with_observer_stationary_relative_to("lsrk").to_value(u.Hz)
    v_ref = C_M_S * (HI_REST_FREQ_HZ - f_lsrk) / HI_REST_FREQ_HZ
    ours = frames.vframe_lsrk_m_s(SkyCoord(l=l * u.deg, b=b * u.deg, frame=Galactic()), loc, t)
    assert abs(ours - v_ref) < 10.0   # m/s, i.e. 0.01 km/s
    assert abs(ours) < 60e3           # Earth orbit + rotation + solar motion stay below ~50 km/s


def test_best_plane_longitude_is_above_horizon():
    loc = frames.site_location(46.82, 8.37, 640.0)
    for hours in range(0, 24, 3):
        t = Time("2026-12-02T00:00:00") + hours * u.hour
        l = frames.best_plane_longitude(loc, t, 10.0)
        az, el = frames.galactic_to_altaz(l, 0.0, loc, t)
        assert el > 10.0
