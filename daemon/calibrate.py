"""From power sums to a spectrum: frequency-switched difference in kelvin, folding.

Switched difference (per channel, baseband frequency f, reference LO = signal LO + offset):

    D(f) = T_sys (S(f) - R(f)) / R(f)

The receiver gain and band-pass cancel in the ratio. In sky frequency nu the line appears
positive at nu_L and negative at nu_L - offset. In-band switching (|offset| less than half the
band) is folded by shifting and averaging,

    F(nu) = [D(nu) - D(nu - offset)] / 2,

which puts both copies of the line on top of each other and lowers the noise by sqrt(2);
channels without a partner in the band are flagged. Out-of-band switching is not folded.
Total-power mode has no reference: its DATA stay in counts (mean power per channel).

References
----------
Wilson, T. L., Rohlfs, K. & Huttemeister, S., Tools of Radio Astronomy (frequency switching).
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

from .block import REF, SIG
from .spectrometer import Integration


@dataclass
class Spectrum:
    data: np.ndarray       # float32[nchan]
    flagged: np.ndarray    # bool[nchan]
    unit: str              # "K" or "count"
    exposure_s: float
    folded: bool


def calibrate(integ: Integration, nchan: int, shift_channels: int, switched: bool,
              tsys_k: float, flag_dc: bool = True) -> Spectrum:
    """Turn one integration's sums into a calibrated (or counts) spectrum.

    Parameters
    ----------
    integ : the integration's power sums per phase
    nchan : number of channels
    shift_channels : reference LO minus signal LO in channels (offset / channel width)
    switched : frequency switching on
    tsys_k : system temperature for the kelvin scale, K
    flag_dc : flag the channel at the LO (the dongle's DC spike), in both phases
    """
    sig, ref = integ.sums[SIG], integ.sums[REF]
    flagged = np.zeros(nchan, dtype=bool)
    dc = nchan // 2
    if not switched:
        if flag_dc:
            flagged[dc] = True
        return Spectrum(sig.mean().astype(np.float32), flagged, "count", sig.exposure_s, False)
    s, r = sig.mean(), ref.mean()
    with np.errstate(divide="ignore", invalid="ignore"):
        d = tsys_k * (s - r) / r
    bad = ~np.isfinite(d)
    d[bad] = 0.0
    flagged |= bad
    exposure = sig.exposure_s + ref.exposure_s
    sh = int(shift_channels)
    if abs(sh) >= nchan // 2:
        if flag_dc:
            flagged[dc] = True
        return Spectrum(d.astype(np.float32), flagged, "K", exposure, False)
    # fold: F[k] = (D[k] - D[k - sh]) / 2 where 0 <= k - sh < nchan
    k = np.arange(nchan)
    partner = k - sh
    ok = (partner >= 0) & (partner < nchan)
    f = np.zeros(nchan)
    f[ok] = 0.5 * (d[k[ok]] - d[partner[ok]])
    fl = ~ok | flagged
    fl[ok] |= flagged[partner[ok]]
    if flag_dc:
        fl[dc] = True                      # DC of the signal phase
        if 0 <= dc + sh < nchan:
            fl[dc + sh] = True             # DC of the reference phase lands here after the shift
    return Spectrum(f.astype(np.float32), fl, "K", exposure, True)
