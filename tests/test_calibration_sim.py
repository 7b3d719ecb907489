"""Calibration end to end on the simulated telescope: measured Tsys, kelvin scale, LSRK, N(HI).

Each run is ``spinflip run --fast`` on the simulator with its noise source; the numbers are
compared with what the simulator put in (its receiver, spillover and continuum temperatures,
its model line) and with outside references named beside each check.
"""

import json

import numpy as np
import pytest
from astropy import units as u
from astropy.coordinates import Galactic, SkyCoord, SpectralCoord
from astropy.io import fits
from astropy.time import Time
from cli_runner import NO_PORTS, model_line, run_cli_inprocess, true_tsys_k, write_config

from spinflip.daemon.dsp.channelizer import make_channelizer
from spinflip.daemon.sky import coordinates
from spinflip.daemon.sky.hi_line import C_M_S, HI_REST_FREQ_HZ
from spinflip.daemon.sky.spectral_axis import velocity_axis_lsrk_m_s

SITE = (46.82, 8.37, 640.0)          # the default (fictional) site


def _scan(tmp_path_factory, name, text, duration):
    d = tmp_path_factory.mktemp(name)
    cfg = write_config(d / "c.toml", text)
    r = run_cli_inprocess(["run", "--config", cfg, "--fast", "--duration", duration, "--out",
                           d / "out"])
    assert r.returncode == 0, r.stderr
    files = sorted((d / "out").glob("*.fits"))
    assert len(files) == 1
    return files[0], r


BASE = """
[sim]
start = "2026-03-01T04:00:00"
seed = {seed}
gain_drift = {drift}
gain_drift_period_s = {period}
[pointing]
frame = "galactic"
lon = {l}
lat = {b}
[spectrometer]
integration_s = 5.0
[calibration]
cal_interval_s = 20.0
[switching]
offset_hz = {offset}
""" + NO_PORTS


@pytest.fixture(scope="module")
def inband(tmp_path_factory):
    """Default in-band switching (folded), l = 30 deg: strong, wide, optically thick line."""
    return _scan(tmp_path_factory, "inband", BASE.format(seed=3, drift=0.02, period=900.0, l=30.0,
                                                        b=0.0, offset=-0.8e6), 40)


@pytest.fixture(scope="module")
def outband(tmp_path_factory):
    """Out-of-band switching (no fold, no ghosts) with the gain drifting by 10 % in the scan."""
    return _scan(tmp_path_factory, "outband", BASE.format(seed=4, drift=0.10, period=80.0,
                                                          l=30.0, b=0.0, offset=2.6e6), 40)


@pytest.fixture(scope="module")
def thin(tmp_path_factory):
    """l = 120, b = +20: a narrow, optically thin line (peak tau ~ 0.1) for N(HI)."""
    return _scan(tmp_path_factory, "thin", BASE.format(seed=5, drift=0.02, period=900.0,
                                                       l=120.0, b=20.0, offset=-0.8e6), 40)


def _table(path):
    with fits.open(path) as h:
        return (h["SINGLE DISH"].header, h["SINGLE DISH"].data.copy(),
                h["TSYS HISTORY"].data.copy(), h["SCAN AVERAGE"].header, h["SCAN AVERAGE"].data.copy())


