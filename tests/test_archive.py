"""Crash-safe scan archive (journal -> atomic FITS) and the ``inspect`` summary.

Outside references used below:
- FITS standard 3.0 (Pence et al. 2010) and the single-dish FITS convention (Garwood 2000):
  checked by reading our files back with astropy.io.fits, an independent FITS reader.
- FITS WCS paper III (Greisen et al. 2006): the velocity axis is checked against astropy's
  ``u.doppler_radio`` equivalency and against wcslib's own FREQ -> VRAD translation
  (``astropy.wcs``), which implements that paper.
"""

from __future__ import annotations

import inspect
import logging
import os
import signal
import subprocess
import sys
import textwrap

import numpy as np
import pytest
from astropy import units as u
from astropy.io import fits
from astropy.time import Time
from astropy.wcs import WCS

from spinflip.daemon.commands.inspect import format_summary, summarize, velocity_axis_lsrk_m_s
from spinflip.daemon.sky.hi_line import HI_REST_FREQ_HZ, radio_frequency_hz, radio_velocity_m_s
from spinflip.daemon.storage import archive
from spinflip.daemon.storage import journal as journal_format
from spinflip.daemon.storage.archive import ScanWriter
from spinflip.daemon.storage.fits_file import read_scan
from spinflip.daemon.storage.journal import read_journal
from spinflip.daemon.storage.recovery import recover

NCHAN = 64
HEADER = {"SITELAT": 47.25, "SITELONG": 9.5, "SITEELEV": 610.0, "TELESCOP": "Hilltop 3m dish",
          "SPECSYS": "TOPOCENT", "BUNIT": "K", "OBSERVER": "Demo Observer", "SWMODE": "frequency"}


def make_row(i, nchan):
    """A deterministic integration number ``i`` (also run, as source, in the crash subprocess)."""
    rng = np.random.default_rng(1000 + i)
    return {
        "DATA": rng.normal(10.0, 1.0, nchan).astype(np.float32),
        "FLAGGED": rng.random(nchan) < 0.1,
        "TSYS": 100.0 + i, "EXPOSURE": 1.5,
        "DATE-OBS": f"2026-03-01T02:{i // 60:02d}:{i % 60:02d}.500",
        "CRVAL1": 1420.0e6, "CDELT1": 2.4e6 / nchan, "CRPIX1": nchan / 2 + 1.0,
        "CTYPE1": "FREQ", "RESTFREQ": 1420405751.768, "VFRAME": -12000.0 + 10.0 * i,
        "GLON": 30.0, "GLAT": 0.5, "AZIMUTH": 170.0 + i, "ELEVATIO": 40.0, "OBJECT": "G030.0+00.5",
        "LOSTSAMP": 3 * i, "CALSTATE": i % 2, "LO_HZ": 1419.9e6 + 0.25 * i,
    }


def assert_rows_equal(table, n):
    assert len(table) == n
    for i in range(n):
        want = make_row(i, NCHAN)
        np.testing.assert_array_equal(np.asarray(table["DATA"][i]), want["DATA"])
        np.testing.assert_array_equal(np.asarray(table["FLAGGED"][i]), want["FLAGGED"])
        assert table["TSYS"][i] == want["TSYS"]
        assert table["DATE-OBS"][i] == want["DATE-OBS"]
        assert table["VFRAME"][i] == want["VFRAME"]
        assert table["LOSTSAMP"][i] == want["LOSTSAMP"]
        assert table["LO_HZ"][i] == want["LO_HZ"]


def write_scan(out_dir, n, header=HEADER, name="scan-test"):
    w = ScanWriter(out_dir, name, header, NCHAN)
    for i in range(n):
        w.append(make_row(i, NCHAN))
    return w


