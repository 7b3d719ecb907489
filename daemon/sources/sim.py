"""The built-in simulated telescope: sky, dish and receiver down to the dongle's 8-bit samples.

Signal model, per block of samples at LO frequency f_LO (baseband frequency f, sky nu = f_LO + f):

    P(f) = g(t) B(f) [T_line(nu) + T_cont + T_spill + T_rx + T_cal]      (noise power density)
    P_img(f) = eps_img P(-f)                                               (IQ-imbalance image)

- T_line: the model galaxy's brightness temperature (``galaxy.ModelGalaxy``) smoothed by the
  dish beam (HPBW ~ 1.2 lambda/D, common practice), on the LSRK radio-velocity axis, moved to
  the topocentric frame with the true VFRAME for the simulated time and site
  (v_topo = v_LSRK - VFRAME).
- T_cont continuum, T_spill ground spillover, T_rx receiver, T_cal the noise source when on
  (``sim.noise_source_k``, its true value; the schedule fires it through :class:`CalControl`).
- Calibration loads (``load``): "hot", an absorber at ``sim.ambient_k`` covering the feed (it
  replaces sky, line and spillover); "cold", the cold sky near the zenith (``sim.cold_sky_k``
  plus spillover, no line).
- g(t) = 1 + a sin(2 pi t / P): slow gain drift. B(f): the tuner's band-pass, a flat top with
  ripple and a steep roll-off toward the band edges.
- Samples are complex Gaussian noise with that spectrum, made by shaping white noise in the
  frequency domain (X_k = sqrt(N P_k / 2)(a_k + i b_k), x = IFFT(X), so E|x|^2 = mean P), plus a
  DC offset (the spike at the LO), optional interference (a steady carrier, an intermittent
  carrier, impulsive bursts), garbage for a few ms after each retune, then 8-bit quantisation
  with clipping at the rails; the input level follows the tuner gain setting.

Time: simulated time is ``sim.start`` plus the samples made so far; in real time the samples
are paced to the wall clock, under ``--fast`` they come as fast as they can be made. A plan
holds a fast simulator to the wall clock while it waits on the mount
(:meth:`SimSource.set_real_time`: a slew or the observer takes as long as it takes) and jumps it
ahead while it waits for a target to rise (:meth:`SimSource.skip`). The beam points wherever
:meth:`SimSource.set_pointing` last said (a plan passes where the dish really points).
"""

from __future__ import annotations

import threading
import time as _time
from collections.abc import Callable
from dataclasses import dataclass
from typing import TypedDict

import numpy as np
import scipy.fft
from astropy import units as u
from astropy.coordinates import SkyCoord
from astropy.time import Time

from spinflip.daemon.calibration.noise_source import CalControl
from spinflip.daemon.dsp.block import Block
from spinflip.daemon.dsp.samples import complex_to_u8
from spinflip.daemon.dsp.switching import Schedule
from spinflip.daemon.sky import coordinates
from spinflip.daemon.sky.beam import beamwidth_deg
from spinflip.daemon.sky.hi_line import C_M_S, HI_REST_FREQ_HZ
from spinflip.daemon.sources.base import FiresNoiseSource, SourceError
from spinflip.daemon.sources.complex_noise import shaped_complex_normal
from spinflip.daemon.sources.galaxy import ModelGalaxy
from spinflip.daemon.sources.sample_clock import SampleClock

_CHUNK = 65536                 # samples per frequency-domain shaping chunk
_GAIN_REF_DB = 40.2            # gain at which the rms per component is _RMS_REF of full scale
_RMS_REF = 0.16
_GARBAGE_S = 0.004             # samples after a retune that are junk (PLL relocking)
_TSYS_NOMINAL_K = 85.0         # Tsys at which the input rms is _RMS_REF at the reference gain
_CACHED_SKIES = 4              # sky spectra kept (2 LOs x this bucket and the last): memory
_SKY_REFRESH_S = 5.0           # recompute the sky spectrum this often (simulated seconds)
_V_GRID = np.linspace(-400.0, 400.0, 1601)   # LSRK radio velocity grid of the line model, km/s


