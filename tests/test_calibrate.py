"""Frequency-switched difference and folding on noiseless synthetic spectra."""

import numpy as np

from spinflip.daemon.block import REF, SIG
from spinflip.daemon.calibrate import calibrate
from spinflip.daemon.spectrometer import Integration, PhaseSums


def _integ(sig, ref):
    n = sig.size
    i = Integration(sums={SIG: PhaseSums(n), REF: PhaseSums(n)})
    for ph, spec in ((SIG, sig), (REF, ref)):
        i.sums[ph].s1[:] = spec * 100
        i.sums[ph].m = 100
        i.sums[ph].exposure_s = 1.0
    return i


def test_fold_recovers_line_and_cancels_bandpass():
    # common practice (Wilson, Rohlfs & Huttemeister, frequency switching): the gain shape
    # cancels in (S - R) / R; folding by the switch offset restores the positive line.
    n, shift, tsys = 512, -100, 100.0
    k = np.arange(n)
    bandpass = 1 + 0.3 * np.cos(k / 40.0)
    line_chan = 200
    line = 5.0 * np.exp(-0.5 * ((k - line_chan) / 4.0) ** 2)
    sig = bandpass * (tsys + line)
    # reference LO is `shift` channels higher: the same sky line appears `shift` channels lower
    ref = bandpass * (tsys + 5.0 * np.exp(-0.5 * ((k - (line_chan - shift)) / 4.0) ** 2))
    spec = calibrate(_integ(sig, ref), n, shift, True, tsys, flag_dc=True)
    assert spec.unit == "K" and spec.folded
    assert np.argmax(spec.data) == line_chan
    # (S-R)/R Tsys = T_line (1 - small T_line/Tsys correction); within 5 % of the peak
    assert abs(spec.data[line_chan] - 5.0) < 0.25
    assert spec.flagged[n // 2] and spec.flagged[n // 2 + shift]
    # channels without a fold partner are flagged
    assert spec.flagged[:(-shift)].sum() == 0 or spec.flagged[n + shift:].all()
    assert np.all(spec.flagged[k - shift >= n])
    assert spec.exposure_s == 2.0


def test_total_power_is_counts():
    n = 64
    spec = calibrate(_integ(np.full(n, 3.0), np.zeros(n)), n, 0, False, 100.0)
    assert spec.unit == "count"
    np.testing.assert_allclose(spec.data, 3.0)