# -------------------------------------------------------------------------------------------
# round trip and FITS contract
# -------------------------------------------------------------------------------------------
@pytest.mark.parametrize("bunit", ["K", "count"])
def test_round_trip_columns_units_and_keywords(tmp_path, bunit):
    w = write_scan(tmp_path, 5, {**HEADER, "BUNIT": bunit})
    path = w.close()
    assert path == tmp_path / "scan-test.fits"
    assert sorted(p.name for p in tmp_path.iterdir()) == ["scan-test.fits"]  # no journal, no .tmp

    # read with astropy.io.fits directly (independent of read_scan)
    with fits.open(path) as hdul:
        assert hdul[0].header["NAXIS"] == 0 and hdul[0].data is None
        hdu = hdul["SINGLE DISH"]
        assert isinstance(hdu, fits.BinTableHDU)
        h = hdu.header
        assert h["EXTNAME"] == "SINGLE DISH" and h["EXTVER"] == 1
        assert h["ORIGIN"] == "spinflip"
        assert h["TELESCOP"] == HEADER["TELESCOP"]
        assert h["SPECSYS"] == "TOPOCENT" and h["OBSERVER"] == "Demo Observer"
        assert (h["SITELAT"], h["SITELONG"], h["SITEELEV"]) == (47.25, 9.5, 610.0)
        assert abs((Time.now() - Time(h["DATE"], format="isot", scale="utc")).sec) < 120
        cols = hdu.columns
        units = {c.name: c.unit for c in cols}
        assert units["DATA"] == bunit
        assert units["TSYS"] == "K" and units["EXPOSURE"] == "s"
        assert units["CRVAL1"] == units["CDELT1"] == units["RESTFREQ"] == "Hz"
        assert units["VFRAME"] == "m/s"
        for k in ("GLON", "GLAT", "AZIMUTH", "ELEVATIO"):
            assert units[k] == "deg"
        assert cols["DATA"].format == f"{NCHAN}E" and cols["FLAGGED"].format == f"{NCHAN}L"
        assert {"LOSTSAMP", "CALSTATE", "LO_HZ"} <= set(cols.names)
        assert cols["LOSTSAMP"].format == "K" and units["LO_HZ"] == "Hz"
        assert list(hdu.data["CTYPE1"]) == ["FREQ"] * 5

    header, table = read_scan(path)
    assert header["EXTNAME"] == "SINGLE DISH" and header["BUNIT"] == bunit
    assert table["DATA"].unit == u.Unit(bunit) and table["VFRAME"].unit == u.m / u.s
    assert_rows_equal(table, 5)
    assert table["OBJECT"][0] == "G030.0+00.5"


def test_zero_rows_writes_nothing(tmp_path):
    w = ScanWriter(tmp_path, "empty", HEADER, NCHAN)
    assert w.journal_path.exists()
    assert w.close() is None
    assert list(tmp_path.iterdir()) == []


def test_bad_rows_and_headers_are_refused_without_touching_the_journal(tmp_path):
    w = write_scan(tmp_path, 2)
    size = w.journal_path.stat().st_size
    row = make_row(2, NCHAN)
    with pytest.raises(ValueError, match="expected"):
        w.append({**row, "DATA": np.zeros(NCHAN + 1, np.float32)})
    with pytest.raises(ValueError, match="NOTE"):
        w.append({**row, "NOTE": "a string is not a numeric extra"})
    with pytest.raises(ValueError, match="TSYS"):
        w.append({k: v for k, v in row.items() if k != "TSYS"})
    assert w.journal_path.stat().st_size == size
    assert len(read_journal(w.journal_path).rows) == 2
    w.close()
    with pytest.raises(ValueError, match="BUNIT"):
        ScanWriter(tmp_path, "x", {**HEADER, "BUNIT": "Jy"}, NCHAN)
    with pytest.raises(ValueError, match="NAXIS"):
        ScanWriter(tmp_path, "x", {**HEADER, "NAXIS2": 3}, NCHAN)


def test_existing_scan_is_never_overwritten(tmp_path):
    first = write_scan(tmp_path, 1).close()
    w = write_scan(tmp_path, 2)
    assert w.scan_name == "scan-test-1"
    second = w.close()
    assert first != second
    assert len(read_scan(first)[1]) == 1 and len(read_scan(second)[1]) == 2


# -------------------------------------------------------------------------------------------
# durability: kill -9 in a subprocess, torn records
# -------------------------------------------------------------------------------------------
CHILD = """
import os, signal, sys
from pathlib import Path
import numpy as np
from spinflip.daemon.storage import archive
from spinflip.daemon.storage import journal as journal_format
{make_row}
out, n, mode = Path(sys.argv[1]), int(sys.argv[2]), sys.argv[3]
w = archive.ScanWriter(out, "scan-crash", {header!r}, {nchan})
for i in range(n):
    w.append(make_row(i, {nchan}))
if mode == "half":  # die half-way through writing the next record
    rec = journal_format._row_record(make_row(n, {nchan}), {nchan})
    os.write(w._fd, rec[: len(rec) // 2])
    os.fsync(w._fd)
if mode == "exit":
    os._exit(3)
os.kill(os.getpid(), signal.SIGKILL)
"""