def tuner_bandpass(f_hz: np.ndarray, sample_rate: float) -> np.ndarray:
    """Relative power response of the simulated tuner + decimation filter chain.

    A Butterworth-like roll-off, |H|^2 = 1 / (1 + (f / f_c)^16) with f_c = 0.43 fs, times a
    3 % ripple of period 280 kHz and a slight tilt.
    """
    fc = 0.43 * sample_rate
    ripple = 1.0 + 0.03 * np.cos(2 * np.pi * f_hz / 280e3 + 0.7) + 0.04 * f_hz / sample_rate
    return ripple / (1.0 + (f_hz / fc) ** 16)


#: Simulated carriers (``sim.rfi = true``): sky frequency (Hz), amplitude (of full scale at the
#: reference gain; the noise is 0.16 per component there) and duty cycle (on for that share of
#: every 10 s). One strong steady carrier sits where HI can be (1420.9 MHz); the others lie
#: outside the Galactic velocities of the default pointing, from strong to below detection.
RFI_CARRIERS = (
    (1420.900e6, 0.02, 1.0),
    (1419.650e6, 0.03, 0.3),
    (1419.300e6, 0.006, 1.0),
    (1419.450e6, 0.0025, 1.0),
    (1419.560e6, 0.0016, 1.0),
    (1421.200e6, 0.004, 1.0),
    (1418.700e6, 0.0018, 1.0),
    (1419.800e6, 0.0006, 1.0),
)
#: Simulated bursts: one every ``period_s``, ``length_s`` long, complex Gaussian of the given
#: amplitudes per component in turn.
class _Bursts(TypedDict):
    period_s: float
    length_s: float
    amplitudes: tuple[float, ...]


RFI_BURSTS: _Bursts = {"period_s": 0.25, "length_s": 200e-6, "amplitudes": (0.5, 0.15)}


def carrier_on(duty: float, t_rel_s: float) -> bool:
    """Whether a carrier of this duty cycle is on at ``t_rel_s`` (on first in each 10 s)."""
    return duty >= 1 or (t_rel_s % 10.0) < 10.0 * duty


@dataclass
class TrueSky:
    """What the simulator put in, for tests of the calibration."""

    tsys_k: float         # system temperature without the line, noise source off
    t_cont_k: float
    vframe_m_s: float
    tcal_k: float = 0.0   # the noise source's true excess temperature
    v_grid_km_s: np.ndarray | None = None     # LSRK radio velocity grid of the line model
    tb_k: np.ndarray | None = None            # beam-smoothed line brightness on that grid
    glon_deg: float = 0.0
    glat_deg: float = 0.0

    @property
    def line_integral_k_km_s(self) -> float:
        """Integral of the model line over velocity, K km/s (0 for a load)."""
        if self.tb_k is None:
            return 0.0
        assert self.v_grid_km_s is not None, "a line model comes with its velocity grid"
        return float(np.sum(self.tb_k) * (self.v_grid_km_s[1] - self.v_grid_km_s[0]))


