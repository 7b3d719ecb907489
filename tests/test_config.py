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


# -- hostile and clumsy files (issue 12, item 6) -------------------------------------------------
DEEP = {
    "array": "[site]\nname = " + "[" * 3000 + "]" * 3000 + "\n",
    "inline-table": "[site]\nname = " + "{a = " * 3000 + "1" + "}" * 3000 + "\n",
}


@pytest.mark.parametrize("kind", sorted(DEEP))
def test_deeply_nested_toml_is_one_line_exit_2_for_run_doctor_and_chain(tmp_path, capsys, kind):
    """tomllib recurses per nesting level; the traceback was 3000 lines long."""
    from spinflip import cli
    f = tmp_path / "deep.toml"
    f.write_text(DEEP[kind])
    with pytest.raises(config.ConfigError, match="nested too deeply") as err:
        config.load(f)
    assert "\n" not in str(err.value)
    assert cli.main(["run", "--config", str(f), "--fast", "--duration", "1",
                     "--out", str(tmp_path / "o")]) == 2
    assert cli.main(["chain", str(f)]) == 2
    err_text = capsys.readouterr().err
    assert err_text.count("\n") == 2 and err_text.count("nested too deeply") == 2, err_text
    assert "Traceback" not in err_text
    assert cli.main(["doctor", "--config", str(f), "--out", str(tmp_path / "o")]) == 1
    out = capsys.readouterr().out
    assert "nested" in out and "Traceback" not in out     # (the table wraps the line)


@pytest.mark.parametrize("start, fragment", [
    ("yesterday", "expected 'now' or a UTC time in ISO 8601"),
    ("2026-13-01T00:00:00", "expected 'now' or a UTC time in ISO 8601"),
    ("2026-03-01T04:00:00+02:00", "expected a UTC time"),
])
def test_sim_start_that_is_not_a_utc_time_names_the_key(tmp_path, start, fragment):
    f = tmp_path / "c.toml"
    f.write_text(f'[sim]\nstart = "{start}"\n')
    with pytest.raises(config.ConfigError) as err:
        config.load(f)
    msg = str(err.value)
    assert msg.startswith("config sim.start = ") and fragment in msg and "\n" not in msg


@pytest.mark.parametrize("start, expected", [
    ("now", "now"), ("2026-03-01T04:00:00Z", "2026-03-01T04:00:00"),
    ("2026-03-01 04:00:00.5", "2026-03-01T04:00:00.500000"), ("2026-03-01", "2026-03-01T00:00:00"),
])
def test_sim_start_is_normalised_for_astropy(tmp_path, start, expected):
    from astropy.time import Time
    f = tmp_path / "c.toml"
    f.write_text(f'[sim]\nstart = "{start}"\n')
    got = config.load(f)["sim"]["start"]
    assert got == expected
    if got != "now":     # astropy reads it as the same instant (astropy.time as the reference)
        assert abs(Time(got, scale="utc").unix - Time(expected, scale="utc").unix) < 1e-6


def test_error_lines_never_carry_a_whole_value(tmp_path):
    f = tmp_path / "c.toml"
    f.write_text("[rfi]\nspurs_hz = [" + ", ".join(['"x"'] * 20000) + "]\n")
    with pytest.raises(config.ConfigError) as err:
        config.load(f)
    assert "rfi.spurs_hz" in str(err.value) and len(str(err.value)) < 250


def test_a_huge_file_is_refused_before_it_is_parsed(tmp_path):
    f = tmp_path / "c.toml"
    f.write_text("# " + "x" * 2_000_000 + "\n")
    with pytest.raises(config.ConfigError, match="larger than 1000 kB"):
        config.load(f)


# -- pointing drivers (issue 14, part 4) ---------------------------------------------------------
@pytest.mark.parametrize("text, message", [
    ("[pointing]\ndriver = 'telescope'\n",
     "config pointing.driver = 'telescope': expected one of 'none', 'manual', 'rotator'"),
    ("[rotator]\nendpoint = 'localhost'\n",
     "config rotator.endpoint = 'localhost': expected host:port with a port from 1 to 65535, "
     "e.g. '127.0.0.1:4533'"),
    ("[rotator]\nendpoint = 'localhost:70000'\n",
     "config rotator.endpoint = 'localhost:70000': expected host:port with a port from 1 to "
     "65535, e.g. '127.0.0.1:4533'"),
    ("[rotator]\ntolerance_deg = 0\n",
     "config rotator.tolerance_deg = 0.0: expected a number from 0.01 to 30"),
    ("[rotator]\ntimeout_s = 0.5\n", "config rotator.timeout_s = 0.5: expected a number from 1 to 3600"),
    ("[rotator]\nanswer_s = 61\n", "config rotator.answer_s = 61.0: expected a number from 0.1 to 60"),
    ("[rotator]\npoll_s = 0.01\n", "config rotator.poll_s = 0.01: expected a number from 0.05 to 10"),
    ("[rotator]\ntrack_fraction = 2\n",
     "config rotator.track_fraction = 2.0: expected a number from 0.01 to 1"),
    ("[rotator]\naz_range = [180, 0]\n",
     "config rotator.az_range = [180, 0]: expected [lo, hi] in deg, -180 <= lo < hi <= 540"),
    ("[rotator]\naz_range = [-200, 200]\n",
     "config rotator.az_range = [-200, 200]: expected [lo, hi] in deg, -180 <= lo < hi <= 540"),
    ("[rotator]\naz_range = 360\n",
     "config rotator.az_range = 360: expected [lo, hi] in deg, -180 <= lo < hi <= 540"),
    ("[rotator]\nel_range = [0, 95]\n",
     "config rotator.el_range = [0, 95]: expected [lo, hi] in deg, 0 <= lo < hi <= 90"),
    ("[rotator]\npark = [0, 'up']\n",
     "config rotator.park = [0, 'up']: expected [az, el] in deg, az from -180 to 540, el from 0 to 90"),
    ("[rotator]\naz_range = [0, 180]\npark = [270, 90]\n",
     "config rotator.park = [270, 90]: must lie inside rotator.az_range = [0, 180] and "
     "rotator.el_range = [0, 90]"),
    ("[rotator]\nel_range = [10, 80]\n",
     "config rotator.park = [0, 90]: must lie inside rotator.az_range = [0, 360] and "
     "rotator.el_range = [10, 80]"),
])
def test_pointing_driver_and_rotator_keys_are_checked(tmp_path, text, message):
    f = tmp_path / "c.toml"
    f.write_text(text)
    with pytest.raises(config.ConfigError) as err:
        config.load(f)
    assert str(err.value) == message


def test_rotator_keys_are_read(tmp_path):
    f = tmp_path / "c.toml"
    f.write_text("[pointing]\ndriver = 'rotator'\n[rotator]\nendpoint = '[::1]:4533'\n"
                 "az_range = [-180, 450]\nel_range = [5, 85]\npark = [-90, 85]\n")
    cfg = config.load(f)
    assert cfg["pointing"]["driver"] == "rotator"
    assert cfg["rotator"]["az_range"] == [-180.0, 450.0] and cfg["rotator"]["park"] == [-90.0, 85.0]
    assert config.split_host_port(cfg["rotator"]["endpoint"]) == ("::1", 4533)
    assert config.load(None)["pointing"]["driver"] == "none"