def run_child(tmp_path, n, mode):
    code = CHILD.format(make_row=textwrap.dedent(inspect.getsource(make_row)), header=HEADER,
                        nchan=NCHAN)
    proc = subprocess.run([sys.executable, "-c", code, str(tmp_path), str(n), mode],
                          capture_output=True, text=True, timeout=60)
    assert proc.returncode == (3 if mode == "exit" else -signal.SIGKILL), proc.stderr
    return tmp_path / "scan-crash.journal"


@pytest.mark.parametrize("mode", ["kill", "exit", "half"])
def test_killed_writer_loses_nothing_that_was_appended(tmp_path, mode, caplog):
    n = 7
    journal = run_child(tmp_path, n, mode)
    assert journal.exists() and not (tmp_path / "scan-crash.fits").exists()
    torn = len(journal_format._row_record(make_row(n, NCHAN), NCHAN)) // 2 if mode == "half" else 0
    contents = read_journal(journal)
    assert len(contents.rows) == n and contents.torn_bytes == torn
    assert archive.count_rows(journal) == n

    with caplog.at_level(logging.WARNING, logger="spinflip.archive"):
        paths = recover(tmp_path)
    assert paths == [tmp_path / "scan-crash.fits"]
    assert sorted(p.name for p in tmp_path.iterdir()) == ["scan-crash.fits"]
    assert f"recovered {n} integrations" in caplog.text
    assert f"dropped {torn} torn bytes" in caplog.text
    header, table = read_scan(paths[0])
    assert header["TELESCOP"] == HEADER["TELESCOP"]
    assert_rows_equal(table, n)


def test_killed_before_any_row_leaves_no_file(tmp_path):
    run_child(tmp_path, 0, "kill")
    assert recover(tmp_path) == []
    assert list(tmp_path.iterdir()) == []


