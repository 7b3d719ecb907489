"""From power sums to a spectrum: frequency-switched difference in kelvin, folding.

Per channel (baseband frequency f; reference LO = signal LO + offset) the mean powers are
S(f) = G(f) [T_sys + T_s(f)] and R(f) = G(f) [T_sys + T_r(f)], with T_s, T_r the line seen in
the signal and the reference phase and G(f) the receiver's gain and band-pass, which cancel in
the ratios. Where only the signal phase holds the line (T_r = 0),

    D_sig(f) = T_sys (S - R) / R = T_s(f)                               exactly;

where only the reference phase holds it (T_s = 0),

    D_ref(f) = T_sys (S - R) / S = -T_r(f)                              exactly.

(The common single formula T_sys (S - R)/R would give -T_r T_sys/(T_sys + T_r) there: a
strong line's negative copy would come out compressed, by 40 % for T_r = 60 K, T_sys = 85 K.)
In sky frequency nu the line appears positive at nu_L in D_sig and negative at nu_L - offset in
D_ref. In-band switching (|offset| less than half the band) is folded by shifting and averaging,

    F(nu) = [D_sig(nu) - D_ref(nu - offset)] / 2,

which puts both copies of the line on top of each other and lowers the noise by sqrt(2);
channels without a partner in the band (k - shift outside 0 .. N - 1: |shift| channels at one
edge, a share |offset| / sample rate of the band) are not covered by the fold and are flagged
(:func:`fold_covered`; told apart from interference by ``Spectrum.covered``). Folding leaves negative half-height
ghosts at +- offset (choose an offset wider than the line). Out-of-band switching is not
folded (D_sig alone). Total-power mode has no reference: its DATA stay in counts.

Noise of the switched difference (radiometer equation, t_phase the time in each phase, B the
channel's noise bandwidth): Delta D = sqrt(2) T_sys / sqrt(B t_phase); folding two independent
copies divides it by sqrt(2).

Main-beam scale: the antenna temperature T_A is divided by the main-beam efficiency,
T_mb = T_A / eta_mb, when ``beam_efficiency`` < 1 (Kutner & Ulich 1981).

References
----------
Wilson, T. L., Rohlfs, K. & Huttemeister, S., Tools of Radio Astronomy (frequency switching,
radiometer equation).
Kutner, M. L. & Ulich, B. L. 1981, ApJ 250, 341 (temperature scales, main-beam efficiency).
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

from spinflip.daemon.dsp.block import REF, SIG
from spinflip.daemon.dsp.channel_grid import lo_mask
from spinflip.daemon.dsp.spectrometer import Integration


@dataclass
class Spectrum:
    data: np.ndarray       # float32[nchan]
    flagged: np.ndarray    # bool[nchan]
    unit: str              # "K" or "count"
    exposure_s: float
    folded: bool
    chan_exposure_s: np.ndarray   # float32[nchan], after flagging
    covered: np.ndarray           # bool[nchan]: has a fold partner (all, unfolded)


def fold_covered(nchan: int, shift_channels: int) -> np.ndarray:
    """bool[nchan]: folded channels k with a partner k - shift inside the band."""
    partner = np.arange(nchan) - int(shift_channels)
    return (partner >= 0) & (partner < nchan)


def fold_spoiled(baseband: np.ndarray, shift_channels: int, folded: bool) -> np.ndarray:
    """bool[nchan]: calibrated channels whose sums use a channel of ``baseband``.

    Unfolded, channel c itself; folded, F[k] uses baseband k (signal-phase copy) and k - shift
    (reference-phase copy), so c spoils F[c] and F[c + shift]. Channels without a fold partner
    are left out (they are not covered; :func:`fold_covered`).
    """
    baseband = np.asarray(baseband, dtype=bool)
    if not folded:
        return baseband.copy()
    nchan = baseband.size
    k = np.arange(nchan)
    ok = fold_covered(nchan, shift_channels)
    out = np.zeros(nchan, dtype=bool)
    out[ok] = baseband[k[ok]] | baseband[k[ok] - int(shift_channels)]
    return out


def calibrate(integ: Integration, nchan: int, shift_channels: int, switched: bool,
              tsys_k: float, flag_dc: bool = True, beam_efficiency: float = 1.0,
              bad: dict | None = None) -> Spectrum:
    """Turn one integration's sums into a calibrated (or counts) spectrum.

    Parameters
    ----------
    integ : the integration's power sums per phase
    nchan : number of channels
    shift_channels : reference LO minus signal LO in channels (offset / channel width)
    switched : frequency switching on
    tsys_k : system temperature for the kelvin scale, K
    flag_dc : flag the channel at the LO (the dongle's DC spike), in both phases
    beam_efficiency : main-beam efficiency eta_mb in (0, 1]; DATA = T_A / eta_mb
    bad : phase -> bool[nchan], baseband channels of that phase not to use (carriers, spurs,
        masks). A baseband channel c spoils the calibrated channels whose sums use it: c itself
        and, folded, c + shift.

    Notes
    -----
    Per-channel exposure: the sum over the phases of each channel's observing time after
    flagging; folded, the mean of channel k's and its partner's (k - shift).
    """
    if not 0 < beam_efficiency <= 1:
        raise ValueError(f"main-beam efficiency {beam_efficiency!r}: expected 0 < eta <= 1")
    sig, ref = integ.sums[SIG], integ.sums[REF]
    flagged = lo_mask(nchan) if flag_dc else np.zeros(nchan, dtype=bool)
    for mask in (bad or {}).values():
        flagged |= mask
    everywhere = np.ones(nchan, dtype=bool)
    if not switched:
        return Spectrum(sig.mean().astype(np.float32), flagged | ~np.isfinite(sig.mean()), "count",
                        sig.exposure_s, False, sig.channel_exposure_s().astype(np.float32),
                        everywhere)
    s, r = sig.mean(), ref.mean()
    scale = tsys_k / beam_efficiency
    with np.errstate(divide="ignore", invalid="ignore"):
        d_sig = scale * (s - r) / r            # the line seen in the signal phase
        d_ref = scale * (s - r) / s            # minus the line seen in the reference phase
    flagged |= ~np.isfinite(d_sig) | ~np.isfinite(d_ref)
    d_sig[flagged] = 0.0
    d_ref[flagged] = 0.0
    exposure = sig.exposure_s + ref.exposure_s
    chan_exp = sig.channel_exposure_s() + ref.channel_exposure_s()
    sh = int(shift_channels)
    if abs(sh) >= nchan // 2:
        return Spectrum(d_sig.astype(np.float32), flagged, "K", exposure, False,
                        chan_exp.astype(np.float32), everywhere)
    # fold: F[k] = (D_sig[k] - D_ref[k - sh]) / 2 where 0 <= k - sh < nchan
    k = np.arange(nchan)
    partner = k - sh
    ok = fold_covered(nchan, sh)
    f = np.zeros(nchan)
    f[ok] = 0.5 * (d_sig[k[ok]] - d_ref[partner[ok]])
    fl = ~ok | fold_spoiled(flagged, sh, True)
    exp_f = np.zeros(nchan)
    exp_f[ok] = 0.5 * (chan_exp[k[ok]] + chan_exp[partner[ok]])
    return Spectrum(f.astype(np.float32), fl, "K", exposure, True, exp_f.astype(np.float32), ok)
