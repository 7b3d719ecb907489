"""System temperature measured with the calibration noise source (on/off method).

The noise source adds a known excess temperature T_cal at the receiver input. With the mean
power per channel P_off (source off) and P_on (source on), at the same LO and gain,

    P_off(f) = G(f) T_sys(f),   P_on(f) = G(f) (T_sys(f) + T_cal)

so the unknown gain and band-pass G(f) cancel::

    T_sys(f) = T_cal P_off(f) / (P_on(f) - P_off(f))                  (per channel)

    T_sys    = T_cal sum_w P_off / sum_w (P_on - P_off)                (band-averaged)

Which is used where: the **band-averaged** value is the system temperature of the row (the
TSYS column) and sets the kelvin scale of the spectra, since it is precise (thousands of
channels) and the spectrometer's switched ratio needs one number per phase; the **per-channel**
spectrum (signal phase) is kept in the Tsys history of the scan, for diagnosing the receiver
(a ripple in T_sys(f) is a standing wave or a mismatched filter).

Line-free channels w. T_sys(f) = T_sys + T_line(f) + T_rfi(f): the 21 cm line and interference
only ever *add*, so the line-free level is the lower envelope. The per-channel values are
smoothed over 9 channels and clipped one-sidedly (median + 3 robust sigma, sigma = 1.4826
median absolute deviation) until nothing changes; the band edges (outer 10 % each side, where
the tuner rolls off) and the DC channel are never used. Wings below the clip level would still
bias the average upward, so where the caller knows where HI can be (the pointing's Galactic
velocity range, :mod:`spinflip.daemon.sky.kinematics`) those channels are left out first.

Gain drift. Each firing is bracketed by a whole switching cycle with the source off before and
after it (:mod:`spinflip.daemon.dsp.switching`); P_off is their mean, so a gain that drifts
linearly across the firing cancels.

A measurement is refused (an error the observer sees, never a silent wrong T_sys) when the
source did not raise the power measurably, when the result is not a plausible temperature, or
when the switch reported a failure during the firing.

References
----------
Wilson, T. L., Rohlfs, K. & Huttemeister, S., Tools of Radio Astronomy (calibration with a
noise source; the chopper and noise-injection methods).
"""

from __future__ import annotations

from collections.abc import Callable
from dataclasses import dataclass, field

import numpy as np

from spinflip.daemon.dsp.block import Block
from spinflip.daemon.dsp.channel_grid import lo_mask
from spinflip.daemon.dsp.robust import robust_sigma

_EDGE_FRACTION = 0.10     # band edge not used for the band average, each side
_SMOOTH_CHANNELS = 9
_CLIP_SIGMA = 3.0
_TSYS_PLAUSIBLE_K = (1.0, 20000.0)
_MIN_LINE_FREE = 32       # fewer line-free channels than this: rely on the clipping alone


def line_free_channels(tsys_chan_k: np.ndarray, usable: np.ndarray) -> np.ndarray:
    """Channels whose per-channel Tsys is at the line-free (lower-envelope) level.

    Parameters
    ----------
    tsys_chan_k : float[nchan] per-channel system temperature, K
    usable : bool[nchan] channels that may be used at all

    Returns
    -------
    bool[nchan] : the kept channels (a subset of ``usable``)

    Notes
    -----
    Smooth with a 9-channel boxcar (normalised convolution over the usable channels), then
    iterate: keep = usable & (smoothed < median + 3 * 1.4826 * MAD) over the kept channels,
    until the set stops changing (at most 20 rounds). One-sided, since the line and
    interference only add power (common practice for finding line-free channels).
    """
    good = usable & np.isfinite(tsys_chan_k)
    box = np.ones(_SMOOTH_CHANNELS)
    num = np.convolve(np.where(good, tsys_chan_k, 0.0), box, mode="same")
    den = np.convolve(good.astype(float), box, mode="same")
    with np.errstate(invalid="ignore", divide="ignore"):
        sm = np.where(den > 0, num / den, np.nan)
    keep = good.copy()
    for _ in range(20):
        vals = sm[keep]
        if vals.size < 8:
            break
        med = np.median(vals)
        sigma = robust_sigma(vals)   # 1.4826 MAD (dsp.robust)
        new = good & (sm <= med + _CLIP_SIGMA * sigma)
        if np.array_equal(new, keep):
            break
        keep = new
    return keep