class SimSource(FiresNoiseSource):
    """Simulated telescope source; yields Blocks like the dongle would (see module docstring)."""

    kind = "sim"

    def __init__(self, cfg: dict, fast: bool = False):
        self.cfg = cfg
        self.fast = fast
        src, sim, site = cfg["source"], cfg["sim"], cfg["site"]
        self.fs = src["sample_rate"]
        self.block_samples = (src["block_samples"] // _CHUNK) * _CHUNK or _CHUNK
        self.schedule = Schedule.from_config(cfg, block_samples=self.block_samples)
        self.rng = np.random.default_rng(sim["seed"])
        self.location = coordinates.site_location(site["lat"], site["lon"], site["height_m"])
        start = sim["start"]
        self.t_start = Time.now() if start == "now" else Time(start, scale="utc")
        self._live = start == "now"
        self.clock: SampleClock | None = None
        self.galaxy = ModelGalaxy()
        self.beam_fwhm_deg = beamwidth_deg(site["dish_diameter_m"])
        self.base_freq = scipy.fft.fftfreq(_CHUNK, 1.0 / self.fs)
        self.bandpass = tuner_bandpass(self.base_freq, self.fs)
        self.amplitude = _RMS_REF * 10 ** ((src["gain"] - _GAIN_REF_DB) / 20)
        self.cal = CalControl()   # the pipeline gives it the configured switch and its events
        self.diode_on = False     # the simulated noise source's true state
        self.forced_cal: bool | None = None   # True / False: held there (hot/cold procedure), not scheduled
        self._fire = threading.Event()   # a control command: an extra firing as soon as possible
        self._extra_from: int | None = None
        self.load: str | None = None   # None (the sky), "hot" or "cold"
        self._pointing_lock = threading.Lock()
        self.pointing: Callable[[Time], SkyCoord] | None = None   # set_pointing(): callable(time) -> SkyCoord
        self._pointing_version = 0   # a new pointing is a new sky
        self._pace_lock = threading.Lock()
        self._paced = not fast       # held to the wall clock
        self._anchor: tuple[float, float] | None = None   # (monotonic s, simulated s) of pacing
        self._skip_s = 0.0           # simulated time skipped (a plan waiting under --fast)
        self._sky_cache: dict[tuple, tuple[np.ndarray, dict]] = {}
        self._where_cache: tuple[tuple, tuple[dict, float]] | None = None
        self._line_cache: tuple[tuple, np.ndarray] | None = None
        self._power_cache: dict[tuple, tuple[np.ndarray, np.ndarray]] = {}
        self._tones: dict = {}    # (baseband Hz, samples) -> exp(2 pi i f k / fs), for carriers
        self._index = 0
        self._wall0: float | None = None   # set by open()
        self.truth: TrueSky | None = None

    # -- the sky ---------------------------------------------------------------------------
    def _sky_psd(self, t: Time, lo_hz: float) -> tuple[np.ndarray, dict]:
        """(Antenna + receiver temperature in K over the chunk's baseband grid, position)."""
        bucket = (round((t - self.t_start).sec / _SKY_REFRESH_S), lo_hz, self.load,
                  self._pointing_version)
        if bucket in self._sky_cache:
            return self._sky_cache[bucket]
        sim = self.cfg["sim"]
        if self.load is not None:
            outside = sim["ambient_k"] if self.load == "hot" else sim["cold_sky_k"] + sim["spillover_k"]
            base = outside + sim["receiver_k"]
            self.truth = TrueSky(tsys_k=base, t_cont_k=0.0, vframe_m_s=0.0,
                                 tcal_k=sim["noise_source_k"])
            self._sky_cache[bucket] = (np.full(_CHUNK, base), {})
            return self._sky_cache[bucket]
        pos, vframe = self._where(t, bucket[0], bucket[3])
        v_grid = _V_GRID
        tb = self._line_model(pos["GLON"], pos["GLAT"])
        nu = lo_hz + self.base_freq
        v_lsrk_kms = (C_M_S * (HI_REST_FREQ_HZ - nu) / HI_REST_FREQ_HZ + vframe) / 1e3
        line = np.interp(v_lsrk_kms, v_grid, tb, left=0.0, right=0.0)
        t_cont = self.galaxy.continuum_temperature(pos["GLON"], pos["GLAT"])
        base = t_cont + sim["spillover_k"] + sim["receiver_k"]
        self.truth = TrueSky(tsys_k=base, t_cont_k=t_cont, vframe_m_s=vframe,
                             tcal_k=sim["noise_source_k"], v_grid_km_s=v_grid, tb_k=tb,
                             glon_deg=pos["GLON"], glat_deg=pos["GLAT"])
        if len(self._sky_cache) >= _CACHED_SKIES:       # both LOs of the current sky
            self._sky_cache.clear()
        self._sky_cache[bucket] = (line + base, pos)
        return self._sky_cache[bucket]

    def _where(self, t: Time, t_bucket: int, version: int) -> tuple[dict, float]:
        """(Position, VFRAME m/s) of the beam at ``t``; one computation per sky bucket and
        pointing, shared by the LO frequencies of a switching cycle."""
        key = (t_bucket, version)
        if self._where_cache is not None and self._where_cache[0] == key:
            return self._where_cache[1]
        with self._pointing_lock:
            pointing = self.pointing
        assert pointing is not None, "the sky needs set_pointing() first"
        coord = pointing(t)
        pos = coordinates.describe(coord, self.location, t)
        vframe = float(coordinates.vframe_lsrk_m_s(coord, self.location, t))   # one time
        self._where_cache = (key, (pos, vframe))
        return pos, vframe

    def _line_model(self, glon: float, glat: float) -> np.ndarray:
        """Beam-smoothed line brightness on :data:`_V_GRID`; kept while the beam stays on the
        same position (a fixed Galactic pointing never leaves it), recomputed when it moves."""
        key = (glon, glat, self.beam_fwhm_deg, id(self.galaxy))
        if self._line_cache is not None and self._line_cache[0] == key:
            return self._line_cache[1]
        tb = self.galaxy.brightness_temperature(glon, glat, _V_GRID,
                                                beam_fwhm_deg=self.beam_fwhm_deg)
        self._line_cache = (key, tb)
        return tb

    def _power(self, t: Time, lo_hz: float) -> np.ndarray:
        """float32 E|X_k|^2 per shaping bin before the gain drift, for the sky at ``t`` seen at
        ``lo_hz`` with the noise source as it is; cached with the sky spectrum.

        P(f) = B(f) T(f), P_img(f) = 10^-2.5 P(-f) (image at -25 dB), scaled so that the mean
        temperature at the nominal Tsys gives the reference rms: E|X_k|^2 = N (P + P_img) s
        with s = 2 A_ref^2 / (mean(B) T_nominal), and x = IFFT(X) has E|x|^2 = mean P s.
        """
        sky, _ = self._sky_psd(t, lo_hz)
        t_cal = self.cfg["sim"]["noise_source_k"] if self.diode_on else 0.0
        key = (id(sky), t_cal, self.amplitude)
        cached = self._power_cache.get(key)
        if cached is not None and cached[0] is sky:     # the very array (ids can be reused)
            return cached[1]
        temp = sky + t_cal
        psd = self.bandpass * temp
        psd = psd + 10 ** (-2.5) * psd[(-np.arange(_CHUNK)) % _CHUNK]     # image at -25 dB
        scale = 2 * self.amplitude ** 2 / (self.bandpass.mean() * _TSYS_NOMINAL_K)
        power = (_CHUNK * scale * psd).astype(np.float32)
        if len(self._power_cache) >= 2 * _CACHED_SKIES:  # and the noise source on or off
            self._power_cache.clear()
        self._power_cache[key] = (sky, power)
        return power

    def _gain(self, t_rel_s: float) -> float:
        sim = self.cfg["sim"]
        return 1.0 + sim["gain_drift"] * np.sin(2 * np.pi * t_rel_s / sim["gain_drift_period_s"])

    # -- the receiver ----------------------------------------------------------------------
    def _samples(self, t_rel_s: float, lo_hz: float, hop: bool) -> np.ndarray:
        t = self.t_start + t_rel_s * u.s
        power = self._power(t, lo_hz) * np.float32(self._gain(t_rel_s))
        # X_k = sqrt(E|X_k|^2 / 2) (a_k + i b_k) per chunk, x = IFFT(X) in place
        spec = shaped_complex_normal(self.rng, power, self.block_samples // _CHUNK)
        x = scipy.fft.ifft(spec, axis=1, workers=1, overwrite_x=True).reshape(-1)
        x += np.complex64(0.006 + 0.004j)                                     # DC offset
        if self.cfg["sim"]["rfi"]:
            self._add_rfi(x, t_rel_s, lo_hz)
        if hop:
            n = int(_GARBAGE_S * self.fs)
            x[:n] = (self.rng.uniform(-1, 1, n) + 1j * self.rng.uniform(-1, 1, n)).astype(np.complex64)
        return x

    def _add_rfi(self, x: np.ndarray, t_rel_s: float, lo_hz: float) -> None:
        """Carriers (:data:`RFI_CARRIERS`) and impulsive broadband bursts (:data:`RFI_BURSTS`)."""
        n = x.size
        scale = self.amplitude / _RMS_REF            # interference follows the tuner gain too
        for f_sky, amp, duty in RFI_CARRIERS:
            f = f_sky - lo_hz
            if abs(f) < self.fs / 2 and carrier_on(duty, t_rel_s):
                # exp(2 pi i f (t0 + k / fs)) = exp(2 pi i f t0) * exp(2 pi i f k / fs)
                key = (f, n)
                if key not in self._tones:
                    self._tones[key] = np.exp(2j * np.pi * f * np.arange(n) / self.fs
                                              ).astype(np.complex64)
                x += np.complex64(scale * amp * np.exp(2j * np.pi * f * t_rel_s)) * self._tones[key]
        period = int(round(RFI_BURSTS["period_s"] * self.fs))
        length = int(round(RFI_BURSTS["length_s"] * self.fs))
        first = int(round(t_rel_s * self.fs))
        start = (-first) % period
        for s in range(start, n, period):
            k = (first + s) // period                  # burst number since the start
            amp = RFI_BURSTS["amplitudes"][k % len(RFI_BURSTS["amplitudes"])]
            m = min(n, s + length) - s
            x[s:s + m] += (scale * amp * (self.rng.standard_normal(m)
                                          + 1j * self.rng.standard_normal(m))).astype(np.complex64)

    # -- the Source interface --------------------------------------------------------------
    def open(self) -> None:
        self._wall0 = _time.monotonic()
        self._anchor = (self._wall0, 0.0) if self._paced else None
        # live ("now", real time): stamped like a dongle's samples, from the monotonic clock
        # anchored to the system clock, whose steps are noticed (sample_clock); a set start
        # date is simulated time, which no clock step touches
        self.clock = SampleClock() if (self._live and not self.fast) else None

    def close(self) -> None:
        pass

    def set_cal(self, on: bool | None) -> None:
        """Hold the noise source on or off (True / False), or back to the schedule (None)."""
        self.forced_cal = None if on is None else bool(on)

    def set_pointing(self, pointing: Callable[[Time], SkyCoord] | None) -> None:
        with self._pointing_lock:
            self.pointing = pointing
            self._pointing_version += 1

    def set_real_time(self, on: bool) -> None:
        """Pace to the wall clock from the next block (True), or back to how the simulator was
        started (False: as fast as it can under ``--fast``)."""
        with self._pace_lock:
            on = bool(on) or not self.fast
            if on and not self._paced:
                self._anchor = None      # anchored at the next block
            self._paced = on

    def skip(self, seconds: float) -> bool:
        """Jump simulated time ahead by ``seconds`` from the next block (``--fast`` only)."""
        if not self.fast or seconds <= 0:
            return False
        with self._pace_lock:
            self._skip_s += float(seconds)
            self._anchor = None
        return True

    def can_reopen(self) -> bool:
        return False

    def reopen(self) -> None:
        raise SourceError("the simulator cannot be reopened")

    def read(self) -> Block:
        """Next block; paced to real time unless ``fast``."""
        i = self._index
        self._index += 1
        sch = self.schedule
        phase = sch.phase_of_block(i)
        lo = sch.lo_of(phase)
        with self._pace_lock:
            t_rel = self._skip_s + i * self.block_samples / self.fs
            paced = self._paced
            if paced and self._anchor is None:
                self._anchor = (_time.monotonic(), t_rel)
            anchor = self._anchor
        hop = sch.is_hop(i)
        if self._fire.is_set():
            self._fire.clear()
            self._extra_from = i
        wanted = sch.cal_on(i, self._extra_from) if self.forced_cal is None else self.forced_cal
        cal_state = self.cal.state_for(wanted)
        if cal_state is not None:
            self.diode_on = cal_state   # a failed switch leaves the diode as it was
        x = self._samples(t_rel, lo, hop)
        if paced:
            assert anchor is not None, "set above"
            delay = anchor[0] + (t_rel - anchor[1]) + self.block_samples / self.fs \
                - _time.monotonic()
            if delay > 0:
                _time.sleep(delay)
        t0, step = float(self.t_start.unix) + t_rel, 0.0
        if self.clock is not None:
            assert self._wall0 is not None, "open() sets both"
            step = self.clock.check()
            t0 = self.clock.time_of(self._wall0 + t_rel)
        return Block(raw=complex_to_u8(x, overwrite=True), lo_hz=lo, sample_rate=self.fs, t0_unix_s=t0,
                     phase=phase, cal_on=cal_state, lost_before=0,
                     settle_samples=sch.settle_samples if hop else 0, index=i, clock_step_s=step)
