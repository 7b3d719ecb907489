"""The per-user cache of astropy's parsed Earth-orientation table (daemon/sky/eop_cache.py)."""

import warnings

import numpy as np
import pytest
from astropy.utils import iers
from astropy.utils.exceptions import AstropyWarning

from spinflip.daemon.sky import eop_cache


@pytest.fixture(scope="module")
def parsed():
    """Astropy's own parse of the bundled IERS-A table (the reference), done once."""
    with warnings.catch_warnings():
        warnings.simplefilter("ignore", AstropyWarning)
        return iers.IERS_Auto.read()


@pytest.fixture
def reads(monkeypatch, tmp_path, parsed):
    """The cache in a fresh folder; each parse astropy would do is counted (and served from
    the module's one parse, to keep the tests fast)."""
    monkeypatch.setenv("XDG_CACHE_HOME", str(tmp_path / "cache"))
    monkeypatch.setattr(eop_cache, "PARSE_IN_CHILD", False)
    calls = []

    def read(*args, **kwargs):
        calls.append(1)
        return parsed

    monkeypatch.setattr(iers.IERS_Auto, "read", read)
    return calls


def _assert_same_table(a, b):
    assert type(a) is type(b)
    assert list(b.colnames) == list(eop_cache.KEPT_COLUMNS) and len(a) == len(b)
    for name in eop_cache.KEPT_COLUMNS:
        x, y = a[name], b[name]
        assert str(getattr(x, "unit", None)) == str(getattr(y, "unit", None)), name
        xv, yv = np.asarray(getattr(x, "value", x)), np.asarray(getattr(y, "value", y))
        assert np.array_equal(xv, yv, equal_nan=xv.dtype.kind == "f"), name
        assert np.array_equal(np.asarray(getattr(x, "mask", False)),
                              np.asarray(getattr(y, "mask", False))), name
    assert {k: str(v) for k, v in a.meta.items()} == {k: str(v) for k, v in b.meta.items()}


def test_cache_is_written_once_and_gives_astropys_table(reads, parsed):
    first = eop_cache.load_table()
    path = eop_cache.cache_path()
    assert path.is_file() and path.parent == eop_cache.cache_dir()
    second = eop_cache.load_table()
    assert len(reads) == 1                     # the second load came from the file
    _assert_same_table(parsed, first)
    _assert_same_table(parsed, second)
    # astropy answers the same from the rebuilt table (UT1-UTC and polar motion)
    mjd = np.array([58000.5, 60000.25, float(parsed["MJD"][-1].value) - 10.0])
    from astropy.time import Time
    t = Time(mjd, format="mjd", scale="utc")
    with warnings.catch_warnings():
        warnings.simplefilter("ignore", AstropyWarning)
        assert np.array_equal(second.ut1_utc(t).value, parsed.ut1_utc(t).value)
        for got, ref in ((second.pm_xy(t), parsed.pm_xy(t)),
                         (second.dcip_xy(t), parsed.dcip_xy(t))):
            assert np.array_equal(np.asarray([v.value for v in got]),
                                  np.asarray([v.value for v in ref]), equal_nan=True)
        assert np.array_equal(second.ut1_utc(t, return_status=True)[1],
                              parsed.ut1_utc(t, return_status=True)[1])


def test_new_package_version_rebuilds_and_removes_the_old_file(reads, monkeypatch):
    eop_cache.load_table()
    old = eop_cache.cache_path()
    real = eop_cache._version
    monkeypatch.setattr(eop_cache, "_version",
                        lambda name: "99.0" if name == "astropy-iers-data" else real(name))
    new = eop_cache.cache_path()
    assert new != old
    eop_cache.load_table()
    assert len(reads) == 2                     # parsed again for the new version
    assert new.is_file() and not old.exists()
    eop_cache.load_table()
    assert len(reads) == 2


def test_a_file_under_the_wrong_key_is_not_trusted(reads, monkeypatch):
    eop_cache.load_table()
    path = eop_cache.cache_path()
    other = path.with_name("eop-0000000000000000.npz")
    path.rename(other)
    monkeypatch.setattr(eop_cache, "cache_key", lambda: "0000000000000000")
    eop_cache.load_table()                     # the header inside names another key
    assert len(reads) == 2


@pytest.mark.parametrize("damage", ["garbage", "truncated", "changed value"])
def test_corrupt_cache_is_ignored_and_rebuilt(reads, parsed, damage):
    eop_cache.load_table()
    path = eop_cache.cache_path()
    if damage == "garbage":
        path.write_bytes(b"not an archive at all")
    elif damage == "truncated":
        path.write_bytes(path.read_bytes()[:5000])
    else:   # a valid archive whose numbers no longer match the digest
        with np.load(path, allow_pickle=False) as z:
            arrays = {k: z[k] for k in z.files}
        i = eop_cache.json.loads(str(arrays["header"]))["columns"]
        col = next(j for j, c in enumerate(i) if c["name"] == "UT1_UTC")
        arrays[f"c{col}"] = arrays[f"c{col}"] + 1.0
        np.savez(path, **arrays)
    table = eop_cache.load_table()
    assert len(reads) == 2                     # rebuilt from astropy's parse
    _assert_same_table(parsed, table)
    _assert_same_table(parsed, eop_cache.load_table())   # and the rewritten file is sound
    assert len(reads) == 2


def test_unwritable_cache_folder_still_works(reads, monkeypatch, tmp_path, parsed):
    blocker = tmp_path / "a-file"
    blocker.write_text("a file where the cache folder would be\n")
    monkeypatch.setenv("XDG_CACHE_HOME", str(blocker))
    _assert_same_table(parsed, eop_cache.load_table())
    _assert_same_table(parsed, eop_cache.load_table())
    assert len(reads) == 2                     # parsed each time, no error
    assert not (blocker / "spinflip").exists()


def test_a_missing_cache_is_made_by_a_child_process(monkeypatch, tmp_path, parsed):
    """The first start parses in a child, so this process never runs astropy's parser."""
    monkeypatch.setenv("XDG_CACHE_HOME", str(tmp_path / "cache"))

    def refuse(*args, **kwargs):
        raise AssertionError("parsed in the daemon's own process")

    monkeypatch.setattr(iers.IERS_Auto, "read", refuse)
    table = eop_cache.load_table()
    assert eop_cache.cache_path().is_file()
    _assert_same_table(parsed, table)
