"""Journals damaged on the disk (a bad sector, a failing card) and journals that cannot be read.

A crash tears at most the last record of a journal (each record is fsync'ed before the next is
begun); damage in the middle of the file is something else, and recovery must keep every record
whose CRC-32 still holds, keep the damaged original aside, and say what it dropped. A journal
that cannot be read at all must not stop the daemon from starting.

The damage is made by XOR-ing bytes of a journal written by ``ScanWriter`` (so each changed
byte really differs). CRC-32 detects every error burst of up to 32 bits and misses a longer one
with probability 2**-32 (the usual property of a 32-bit CRC, from memory).
"""

from __future__ import annotations

import errno
import os
import pathlib
import stat
import threading

import numpy as np
import pytest
from astropy.io import fits
from cli_runner import run_cli
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st
from test_archive import HEADER, NCHAN, make_row

from spinflip.daemon import config
from spinflip.daemon.run.observation import Daemon
from spinflip.daemon.storage import archive, recovery
from spinflip.daemon.storage.archive import ScanWriter
from spinflip.daemon.storage.fits_file import read_scan
from spinflip.daemon.storage.journal import read_journal
from spinflip.daemon.storage.recovery import recover
from spinflip.daemon.storage.writer import ScanStore

N_ROWS = 7


def _tsys(k: int) -> dict:
    return {"DATE-OBS": f"2026-03-01T02:00:{k:02d}.250", "TSYS": 90.0 + k, "TSYSSIG": 0.5,
            "TSYSREF": 91.0, "TCAL": 30.0, "ONOFF": 1.3, "NCHANUSE": 40.0, "STATUS": "ok",
            "TSYSCHAN": np.full(NCHAN, 90.0 + k)}


def _rfi(k: int) -> dict:
    return {"DATE-OBS": f"2026-03-01T02:00:{k:02d}.750", "KIND": "carrier-on",
            "FREQ": 1420.3e6 + k, "VALUE": 12.0, "TEXT": f"carrier {k}"}


def build_journal(out_dir: pathlib.Path, name: str = "scan-dmg"):
    """A journal as a crash leaves it: the header, N_ROWS rows, a Tsys record after row 1, an
    interference record after row 3 and a note after row 4.

    Returns the journal's path and one ``(start, end, kind, key)`` per record, in file order.
    """
    w = ScanWriter(out_dir, name, HEADER, NCHAN)
    spans = [(0, w._size, "header", None)]

    def mark(kind, key):
        spans.append((spans[-1][1], w._size, kind, key))
    for i in range(N_ROWS):
        w.append(make_row(i, NCHAN))
        mark("row", make_row(i, NCHAN)["DATE-OBS"])
        if i == 1:
            w.append_tsys(_tsys(i))
            mark("tsys", _tsys(i)["DATE-OBS"])
        if i == 3:
            w.append_rfi(_rfi(i))
            mark("rfi", _rfi(i)["TEXT"])
        if i == 4:
            w.append_note({"DATE-OBS": "2026-03-01T02:00:04.900", "TEXT": "cloud over the dish"})
            mark("note", "cloud over the dish")
    os.close(w._fd)          # the process dies here: the kernel drops its lock, nothing more
    w._closed = True
    assert spans[-1][1] == w.journal_path.stat().st_size
    return w.journal_path, spans


def damage(path: pathlib.Path, at: int, masks: bytes) -> bytes:
    """XOR ``masks`` (non-zero bytes) into the file at ``at``; the damaged bytes."""
    buf = bytearray(path.read_bytes())
    for k, m in enumerate(masks):
        if at + k < len(buf):
            buf[at + k] ^= m
    path.write_bytes(bytes(buf))
    return bytes(buf)


def span_of(spans, kind, key=None):
    return next(s for s in spans if s[2] == kind and (key is None or s[3] == key))


def reporter():
    said: list[tuple[str, str]] = []
    return said, lambda sev, text: said.append((sev, text))


