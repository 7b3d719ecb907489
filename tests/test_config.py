"""Configuration defaults and one-line errors naming key, value and what is allowed."""

import pytest

from spinflip.daemon import config


def test_defaults_need_no_file():
    cfg = config.load(None)
    assert cfg["source"]["kind"] == "sim"
    assert cfg["spectrometer"]["method"] == "pfb"
    # every key in the schema has a default of its declared type
    for section, keys in config.SCHEMA.items():
        for key, spec in keys.items():
            assert isinstance(cfg[section][key], spec.kind), (section, key)


@pytest.mark.parametrize("text, fragments", [
    ("[spectrometer]\nchannels = 1000\n", ["spectrometer.channels", "1000", "power of two"]),
    ("[spectrometer]\nmethod = 'welch'\n", ["spectrometer.method", "'welch'", "'pfb'"]),
    ("[source]\ngain = 'high'\n", ["source.gain", "'high'", "a number from 0 to 50"]),
    ("[source]\nsample_rate = 500000.0\n", ["source.sample_rate", "500000", "900001-3200000"]),
    ("[site]\nlatitude = 3\n", ["unknown key site.latitude", "lat"]),
    ("[sky]\nx = 1\n", ["unknown section [sky]", "site"]),
    ("[switching]\nsettle_s = 0.9\ndwell_s = 0.5\n", ["switching.settle_s", "shorter"]),
    ("[sim]\nrfi = 1\n", ["sim.rfi", "true or false"]),
    ("[spectrometer\n", ["not valid TOML"]),
])
def test_bad_values_name_key_value_and_allowed(tmp_path, text, fragments):
    f = tmp_path / "c.toml"
    f.write_text(text)
    with pytest.raises(config.ConfigError) as err:
        config.load(f)
    msg = str(err.value)
    assert "\n" not in msg
    for frag in fragments:
        assert frag in msg


def test_missing_file(tmp_path):
    with pytest.raises(config.ConfigError, match="not found"):
        config.load(tmp_path / "nope.toml")


def test_int_accepted_for_float_and_merged(tmp_path):
    f = tmp_path / "c.toml"
    f.write_text("[calibration]\ntsys_k = 120\n[pointing]\nframe = 'galactic'\nlon = 45\n")
    cfg = config.load(f)
    assert cfg["calibration"]["tsys_k"] == 120.0 and isinstance(cfg["calibration"]["tsys_k"], float)
    assert cfg["pointing"]["lon"] == 45.0


@pytest.mark.parametrize("text, fragments", [
    ("[calibration]\ncal_interval_s = 2.0\ncal_on_s = 1.0\n", ["calibration.cal_interval_s", "three times"]),
    ("[calibration]\nt_cold_k = 120.0\nt_hot_k = 110.0\n", ["calibration.t_hot_k", "110"]),
    ("[calibration]\nswitch = 'command'\nswitch_on_cmd = 'relay on'\n", ["calibration.switch_off_cmd is empty"]),
    ("[calibration]\ntsys_from = 'guess'\n", ["calibration.tsys_from", "'noise_source'"]),
    ("[calibration]\nmain_beam_efficiency = 1.5\n", ["calibration.main_beam_efficiency", "0.05 to 1"]),
    ("[baseline]\nwindows_km_s = [[1, 2, 3]]\n", ["baseline.windows_km_s", "[lo, hi]"]),
    ("[baseline]\nmode = 'windows'\n", ["baseline.windows_km_s is empty"]),
    ("[baseline]\norder = 9\n", ["baseline.order", "0 to 8"]),
])
def test_calibration_keys_are_checked(tmp_path, text, fragments):
    f = tmp_path / "c.toml"
    f.write_text(text)
    with pytest.raises(config.ConfigError) as err:
        config.load(f)
    msg = str(err.value)
    assert "\n" not in msg
    for frag in fragments:
        assert frag in msg


def test_windows_are_read_as_float_pairs(tmp_path):
    f = tmp_path / "c.toml"
    f.write_text("[baseline]\nmode = 'windows'\nwindows_km_s = [[-250, -150], [180.5, 250]]\n")
    assert config.load(f)["baseline"]["windows_km_s"] == [[-250.0, -150.0], [180.5, 250.0]]
    assert config.load(None)["baseline"]["windows_km_s"] == []