def test_any_cut_inside_the_last_record_is_detected(tmp_path):
    w = write_scan(tmp_path, 3)
    full = w.journal_path.read_bytes()
    last = len(journal_format._row_record(make_row(2, NCHAN), NCHAN))
    w.close()
    j = tmp_path / "cut.journal"
    for cut in [1, 4, 11, 12, 13, last // 2, last - 1]:
        j.write_bytes(full[: len(full) - cut])
        c = read_journal(j)
        assert len(c.rows) == 2 and c.torn_bytes == last - cut, cut
    # a zero-filled tail (file length grew, data never reached the disk) is not a record
    j.write_bytes(full + bytes(4096))
    c = read_journal(j)
    assert len(c.rows) == 3 and c.torn_bytes == 4096
    # one flipped bit in the last record's DATA fails its CRC-32
    damaged = bytearray(full)
    damaged[-NCHAN - 10] ^= 0x04
    j.write_bytes(bytes(damaged))
    assert len(read_journal(j).rows) == 2


def test_failed_write_is_truncated_so_later_rows_survive(tmp_path, monkeypatch):
    w = write_scan(tmp_path, 2)
    real_write = os.write

    def short_then_fail(fd, data):
        real_write(fd, bytes(data)[:20])
        raise OSError(28, "No space left on device")

    monkeypatch.setattr(archive.os, "write", short_then_fail)
    with pytest.raises(OSError):
        w.append(make_row(2, NCHAN))
    monkeypatch.setattr(archive.os, "write", real_write)
    w.append(make_row(2, NCHAN))  # disk has room again: this row must still be readable
    assert_rows_equal(read_scan(w.close())[1], 3)


# -------------------------------------------------------------------------------------------
# atomic FITS write
# -------------------------------------------------------------------------------------------
def test_stale_tmp_from_a_crash_is_overwritten_on_close(tmp_path):
    (tmp_path / "scan-test.fits.tmp").write_bytes(b"half a FITS file from an earlier crash")
    path = write_scan(tmp_path, 2).close()
    assert not (tmp_path / "scan-test.fits.tmp").exists()
    assert_rows_equal(read_scan(path)[1], 2)


def test_stray_tmp_without_journal_is_removed_by_recover(tmp_path):
    (tmp_path / "old.fits.tmp").write_bytes(b"junk")
    assert recover(tmp_path) == []
    assert list(tmp_path.iterdir()) == []


def test_crash_during_fits_write_keeps_the_journal(tmp_path, monkeypatch):
    w = write_scan(tmp_path, 4)

    def crash(*_args):
        raise OSError("simulated crash before the rename")

    monkeypatch.setattr(archive.os, "replace", crash)
    with pytest.raises(OSError, match="simulated"):
        w.close()
    monkeypatch.undo()
    assert w.journal_path.exists() and not w.fits_path.exists()  # the journal still holds it
    assert recover(tmp_path) == [w.fits_path]
    assert sorted(p.name for p in tmp_path.iterdir()) == ["scan-test.fits"]
    assert_rows_equal(read_scan(w.fits_path)[1], 4)


def test_recover_leaves_a_live_writer_alone(tmp_path):
    w = write_scan(tmp_path, 2)
    assert recover(tmp_path) == []  # the writer holds an flock on its journal
    assert w.journal_path.exists()
    w.append(make_row(2, NCHAN))
    assert_rows_equal(read_scan(w.close())[1], 3)


# -------------------------------------------------------------------------------------------
# velocity axis and summary
# -------------------------------------------------------------------------------------------
def test_velocity_axis_matches_astropy_doppler_radio_and_wcslib():
    # FITS WCS paper III (Greisen et al. 2006): radio velocity of a linear FREQ axis.
    crval1, cdelt1, crpix1, vframe, n = 1420.1e6, 2.4e6 / 256, 129.0, 17_345.6, 256
    v = velocity_axis_lsrk_m_s(crval1, cdelt1, crpix1, HI_REST_FREQ_HZ, vframe, n)

    w = WCS(naxis=1)
    w.wcs.ctype, w.wcs.cunit = ["FREQ"], ["Hz"]
    w.wcs.crval, w.wcs.cdelt, w.wcs.crpix = [crval1], [cdelt1], [crpix1]
    w.wcs.restfrq = HI_REST_FREQ_HZ
    w.wcs.set()
    pix0 = np.arange(n)  # astropy's 0-based pixel i is FITS pixel i + 1
    f_wcs = w.pixel_to_world_values(pix0)
    ref = (f_wcs * u.Hz).to(u.m / u.s, equivalencies=u.doppler_radio(HI_REST_FREQ_HZ * u.Hz))
    np.testing.assert_allclose(v, ref.value + vframe, rtol=0, atol=1e-6)

    vrad = w.sub([1])
    vrad.wcs.sptr("VRAD")  # wcslib's own spectral translation
    vrad.wcs.set()
    np.testing.assert_allclose(v, vrad.pixel_to_world_values(pix0) + vframe, rtol=0, atol=1e-4)


def gaussian_scan(tmp_path, v0_km_s, amp_k, sigma_km_s, vframes_m_s, nchan=256, name="line"):
    """Rows of a synthetic line at a fixed LSRK velocity seen through changing VFRAME."""
    cdelt = 2.4e6 / nchan
    rng = np.random.default_rng(7)
    w = ScanWriter(tmp_path, name, HEADER, nchan)
    glons = [359.0, 1.0]
    for k, vframe in enumerate(vframes_m_s):
        # topocentric radio velocity of the line: v_topo = v_LSRK - VFRAME
        f_line = radio_frequency_hz(v0_km_s * 1e3 - vframe)
        crval1 = f_line + (3.3 + 0.37 * k) * cdelt  # line off the band centre, fraction of a chan
        f = crval1 + (np.arange(nchan) + 1 - (nchan / 2 + 1)) * cdelt
        v_topo = radio_velocity_m_s(f) / 1e3
        data = amp_k * np.exp(-0.5 * ((v_topo - (v0_km_s - vframe / 1e3)) / sigma_km_s) ** 2)
        data = data + rng.normal(0.0, 0.02, nchan)
        flagged = np.zeros(nchan, dtype=bool)
        flagged[[0, 1, nchan - 1]] = True
        spike = 40 + k
        data[spike], flagged[spike] = 1000.0, True  # interference, flagged: must not be the peak
        w.append({"DATA": data.astype(np.float32), "FLAGGED": flagged, "TSYS": 95.0 + 5 * k,
                  "EXPOSURE": 2.0, "DATE-OBS": f"2026-03-01T02:00:{10 * k:02d}.000",
                  "CRVAL1": crval1, "CDELT1": cdelt, "CRPIX1": nchan / 2 + 1.0, "CTYPE1": "FREQ",
                  "RESTFREQ": HI_REST_FREQ_HZ, "VFRAME": vframe, "GLON": glons[k % 2],
                  "GLAT": 0.2, "AZIMUTH": 180.0, "ELEVATIO": 50.0, "OBJECT": "G000.0+00.2"})
    return w.close(), cdelt


def test_summarize_finds_line_at_known_lsrk_velocity(tmp_path):
    v0, amp = 42.3, 15.0
    vframes = [-24_000.0, -3_000.0, 9_500.0, 21_000.0]
    path, cdelt = gaussian_scan(tmp_path, v0, amp, 6.0, vframes)
    s = summarize(path)
    chan_km_s = 2.99792458e5 * cdelt / HI_REST_FREQ_HZ
    assert s["channel_width_km_s"] == pytest.approx(chan_km_s, rel=1e-12)
    assert abs(s["line_velocity_lsrk_km_s"] - v0) <= chan_km_s
    # the rows were aligned: a sign error in VFRAME would smear 45 km/s and halve the peak
    assert s["line_peak"] == pytest.approx(amp, rel=0.03)
    assert s["rows"] == 4 and s["data_unit"] == "K"
    assert s["duration_s"] == pytest.approx(30.0) and s["exposure_s"] == pytest.approx(8.0)
    assert (s["tsys_mean_k"], s["tsys_min_k"], s["tsys_max_k"]) == (102.5, 95.0, 110.0)
    assert s["glon_deg"] == pytest.approx(0.0, abs=1e-9)  # circular mean of 359 and 1 deg
    assert s["glat_deg"] == pytest.approx(0.2) and s["elevation_deg"] == pytest.approx(50.0)
    assert s["object"] == "G000.0+00.2" and s["origin"] == "spinflip"
    assert s["flagged_fraction"] == pytest.approx(4 / 256)
    text = format_summary(s)
    assert str(path) in text and "km/s" in text and " K" in text and "s total exposure" in text


@pytest.mark.parametrize("content, fragment", [
    (b"", "not a FITS file"),
    (b"certainly not FITS\n" * 50, "not a FITS file"),
    (None, "SINGLE DISH"),  # a valid FITS file, but not a scan
])
def test_summarize_rejects_other_files_naming_them(tmp_path, content, fragment):
    path = tmp_path / "junk.fits"
    if content is None:
        fits.PrimaryHDU(np.zeros((4, 4))).writeto(path)
    else:
        path.write_bytes(content)
    with pytest.raises(ValueError) as err:
        summarize(path)
    msg = str(err.value)
    assert str(path) in msg and fragment in msg and "\n" not in msg
    with pytest.raises(ValueError, match="no such file"):
        summarize(tmp_path / "missing.fits")


def test_inspect_command_exits_2_on_garbage(tmp_path, capsys):
    from spinflip.cli import main
    path = tmp_path / "garbage.fits"
    path.write_bytes(os.urandom(3000))
    assert main(["inspect", str(path)]) == 2
    assert "garbage.fits" in capsys.readouterr().err


def test_append_returns_only_after_fsync(tmp_path, monkeypatch):
    # durability contract: the record's bytes are written, then fsync'ed, before append returns
    w = ScanWriter(tmp_path, "sync", HEADER, NCHAN)
    calls = []
    real_write, real_fsync = os.write, os.fsync
    monkeypatch.setattr(archive.os, "write", lambda fd, b: calls.append(("write", fd)) or
                        real_write(fd, b))
    monkeypatch.setattr(archive.os, "fsync", lambda fd: calls.append(("fsync", fd)) or
                        real_fsync(fd))
    for i in range(3):
        w.append(make_row(i, NCHAN))
        assert calls[-1] == ("fsync", w._fd) and ("write", w._fd) in calls
        calls.clear()
    monkeypatch.undo()
    w.close()