# -------------------------------------------------------------------------------------------
# damage in the middle: resynchronise, keep the original as .bad
# -------------------------------------------------------------------------------------------
def test_damage_in_a_middle_record_costs_only_that_record(tmp_path):
    journal, spans = build_journal(tmp_path)
    start, end, _, lost_date = span_of(spans, "row", make_row(3, NCHAN)["DATE-OBS"])
    damaged = damage(journal, (start + end) // 2, b"\xff" * 8)   # 8 bytes in row 3's DATA

    said, report = reporter()
    (path,) = recover(tmp_path, report=report)
    header, table = read_scan(path)
    kept = [i for i in range(N_ROWS) if i != 3]
    assert len(table) == N_ROWS - 1
    assert list(table["DATE-OBS"]) == [make_row(i, NCHAN)["DATE-OBS"] for i in kept]
    for k, i in enumerate(kept):
        np.testing.assert_array_equal(np.asarray(table["DATA"][k]), make_row(i, NCHAN)["DATA"])
        assert table["LOSTSAMP"][k] == make_row(i, NCHAN)["LOSTSAMP"]
    assert header["TELESCOP"] == HEADER["TELESCOP"] and header["BUNIT"] == "K"
    with fits.open(path) as hdul:            # the records after the damage are all there
        assert list(hdul["TSYS HISTORY"].data["TSYS"]) == [91.0]
        assert list(hdul["RFI LOG"].data["TEXT"]) == ["carrier 3"]
        history = " ".join(str(v) for v in hdul["SINGLE DISH"].header["HISTORY"])
    assert "cloud over the dish" in history and "damaged journal" in history
    # the original is kept, byte for byte, beside the FITS file; no journal is left to recover
    bad = tmp_path / "scan-dmg.journal.bad"
    assert bad.read_bytes() == damaged
    assert sorted(p.name for p in tmp_path.iterdir()) == ["scan-dmg.fits", "scan-dmg.journal.bad"]
    (sev, text), = said
    assert sev == "error"
    assert f"recovered {N_ROWS - 1} integrations" in text
    assert f"dropped {end - start} bytes ({end - start} damaged bytes at byte {start})" in text
    assert "scan-dmg.journal.bad" in text and "\n" not in text


def test_damage_in_the_last_record_is_an_ordinary_torn_tail(tmp_path, caplog):
    journal, spans = build_journal(tmp_path)
    start, end, kind, _ = spans[-1]
    assert kind == "row"
    damage(journal, end - 20, b"\x5a" * 8)
    (path,) = recover(tmp_path)
    assert list(read_scan(path)[1]["DATE-OBS"]) == [make_row(i, NCHAN)["DATE-OBS"]
                                                    for i in range(N_ROWS - 1)]
    assert sorted(p.name for p in tmp_path.iterdir()) == ["scan-dmg.fits"]   # no .bad
    assert f"dropped {end - start} torn bytes" in caplog.text


def test_a_bad_file_already_there_is_never_overwritten(tmp_path):
    journal, spans = build_journal(tmp_path)
    (tmp_path / "scan-dmg.journal.bad").write_bytes(b"an earlier one")
    start, end, _, _ = span_of(spans, "tsys")
    damage(journal, start + 30, b"\x01" * 8)
    recover(tmp_path)
    assert (tmp_path / "scan-dmg.journal.bad").read_bytes() == b"an earlier one"
    assert (tmp_path / "scan-dmg.journal.bad-1").exists()
    assert len(read_scan(tmp_path / "scan-dmg.fits")[1]) == N_ROWS


def test_a_writer_whose_journal_was_damaged_keeps_it_at_close(tmp_path):
    w = ScanWriter(tmp_path, "live", HEADER, NCHAN)
    sizes = []
    for i in range(4):
        w.append(make_row(i, NCHAN))
        sizes.append(w._size)
    with open(w.journal_path, "r+b") as fh:     # the card goes bad under the running scan
        fh.seek(sizes[0] + 40)
        fh.write(b"\x00" * 8)
    w.append(make_row(4, NCHAN))
    path = w.close()
    assert list(read_scan(path)[1]["DATE-OBS"]) == [make_row(i, NCHAN)["DATE-OBS"]
                                                    for i in (0, 2, 3, 4)]
    assert (tmp_path / "live.journal.bad").exists() and not w.journal_path.exists()


def test_store_retry_reads_past_damage_and_says_so(tmp_path):
    journal, spans = build_journal(tmp_path)
    start, end, _, _ = span_of(spans, "row", make_row(5, NCHAN)["DATE-OBS"])
    damage(journal, start + 2, b"\x10" * 8)          # hits the length field of row 5
    said, report = reporter()
    store = ScanStore(tmp_path, NCHAN, None, report, hold_bytes=1_000_000)
    store._unfinished.append(journal)                 # its FITS file could not be made at close
    store._retry_unfinished()
    assert store.files == [tmp_path / "scan-dmg.fits"] and not store._unfinished
    assert store.file_rows[str(store.files[0])] == N_ROWS - 1
    assert [sev for sev, _ in said] == ["error"] and "damaged" in said[0][1]
    assert (tmp_path / "scan-dmg.journal.bad").exists()


# -------------------------------------------------------------------------------------------
# the header record damaged
# -------------------------------------------------------------------------------------------
def test_header_with_only_its_marker_hit_is_still_used(tmp_path):
    journal, _ = build_journal(tmp_path)
    damage(journal, 0, b"\xff\xff\xff\xff")
    said, report = reporter()
    (path,) = recover(tmp_path, report=report)
    header, table = read_scan(path)
    assert len(table) == N_ROWS and header["TELESCOP"] == HEADER["TELESCOP"]
    assert table["DATA"].unit == "K"
    assert "only the header record's marker was hit" in said[0][1]
    assert (tmp_path / "scan-dmg.journal.bad").exists()


def test_header_beyond_reading_still_gives_every_row_without_a_unit(tmp_path):
    journal, spans = build_journal(tmp_path)
    damage(journal, 20, b"\xff" * 8)                  # inside its JSON text: not UTF-8 any more
    said, report = reporter()
    (path,) = recover(tmp_path, report=report)
    header, table = read_scan(path)
    assert len(table) == N_ROWS
    np.testing.assert_array_equal(np.asarray(table["DATA"][6]), make_row(6, NCHAN)["DATA"])
    assert "BUNIT" not in header and table["DATA"].unit is None   # unknown, not guessed
    assert "SITELAT" not in header
    (sev, text), = said
    assert sev == "error" and "unit of DATA are unknown" in text
    assert f"dropped {spans[0][1]} bytes ({spans[0][1]} damaged bytes at byte 0)" in text
    with fits.open(path) as hdul:
        assert hdul["SINGLE DISH"].columns["DATA"].format == f"{NCHAN}E"
        assert "unit of DATA" in " ".join(str(v) for v in hdul[1].header["HISTORY"])


def test_header_cards_read_from_a_damaged_record_are_marked_unverified(tmp_path):
    journal, _ = build_journal(tmp_path)
    at = journal.read_bytes().index(b'"SITELAT":47.25') + len(b'"SITELAT":47.')
    damage(journal, at, b"\x01")                      # '2' -> '3': still JSON, CRC fails
    said, report = reporter()
    (path,) = recover(tmp_path, report=report)
    header, table = read_scan(path)
    assert len(table) == N_ROWS and header["SITELAT"] == 47.35
    with fits.open(path) as hdul:
        history = " ".join(str(v) for v in hdul["SINGLE DISH"].header["HISTORY"])
    assert "unverified" in said[0][1] and "unverified" in history


# -------------------------------------------------------------------------------------------
# property: one damaged stretch never costs a record outside it
# -------------------------------------------------------------------------------------------
@pytest.fixture(scope="module")
def pristine(tmp_path_factory):
    d = tmp_path_factory.mktemp("pristine")
    journal, spans = build_journal(d)
    return journal.read_bytes(), spans, d


@settings(max_examples=150, deadline=None, suppress_health_check=[HealthCheck.function_scoped_fixture])
@given(data=st.data())
def test_one_damaged_stretch_never_loses_a_record_outside_it(pristine, data):
    buf, spans, d = pristine
    at = data.draw(st.integers(0, len(buf) - 1), label="at")
    masks = data.draw(st.lists(st.integers(1, 255), min_size=1, max_size=80), label="masks")
    hit_end = min(at + len(masks), len(buf))
    path = d / "probe.journal"
    path.write_bytes(buf)
    damage(path, at, bytes(masks))
    c = read_journal(path)

    rows = {r["DATE-OBS"]: r for r in c.rows}
    got = {("row", k) for k in rows} | {("tsys", t["DATE-OBS"]) for t in c.tsys} \
        | {("rfi", r["TEXT"]) for r in c.rfi} | {("note", n["TEXT"]) for n in c.notes}
    assert len(got) == len(c.rows) + len(c.tsys) + len(c.rfi) + len(c.notes)   # no doubles
    every = {(kind, key) for _, _, kind, key in spans if kind != "header"}
    assert got <= every                                                           # no inventions
    for date, r in rows.items():
        i = [make_row(j, NCHAN)["DATE-OBS"] for j in range(N_ROWS)].index(date)
        np.testing.assert_array_equal(r["DATA"], make_row(i, NCHAN)["DATA"])
    untouched = {(kind, key) for s, e, kind, key in spans
                 if kind != "header" and (e <= at or s >= hit_end)}
    assert untouched <= got                                   # nothing outside the damage lost
    header_hit = spans[0][1] > at
    if not header_hit:
        assert c.header == HEADER and c.header_note == ""
    assert c.nchan == NCHAN
    # every byte is either in a record that was used or counted as dropped
    used = sum(e - s for s, e, kind, key in spans
               if (kind == "header" and c.header_note == "" and c.header is not None)
               or (kind, key) in got)
    assert used + c.dropped_bytes == len(buf)


# -------------------------------------------------------------------------------------------
# journals that cannot be read: set aside with one line, never a failed start
# -------------------------------------------------------------------------------------------
def _deny_as_for_another_user(monkeypatch, path: pathlib.Path) -> None:
    """chmod 000 the file. Root reads it anyway, so when running as root, also make os.open
    answer for this one path what the kernel answers any other user (EACCES)."""
    path.chmod(0)
    if os.geteuid() == 0:
        real_open = os.open

        def open_(p, flags, *a, **k):
            if os.path.abspath(p) == str(path):
                raise PermissionError(errno.EACCES, os.strerror(errno.EACCES), str(p))
            return real_open(p, flags, *a, **k)
        monkeypatch.setattr(archive.os, "open", open_)


def test_unreadable_journal_is_set_aside_and_the_others_recovered(tmp_path, monkeypatch):
    build_journal(tmp_path, "good")
    locked = tmp_path / "locked.journal"
    locked.write_bytes(b"whatever it holds")
    _deny_as_for_another_user(monkeypatch, locked)
    said, report = reporter()
    assert recover(tmp_path, report=report) == [tmp_path / "good.fits"]
    assert [sev for sev, _ in said] == ["warning", "error"]    # good.journal comes first
    text = said[1][1]
    assert str(locked) in text and "Permission denied" in text
    assert "locked.journal.unreadable" in text
    aside = tmp_path / "locked.journal.unreadable"
    assert aside.exists() and not locked.exists()
    said.clear()
    assert recover(tmp_path, report=report) == [] and said == []   # not met again


def test_a_fifo_named_like_a_journal_does_not_hang_the_start(tmp_path):
    fifo = tmp_path / "pipe.journal"
    os.mkfifo(fifo)
    said, report = reporter()
    t = threading.Thread(target=recover, args=(tmp_path,), kwargs={"report": report},
                         daemon=True)
    t.start()
    t.join(timeout=30)
    assert not t.is_alive(), "recover() blocked on a FIFO"
    (sev, text), = said
    assert sev == "error" and "not a regular file but a FIFO" in text and str(fifo) in text
    assert stat.S_ISFIFO((tmp_path / "pipe.journal.unreadable").lstat().st_mode)


def test_an_io_error_while_reading_sets_the_journal_aside(tmp_path, monkeypatch):
    journal, _ = build_journal(tmp_path, "sick")
    real = pathlib.Path.read_bytes

    def read_bytes(self):        # the card answers EIO for this file, as a dying sector does
        if self == journal:
            raise OSError(errno.EIO, os.strerror(errno.EIO), str(self))
        return real(self)
    monkeypatch.setattr(pathlib.Path, "read_bytes", read_bytes)
    said, report = reporter()
    assert recover(tmp_path, report=report) == []
    (sev, text), = said
    assert sev == "error" and os.strerror(errno.EIO) in text and "sick.journal" in text
    assert (tmp_path / "sick.journal.unreadable").exists()


def test_unreadable_and_unrenamable_is_said_once_and_passed_over(tmp_path, monkeypatch):
    odd = tmp_path / "odd.journal"
    odd.mkdir()                                   # not a file: cannot be read as one
    real_rename = os.rename

    def rename(src, dst):                         # a read-only folder refuses the rename
        if os.path.abspath(src) == str(odd):
            raise OSError(errno.EROFS, os.strerror(errno.EROFS), str(src))
        return real_rename(src, dst)
    monkeypatch.setattr(archive.os, "rename", rename)
    said, report = reporter()
    assert recover(tmp_path, report=report) == []
    assert recovery.finalise_journal(odd, report=report) is None   # the store's retry path
    assert recover(tmp_path, report=report) == []
    (sev, text), = said
    assert sev == "error" and "nor rename it" in text and str(odd) in text
    assert odd.is_dir()


def _sim_cfg(out: pathlib.Path) -> dict:
    cfg = config.load(None)
    config.merge(cfg, {"sim": {"start": "2026-03-01T04:00:00", "seed": 7},
                       "pointing": {"frame": "galactic", "lon": 30.0, "lat": 0.0},
                       "spectrometer": {"integration_s": 2.5},
                       "publish": {"data": "", "control": ""},
                       "output": {"dir": str(out)}}, origin="test")
    return cfg


def test_daemon_starts_past_an_unreadable_journal(tmp_path, monkeypatch):
    out = tmp_path / "out"
    out.mkdir()
    locked = out / "scan-old.journal"
    locked.write_bytes(b"another user's scan")
    _deny_as_for_another_user(monkeypatch, locked)
    logs: list[str] = []
    d = Daemon(_sim_cfg(out), fast=True, duration_s=5.0, log=logs.append)
    result = d.run()
    (path,) = result.files
    assert len(read_scan(path)[1]) == 2
    errors = [text for sev, text in d.events if sev == "error"]
    assert len(errors) == 1 and str(locked) in errors[0]
    assert sum(str(locked) in line for line in logs) == 1


def test_cli_run_exits_0_past_an_unreadable_journal(tmp_path):
    """Through the command: a directory named like a journal (the kernel will not read it as a
    file, even for root). Exit 0, the scan saved, one line naming the journal."""
    out = tmp_path / "out"
    (out / "scan-old.journal").mkdir(parents=True)
    cfg = tmp_path / "c.toml"
    cfg.write_text('[sim]\nstart = "2026-03-01T04:00:00"\nseed = 7\n[pointing]\n'
                   'frame = "galactic"\nlon = 30.0\nlat = 0.0\n[spectrometer]\n'
                   'integration_s = 5.0\n[publish]\ndata = ""\ncontrol = ""\n')   # no ports
    r = run_cli(["run", "--config", cfg, "--fast", "--duration", "5", "--out", out])
    assert r.returncode == 0, r.stderr
    lines = [ln for ln in r.stderr.splitlines() if "scan-old.journal" in ln]
    assert len(lines) == 1, r.stderr
    assert lines[0].startswith("error: ") and "cannot read this journal" in lines[0]
    assert len(list(out.glob("*.fits"))) == 1
    assert (out / "scan-old.journal.unreadable").is_dir()
