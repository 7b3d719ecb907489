"""Frequency-switched difference and folding on noiseless synthetic spectra."""

import numpy as np
import pytest

from spinflip.daemon.calibration.kelvin import calibrate
from spinflip.daemon.dsp.block import REF, SIG
from spinflip.daemon.dsp.spectrometer import Integration, PhaseSums


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
    # D_sig = Tsys (S-R)/R and D_ref = Tsys (S-R)/S are exact where one phase holds the line
    assert abs(spec.data[line_chan] - 5.0) < 1e-9
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


def test_strong_line_folds_without_compression():
    # A 60 K line on Tsys = 85 K: with (S - R)/R alone the reference copy would read
    # -60 * 85 / 145 = -35 K and the fold 47.5 K (common single-formula error); the exact
    # pair (S - R)/R for the signal copy, (S - R)/S for the reference copy gives 60 K.
    n, shift, tsys = 512, -150, 85.0
    k = np.arange(n)
    line = lambda c: 60.0 * np.exp(-0.5 * ((k - c) / 6.0) ** 2)
    bandpass = 1 + 0.2 * np.sin(k / 25.0)
    sig = bandpass * (tsys + line(200))
    ref = bandpass * (tsys + line(200 - shift))
    spec = calibrate(_integ(sig, ref), n, shift, True, tsys)
    near = slice(170, 231)
    np.testing.assert_allclose(spec.data[near], line(200)[near], atol=1e-4)
    assert not spec.flagged[near].any()


def test_main_beam_efficiency_scales_to_brightness_temperature():
    # T_mb = T_A / eta_mb (Kutner & Ulich 1981)
    n, shift, tsys = 256, -64, 100.0
    k = np.arange(n)
    sig = tsys + 4.0 * (k == 100)
    ref = tsys + 4.0 * (k == 100 - shift)
    ta = calibrate(_integ(sig, ref), n, shift, True, tsys)
    tmb = calibrate(_integ(sig, ref), n, shift, True, tsys, beam_efficiency=0.8)
    assert tmb.data[100] == pytest.approx(ta.data[100] / 0.8, rel=1e-6)
    with pytest.raises(ValueError, match="main-beam efficiency"):
        calibrate(_integ(sig, ref), n, shift, True, tsys, beam_efficiency=1.2)