def usable_channels(nchan: int) -> np.ndarray:
    """Channels inside the band's flat part: not the outer 10 % each side, not DC +- 1."""
    usable = np.zeros(nchan, dtype=bool)
    edge = int(np.ceil(_EDGE_FRACTION * nchan))
    usable[edge:nchan - edge] = True
    usable[lo_mask(nchan, 1)] = False
    return usable


def tsys_from_on_off(p_on: np.ndarray, p_off: np.ndarray, tcal_k: float,
                     usable: np.ndarray | None = None
                     ) -> tuple[float, np.ndarray, np.ndarray, float]:
    """System temperature from noise-source on/off mean power spectra of one phase.

    Parameters
    ----------
    p_on, p_off : float[nchan] mean power per channel with the noise source on / off
    tcal_k : excess temperature of the noise source, K (> 0)
    usable : channels that may enter the band average (default :func:`usable_channels`)

    Returns
    -------
    tsys_k : band-averaged T_sys = T_cal sum_w P_off / sum_w (P_on - P_off), K
    tsys_chan_k : per-channel T_sys(f) = T_cal P_off / (P_on - P_off), K (NaN where undefined)
    line_free : bool[nchan], the channels w of the band average
    on_off : band power ratio sum_w P_on / sum_w P_off
    """
    if not tcal_k > 0:
        raise ValueError(f"noise source temperature {tcal_k!r} K: expected a positive number")
    p_on = np.asarray(p_on, dtype=np.float64)
    p_off = np.asarray(p_off, dtype=np.float64)
    if usable is None:
        usable = usable_channels(p_on.size)
    with np.errstate(invalid="ignore", divide="ignore"):
        tsys_chan = tcal_k * p_off / (p_on - p_off)
    tsys_chan[~np.isfinite(tsys_chan) | (tsys_chan <= 0)] = np.nan
    w = line_free_channels(tsys_chan, usable)
    w &= np.isfinite(p_on) & np.isfinite(p_off)
    on, off = float(p_on[w].sum()), float(p_off[w].sum())
    if not w.any() or not on > off > 0:
        return float("nan"), tsys_chan, w, (on / off if off > 0 else float("nan"))
    return tcal_k * off / (on - off), tsys_chan, w, on / off


@dataclass
class TsysMeasurement:
    """One firing of the noise source and what it gave."""

    t_unix_s: float                 # middle of the firing, UTC seconds since 1970
    tcal_k: float
    ok: bool
    message: str                    # "" when ok, else one line saying what went wrong
    tsys_k: float = float("nan")    # band-averaged, both phases
    tsys_phase_k: dict = field(default_factory=dict)    # phase -> band-averaged T_sys, K
    tsys_chan_k: np.ndarray | None = None               # per channel, signal phase, K
    on_off: float = float("nan")    # band power ratio on / off (signal phase)
    channels_used: int = 0


@dataclass
class _Cycle:
    number: int
    noise_source_on: bool | None   # its state over the whole cycle; None: mixed or unknown
    s1: dict = field(default_factory=dict)    # phase -> sum of power spectra
    m: dict = field(default_factory=dict)     # phase -> number of spectra
    t_first_s: float = 0.0
    t_last_s: float = 0.0

    def means(self) -> dict:
        out = {}
        for ph in self.s1:
            m = np.asarray(self.m[ph], dtype=float)
            if np.any(m > 0):
                with np.errstate(invalid="ignore", divide="ignore"):
                    out[ph] = np.where(m > 0, self.s1[ph] / np.maximum(m, 1), np.nan)
        return out


