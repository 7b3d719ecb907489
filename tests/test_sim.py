"""The simulated telescope: line placement with the true LSRK shift, receiver effects."""

import numpy as np
from astropy import units as u
from astropy.coordinates import Galactic, SkyCoord, SpectralCoord

from spinflip.daemon import config
from spinflip.daemon.dsp.samples import u8_to_complex
from spinflip.daemon.sky.hi_line import C_M_S, HI_REST_FREQ_HZ
from spinflip.daemon.sources.sim import SimSource


def _source(**sim):
    cfg = config.load(None)
    cfg["sim"].update({"start": "2026-03-01T04:00:00", **sim})
    src = SimSource(cfg, fast=True)
    src.set_pointing(lambda t: SkyCoord(l=30 * u.deg, b=0 * u.deg, frame=Galactic()))
    return cfg, src


def test_simulated_line_shift_matches_astropy_spectralcoord():
    # A narrow line at v_LSRK = +50 km/s must appear at the topocentric frequency astropy's
    # SpectralCoord gives for the simulated time and site.
    cfg, src = _source()
    class NarrowLine:
        def brightness_temperature(self, l, b, v, beam_fwhm_deg=0.0):
            return 10 * np.exp(-0.5 * ((v - 50.0) / 0.5) ** 2)

        def continuum_temperature(self, l, b):
            return 3.0
    src.galaxy = NarrowLine()
    temp, pos = src._sky_psd(src.t_start, HI_REST_FREQ_HZ)
    f_peak = HI_REST_FREQ_HZ + src.base_freq[np.argmax(temp)]
    loc = src.location
    target = SkyCoord(l=30 * u.deg, b=0 * u.deg, frame=Galactic(), distance=1 * u.kpc,
                      radial_velocity=0 * u.km / u.s, pm_l_cosb=0 * u.mas / u.yr, pm_b=0 * u.mas / u.yr)
    sc = SpectralCoord(HI_REST_FREQ_HZ * u.Hz, observer=loc.get_itrs(src.t_start), target=target)
    vframe = C_M_S * (HI_REST_FREQ_HZ - sc.with_observer_stationary_relative_to("lsrk").to_value(u.Hz)) / HI_REST_FREQ_HZ
    f_expected = HI_REST_FREQ_HZ * (1 - (50e3 - vframe) / C_M_S)
    chan = src.base_freq[1] - src.base_freq[0]
    assert abs(f_peak - f_expected) <= 1.5 * chan
    assert abs(vframe) > 1e3   # the correction is not negligible at this date


def test_samples_are_8bit_and_reproducible():
    _, a = _source(seed=5)
    _, b = _source(seed=5)
    a.open(); b.open()
    ba, bb = a.read(), b.read()
    assert ba.raw.dtype == np.uint8 and np.array_equal(ba.raw, bb.raw)
    x = u8_to_complex(ba.raw[2 * 20000:])
    # input level near the reference rms at the default gain, no clipping worth speaking of
    assert 0.1 < x.real.std() < 0.25
    assert np.mean(np.abs(x.real) >= 0.999) < 1e-3


def test_gain_setting_drives_clipping():
    _, hot = _source()
    hot.cfg["source"]["gain"] = 50.0
    hot.amplitude *= 10 ** (9.8 / 20)
    hot.open()
    raw = hot.read().raw
    assert np.mean((raw == 0) | (raw == 255)) > 0.005


def test_noise_source_adds_power():
    cfg, s = _source()
    s.open()
    s.read()
    off = u8_to_complex(s.read().raw).var()
    s.set_cal(True)
    on = u8_to_complex(s.read().raw).var()
    t_sys = s.truth.tsys_k
    # power ratio (Tsys + Tcal) / Tsys within a few per cent (line adds a little)
    assert on / off > 1 + 0.7 * cfg["calibration"]["noise_source_k"] / (t_sys + 30)