# -- system temperature ---------------------------------------------------------------------
@pytest.mark.parametrize("which", ["inband", "outband", "thin"])
def test_measured_tsys_within_3_percent_of_the_simulators_truth(which, request):
    path, _ = request.getfixturevalue(which)
    head, rows, hist, _, _ = _table(path)
    truth = true_tsys_k(float(rows["GLON"][0]), float(rows["GLAT"][0]))
    assert np.all(np.abs(rows["TSYS"] / truth - 1) < 0.03), (rows["TSYS"], truth)
    # the history holds every firing, each within 3 % too, and the per-channel spectrum's
    # line-free median agrees with the band average
    assert len(hist) >= 2 and all(s.strip() == "ok" for s in hist["STATUS"])
    assert np.all(np.abs(hist["TSYS"] / truth - 1) < 0.03)
    # per channel, T_sys(f) = T_sys + T_line(f) (signal phase): level off the line, and the
    # line standing on it as the model has it
    r = rows[0]
    nchan = r["DATA"].size
    v = velocity_axis_lsrk_m_s(r["CRVAL1"], r["CDELT1"], r["CRPIX1"], r["RESTFREQ"], r["VFRAME"],
                               nchan) / 1e3
    line = model_line(float(r["GLON"]), float(r["GLAT"]), v)
    k = np.arange(nchan)
    # the band's flat part, without the DC spike's channels (a receiver artefact)
    inner = (k > 0.12 * nchan) & (k < 0.88 * nchan) & (np.abs(k - nchan // 2) > 4)
    chan = np.mean(hist["TSYSCHAN"], axis=0)
    off = inner & (line < 0.5)
    assert abs(np.nanmedian(chan[off]) / hist["TSYS"].mean() - 1) < 0.02
    excess = np.convolve(np.nan_to_num(chan - hist["TSYS"].mean()), np.ones(9) / 9, mode="same")
    assert abs(excess[inner].max() / line[inner].max() - 1) < 0.2
    assert np.all(hist["TCAL"] == 70.0) and np.all(hist["ONOFF"] > 1.5)
    # provenance in the header; every row says how old its Tsys was
    assert head["TSYSSRC"].startswith("noise source") and head["TCAL"] == 70.0
    assert np.all(rows["TSYSAGE"] >= 0) and np.all(rows["TSYSAGE"] < 25)
    assert np.all(rows["CALTIME"] <= 1.2)


def test_gain_drifting_10_percent_leaves_tsys_and_line_steady(outband):
    # the simulated gain swings by +-10 % over 80 s; Tsys (an on/off ratio) and the switched
    # ratio (S - R)/R do not see the gain: row-to-row line integrals stay within noise
    path, _ = outband
    _, rows, hist, _, _ = _table(path)
    assert np.ptp(hist["TSYS"]) / np.mean(hist["TSYS"]) < 0.02
    v = velocity_axis_lsrk_m_s(rows["CRVAL1"][0], rows["CDELT1"][0], rows["CRPIX1"][0],
                               rows["RESTFREQ"][0], rows["VFRAME"][0], rows["DATA"].shape[1]) / 1e3
    win = (v > -60) & (v < 140) & ~rows["FLAGGED"].any(axis=0)
    w = rows["DATA"][:, win].sum(axis=1) * abs(v[1] - v[0])
    assert np.ptp(w) / np.mean(w) < 0.03, w


# -- velocity frame ---------------------------------------------------------------------------
def test_vframe_matches_astropy_lsrk_for_each_recorded_row(inband):
    # astropy's SpectralCoord LSRK transform (Astropy Collaboration 2022) for the recorded
    # DATE-OBS, GLON, GLAT and site: within 0.01 km/s
    path, _ = inband
    head, rows, _, _, _ = _table(path)
    loc = coordinates.site_location(head["SITELAT"], head["SITELONG"], head["SITEELEV"])
    for r in rows[::3]:
        t = Time(r["DATE-OBS"], scale="utc")
        target = SkyCoord(l=r["GLON"] * u.deg, b=r["GLAT"] * u.deg, frame=Galactic(),
                          distance=1 * u.kpc, radial_velocity=0 * u.km / u.s,
                          pm_l_cosb=0 * u.mas / u.yr, pm_b=0 * u.mas / u.yr)
        sc = SpectralCoord(HI_REST_FREQ_HZ * u.Hz, observer=loc.get_itrs(t), target=target)
        f = sc.with_observer_stationary_relative_to("lsrk").to_value(u.Hz)
        ref = C_M_S * (HI_REST_FREQ_HZ - f) / HI_REST_FREQ_HZ
        assert abs(r["VFRAME"] - ref) < 10.0


def test_velocity_axis_written_as_alternate_wcs(inband):
    # FITS WCS paper III (Greisen et al. 2006): VRAD alternate axis, linear in frequency
    path, _ = inband
    head, rows, _, _, _ = _table(path)
    assert head["CTYPE1A"] == "VRAD" and head["SPECSYSA"] == "LSRK" and head["CUNIT1A"] == "m/s"
    r = rows[0]
    nchan = r["DATA"].size
    v = velocity_axis_lsrk_m_s(r["CRVAL1"], r["CDELT1"], r["CRPIX1"], r["RESTFREQ"], r["VFRAME"], nchan)
    pix = np.arange(nchan) + 1.0
    np.testing.assert_allclose(r["CRVAL1A"] + (pix - r["CRPIX1A"]) * r["CDELT1A"], v, atol=1e-6)
    # and the same against astropy's radio Doppler equivalency
    f = r["CRVAL1"] + (pix - r["CRPIX1"]) * r["CDELT1"]
    ref = (f * u.Hz).to_value(u.m / u.s, equivalencies=u.doppler_radio(r["RESTFREQ"] * u.Hz))
    np.testing.assert_allclose(v, ref + r["VFRAME"], atol=1e-6)


def test_pointing_columns_match_astropy(inband):
    # RA/Dec and az/el recorded per row against astropy transforms built here
    path, _ = inband
    head, rows, _, _, _ = _table(path)
    loc = coordinates.site_location(head["SITELAT"], head["SITELONG"], head["SITEELEV"])
    r = rows[-1]
    c = SkyCoord(l=r["GLON"] * u.deg, b=r["GLAT"] * u.deg, frame=Galactic())
    icrs = c.icrs
    assert abs(icrs.ra.deg - r["RA"]) < 1e-6 and abs(icrs.dec.deg - r["DEC"]) < 1e-6
    from astropy.coordinates import AltAz
    aa = c.transform_to(AltAz(obstime=Time(r["DATE-OBS"], scale="utc"), location=loc))
    assert abs(aa.alt.deg - r["ELEVATIO"]) < 1e-4
    assert abs((aa.az.deg - r["AZIMUTH"] + 180) % 360 - 180) < 1e-4


# -- the kelvin scale and the line ---------------------------------------------------------
def _model_integral(l, b, lo=-400, hi=400):
    v = np.linspace(-400, 400, 3201)
    tb = model_line(l, b, v)
    sel = (v >= lo) & (v <= hi)
    return float(tb[sel].sum() * (v[1] - v[0])), v, tb


def test_line_integral_out_of_band_within_5_percent_of_the_model(outband):
    path, _ = outband
    _, rows, _, ah, a = _table(path)
    model, v, tb = _model_integral(30.0, 0.0)
    assert ah["BLMODE"] == "auto"                     # no fold: line-free channels on both sides
    assert abs(ah["LINEINT"] / model - 1) < 0.05, (ah["LINEINT"], model)
    # the line's velocity within one channel of the model's: the shift that best lays the model
    # on the measured profile (least squares over the line), and the measured peak lies where
    # the model's flat top is within 1 % of its maximum
    vk = a["VRAD"] / 1e3
    dv = abs(vk[1] - vk[0])
    meas = np.nan_to_num(a["BASELINED"])
    sel = (vk > -60) & (vk < 140)
    shifts = np.arange(-3.0, 3.0001, 0.05)
    cost = [np.sum((meas[sel] - np.interp(vk[sel], v + s, tb)) ** 2) for s in shifts]
    assert abs(shifts[int(np.argmin(cost))]) <= dv
    box = np.ones(5) / 5
    model_sm = np.convolve(np.interp(vk, v, tb), box, mode="same")
    top = model_sm >= 0.99 * model_sm.max()
    peak = np.argmax(np.convolve(meas, box, mode="same"))
    assert top[max(peak - 1, 0):peak + 2].any()


def test_line_integral_in_band_folded_within_5_percent_of_the_model(inband):
    # folded in-band switching: the window the fold leaves (v > -44 km/s here) holds 99 % of
    # the model line; the fold ghosts add about -2 % (F = T(v) - [T(v+dv) + T(v-dv)]/2)
    path, _ = inband
    _, rows, _, ah, a = _table(path)
    model, _, _ = _model_integral(30.0, 0.0)
    assert abs(ah["LINEINT"] / model - 1) < 0.05, (ah["LINEINT"], model)
    assert np.all(rows["FOLDED"] == 1)
    # line and ghosts leave no line-free channel at this offset: no baseline, and it says so
    assert ah["BLMODE"] == "none"


def test_calibrated_noise_follows_the_radiometer_equation(outband):
    # Wilson, Rohlfs & Huttemeister: Delta T = K Tsys / sqrt(B t), K = sqrt(2) for the switched
    # difference with t the time in each phase; B the channel's equivalent noise bandwidth.
    path, _ = outband
    head, rows, _, _, _ = _table(path)
    data, flagged = rows["DATA"].astype(float), rows["FLAGGED"]
    v = velocity_axis_lsrk_m_s(rows["CRVAL1"][0], rows["CDELT1"][0], rows["CRPIX1"][0],
                               rows["RESTFREQ"][0], rows["VFRAME"][0], data.shape[1]) / 1e3
    nchan = data.shape[1]
    k = np.arange(nchan)
    free = ((v < -120) | (v > 200)) & (k > 0.15 * nchan) & (k < 0.85 * nchan) & ~flagged.any(axis=0)
    full = rows["EXPOSURE"] > 0.9 * rows["EXPOSURE"].max()
    d = data[full][:, free]
    # differences of consecutive rows remove the (identical) sky; each has variance 2 sigma^2
    sigma = np.std(np.diff(d, axis=0)) / np.sqrt(2)
    ch = make_channelizer(head["CHANMETH"], nchan, taps=head["PFBTAPS"])
    b_hz = ch.enbw_hz(head["SAMPRATE"])
    t_phase = rows["EXPOSURE"][full].mean() / 2
    expected = np.sqrt(2) * rows["TSYS"].mean() / np.sqrt(b_hz * t_phase)
    assert abs(sigma / expected - 1) < 0.10, (sigma, expected)


def test_folded_noise_is_sqrt2_lower(thin):
    # folding averages two independent copies: Delta T = sqrt(2) Tsys / sqrt(B t_phase) / sqrt(2)
    # (Wilson, Rohlfs & Huttemeister, radiometer equation); row differences cancel the sky
    path, _ = thin
    head, rows, _, _, _ = _table(path)
    nchan = rows["DATA"].shape[1]
    v = velocity_axis_lsrk_m_s(rows["CRVAL1"][0], rows["CDELT1"][0], rows["CRPIX1"][0],
                               rows["RESTFREQ"][0], rows["VFRAME"][0], nchan) / 1e3
    quiet = model_line(120.0, 20.0, v) < 0.2                    # noise of Tsys alone
    k = np.arange(nchan)
    use = quiet & (k > 0.15 * nchan) & (k < 0.85 * nchan) & ~rows["FLAGGED"].any(axis=0)
    full = rows["EXPOSURE"] > 0.9 * rows["EXPOSURE"].max()
    d = rows["DATA"][full][:, use].astype(float)
    sigma = np.std(np.diff(d, axis=0)) / np.sqrt(2)
    b_hz = make_channelizer(head["CHANMETH"], nchan, taps=head["PFBTAPS"]).enbw_hz(head["SAMPRATE"])
    t_phase = rows["EXPOSURE"][full].mean() / 2
    expected = rows["TSYS"].mean() / np.sqrt(b_hz * t_phase)
    assert abs(sigma / expected - 1) < 0.10, (sigma, expected)


def test_column_density_against_the_model_column(thin):
    # N(HI) = 1.823e18 int T_B dv, optically thin (Dickey & Lockman 1990), against the model's
    # true (beam-averaged) column. With a peak optical depth of ~0.1 the thin formula reads a
    # few per cent low; the model's own T_B integral gives the size of that effect.
    from cli_runner import beam_fwhm_deg

    from spinflip.daemon.sources.galaxy import ModelGalaxy, beam_directions
    path, _ = thin
    _, _, _, ah, _ = _table(path)
    g = ModelGalaxy()
    dirs = list(beam_directions(120.0, 20.0, beam_fwhm_deg()))
    n_true = sum(w * g.column_density_cm2(l, b) for l, b, w in dirs) / sum(w for *_, w in dirs)
    w_model, _, _ = _model_integral(120.0, 20.0)
    thin_ratio = 1.823e18 * w_model / n_true          # < 1: the optical-depth deficit
    assert 0.9 < thin_ratio < 1.0
    assert ah["BLMODE"] == "auto" and ah["BLRMS"] < 1.0
    assert abs(ah["NHI"] / (1.823e18 * w_model) - 1) < 0.05, (ah["NHI"], w_model)
    assert abs(ah["NHI"] / n_true - thin_ratio) < 0.05


def test_inspect_shows_calibration_and_line(inband):
    path, _ = inband
    r = run_cli_inprocess(["inspect", path, "--json"])
    assert r.returncode == 0, r.stderr
    s = json.loads(r.stdout)
    assert s["tsys_source"].startswith("noise source")
    assert s["tsys_measurements"] >= 2
    assert s["velocity_axis_lsrk_km_s"][0] < 0 < s["velocity_axis_lsrk_km_s"][1]
    assert s["line_integral_k_km_s"] > 1000 and s["nhi_cm2"] > 1e21
    text = run_cli_inprocess(["inspect", path]).stdout
    for frag in ("noise source", "K km/s", "cm^-2", "LSRK"):
        assert frag in text


# -- faults and bad input -------------------------------------------------------------------
def test_failing_switch_is_an_error_and_no_row_gets_a_wrong_scale(tmp_path):
    cfg = write_config(tmp_path / "c.toml", BASE.format(seed=1, drift=0.02, period=900.0,
                       l=30.0, b=0.0, offset=-0.8e6).replace("cal_interval_s = 20.0", """
cal_interval_s = 20.0
switch = "command"
switch_on_cmd = "echo relay jammed >&2; exit 3"
switch_off_cmd = "true"
"""))
    r = run_cli_inprocess(["run", "--config", cfg, "--fast", "--duration", 12, "--out", tmp_path / "o"])
    assert r.returncode == 0, r.stderr
    assert "noise source switch failed" in r.stderr and "relay jammed" in r.stderr
    assert "no system temperature measured" in r.stderr
    (path,) = list((tmp_path / "o").glob("*.fits"))
    with fits.open(path) as h:
        rows = h["SINGLE DISH"].data
        assert np.all(np.isnan(rows["TSYS"])) and np.all(rows["FLAGGED"])
        assert rows["UNKNTIME"][0] > 0          # the firing's samples were left out
        hist = h["TSYS HISTORY"].data
        assert all("unknown" in s for s in hist["STATUS"])


def test_switch_that_fails_at_start_up_is_refused(tmp_path):
    cfg = write_config(tmp_path / "c.toml", """[calibration]
switch = "command"
switch_on_cmd = "true"
switch_off_cmd = "exit 4"
""" + NO_PORTS)
    r = run_cli_inprocess(["run", "--config", cfg, "--fast", "--duration", 5, "--out", tmp_path / "o"])
    assert r.returncode == 2
    assert "failed at start-up" in r.stderr and len(r.stderr.strip().splitlines()) == 1
    assert not list((tmp_path / "o").glob("*.fits"))


def test_stale_tsys_flags_rows(tmp_path):
    cfg = write_config(tmp_path / "c.toml", BASE.format(seed=1, drift=0.02, period=900.0,
                       l=30.0, b=0.0, offset=-0.8e6).replace("cal_interval_s = 20.0",
                       "cal_interval_s = 3600.0\ntsys_max_age_s = 10.0"))
    r = run_cli_inprocess(["run", "--config", cfg, "--fast", "--duration", 25, "--out", tmp_path / "o"])
    assert r.returncode == 0 and "s old" in r.stderr
    (path,) = list((tmp_path / "o").glob("*.fits"))
    with fits.open(path) as h:
        rows = h["SINGLE DISH"].data
    fresh = rows["TSYSAGE"] <= 10.0
    assert fresh.any() and (~fresh).any()
    assert np.all(rows["FLAGGED"][~fresh]) and not np.all(rows["FLAGGED"][fresh])


@pytest.mark.parametrize("text, fragments", [
    ('[source]\nkind = "rtlsdr"\n', ["calibration.noise_source_k is not given"]),
    ('[source]\nkind = "rtlsdr"\n[calibration]\nnoise_source_k = 50.0\n',
     ["calibration.switch = 'none'"]),
    ('[calibration]\nnoise_source_k = -5.0\n', ["calibration.noise_source_k", "-5.0"]),
    ('[site]\nlat = 91.0\n', ["site.lat", "91.0", "-90 to 90"]),
    ('[site]\nlon = 400.0\n', ["site.lon", "400.0"]),
    ('[site]\nheight_m = 12000.0\n', ["site.height_m", "12000.0"]),
    ('[calibration]\ntsys_from = "loads"\n', ["no hot/cold record", "spinflip loads"]),
    ('[baseline]\nwindows_km_s = [[10, -10]]\n', ["baseline.windows_km_s", "lo < hi"]),
    ('[calibration]\nswitch = "gpio"\n', ["calibration.gpio_line is not given"]),
    ('[pointing]\nframe = "azel"\nlon = 180.0\nlat = 3.0\n', ["below pointing.min_elevation"]),
])
def test_bad_calibration_input_is_one_line_exit_2(tmp_path, text, fragments):
    cfg = write_config(tmp_path / "c.toml", text + NO_PORTS)
    r = run_cli_inprocess(["run", "--config", cfg, "--fast", "--duration", 5, "--out", tmp_path / "o"])
    assert r.returncode == 2, r.stderr
    lines = r.stderr.strip().splitlines()
    assert len(lines) == 1, r.stderr
    for frag in fragments:
        assert frag in lines[0]