class TsysMeter:
    """Follows the blocks of a run and measures T_sys at every firing of the noise source.

    Parameters
    ----------
    blocks_per_cycle : blocks in one switching cycle (both phases)
    nchan : channels per spectrum
    tcal_k : the noise source's excess temperature, K

    Feed it every block with its channel sums (:meth:`add`); it returns a
    :class:`TsysMeasurement` when a firing has been bracketed by off cycles on both sides (or
    refused, with ``ok = False`` and a message).
    """

    def __init__(self, blocks_per_cycle: int, nchan: int, tcal_k: float,
                 emission: Callable[[str, float], np.ndarray] | None = None):
        self.emission = emission   # callable(phase, t_unix_s) -> bool[nchan] where HI may be
        self.bpc = blocks_per_cycle
        self.nchan = nchan
        self.tcal_k = tcal_k
        self.usable = usable_channels(nchan)
        self._cycle: _Cycle | None = None
        self._off_before: _Cycle | None = None
        self._on: list[_Cycle] = []
        self._fault = False

    def reset(self) -> None:
        """Forget cycles in progress (after a gap in the data: a firing must not span it)."""
        self._cycle = None
        self._off_before = None
        self._on = []

    def add(self, block: Block, s1: np.ndarray, m: np.ndarray) -> TsysMeasurement | None:
        """Account one block (``s1``, ``m``: its channel power sums and spectra per channel);
        maybe a measurement."""
        number = block.index // self.bpc
        out = None
        if self._cycle is not None and number != self._cycle.number:
            out = self._close()
        if self._cycle is None:
            self._cycle = _Cycle(number, block.cal_on, t_first_s=block.t0_unix_s)
        c = self._cycle
        if block.cal_on != c.noise_source_on:
            c.noise_source_on = None   # a cycle with mixed or unknown states is no use
        if np.any(np.asarray(m) > 0):
            c.s1[block.phase] = c.s1.get(block.phase, 0.0) + s1
            c.m[block.phase] = c.m.get(block.phase, 0) + np.asarray(m, dtype=float)
        c.t_last_s = block.t0_unix_s + block.duration_s
        if (block.index + 1) % self.bpc == 0:
            out = self._close() or out
        return out

    def _close(self) -> TsysMeasurement | None:
        c, self._cycle = self._cycle, None
        assert c is not None                    # add() closes only an open cycle
        if c.noise_source_on is None:           # the switch failed: drop the firing
            fault = bool(self._on) or not self._fault
            self._fault = True
            self._on, self._off_before = [], None
            if fault:
                return TsysMeasurement(c.t_first_s, self.tcal_k, False,
                                       "noise source state unknown (its switch failed): "
                                       "no system temperature from this firing")
            return None
        if c.noise_source_on:
            self._on.append(c)
            return None
        self._fault = False
        result = None
        if self._on:
            result = self._measure(self._off_before, self._on, c)
            self._on = []
        self._off_before = c
        return result

    def _measure(self, before: _Cycle | None, on: list, after: _Cycle) -> TsysMeasurement:
        t_mid = 0.5 * (on[0].t_first_s + on[-1].t_last_s)
        off_means = [x.means() for x in (before, after) if x is not None]
        on_means = [x.means() for x in on]
        phases = [ph for ph in ("sig", "ref")
                  if all(ph in d for d in off_means) and all(ph in d for d in on_means)]
        if not phases:
            return TsysMeasurement(t_mid, self.tcal_k, False,
                                   "noise source firing too short: no whole spectrum with it on")
        per_phase, chan, ratio, used = {}, None, float("nan"), 0
        for ph in phases:
            p_off = np.mean([d[ph] for d in off_means], axis=0)
            p_on = np.mean([d[ph] for d in on_means], axis=0)
            usable = self.usable
            if self.emission is not None:
                clear = usable & ~self.emission(ph, t_mid)
                usable = clear if clear.sum() >= _MIN_LINE_FREE else usable
            t, t_chan, w, r = tsys_from_on_off(p_on, p_off, self.tcal_k, usable)
            per_phase[ph] = t
            if chan is None:
                chan, ratio, used = t_chan.astype(np.float32), r, int(w.sum())
        tsys = float(np.mean(list(per_phase.values())))
        meas = TsysMeasurement(t_mid, self.tcal_k, True, "", tsys, per_phase, chan, ratio, used)
        lo, hi = _TSYS_PLAUSIBLE_K
        if not np.isfinite(ratio) or ratio < 1.001:
            meas.ok = False
            meas.message = (f"noise source did not raise the power (on/off = {ratio:.4f}): check "
                            "its switch, supply and coupling")
        elif not lo <= tsys <= hi:
            meas.ok = False
            meas.message = (f"implausible system temperature {tsys:.4g} K from the noise source "
                            f"(on/off = {ratio:.4f}): check calibration.noise_source_k")
        return meas
