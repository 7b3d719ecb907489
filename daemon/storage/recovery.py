"""Crash recovery: journals a crashed run left behind become their FITS files.

A journal that cannot be read at all (no permission, an I/O error, not a regular file) is
renamed to ``<scan>.journal.unreadable`` with one error line, so that it never stops a start.

A live writer holds an exclusive ``flock`` on its journal; :func:`recover` skips journals it
cannot lock, so running it next to a live daemon in the same folder is safe. The kernel drops
the lock when the writing process dies, even by ``SIGKILL``.
"""

from __future__ import annotations

import logging
import os
import stat
import textwrap
from collections.abc import Callable
from pathlib import Path

from spinflip.daemon.storage.durable import fsync_dir, try_lock
from spinflip.daemon.storage.fits_file import Products, _with_notes, _write_fits_atomic
from spinflip.daemon.storage.journal import JournalContents, read_journal

log = logging.getLogger("spinflip.archive")

#: Where recovery says what it did: ``report(severity, text)``, severity "info", "warning" or
#: "error" (the daemon's event log); None: the log.
Report = Callable[[str, str], None]

#: Unreadable journals that could not be renamed either: passed over for the rest of this
#: process, so a retry loop does not hit (and report) them again and again.
_PASSED_OVER: set[str] = set()


def _say(report: Report | None, severity: str, text: str) -> None:
    """Tell ``report(severity, text)`` if given, else log ``text`` at that severity."""
    if report is not None:
        report(severity, text)
    else:
        log.log({"info": logging.INFO, "warning": logging.WARNING}.get(severity, logging.ERROR),
                "%s", text)


def _set_aside(jpath: Path, suffix: str) -> Path | None:
    """Rename ``jpath`` to ``<name><suffix>`` beside it (``-1``, ``-2`` ... added if taken, so
    nothing is overwritten); the new path, or None if renaming failed."""
    aside = jpath.with_name(jpath.name + suffix)
    k = 0
    while os.path.lexists(aside):
        k += 1
        aside = jpath.with_name(f"{jpath.name}{suffix}-{k}")
    try:
        os.rename(jpath, aside)
    except OSError:
        return None
    fsync_dir(jpath.parent)
    return aside


def _set_aside_unreadable(jpath: Path, why: str, report: Report | None) -> None:
    """One error line for a journal that cannot be read; it is renamed to ``.unreadable`` so
    that later starts go past it, or, if even that fails, passed over in this process."""
    aside = _set_aside(jpath, ".unreadable")
    if aside is not None:
        _say(report, "error", f"{jpath}: cannot read this journal ({why}); set aside as "
             f"{aside.name} and not recovered")
    else:
        _PASSED_OVER.add(os.path.abspath(jpath))
        _say(report, "error", f"{jpath}: cannot read this journal ({why}) nor rename it; left "
             "as it is and passed over")


def _why(exc: OSError) -> str:
    return exc.strerror or str(exc)


class _Unreadable(Exception):
    """The journal could be opened but not read (an I/O error)."""


def _damage_text(contents: JournalContents) -> str:
    """What was dropped from a damaged journal, in words, e.g. ``dropped 685 bytes (685
    damaged bytes at byte 2738)``."""
    parts = [f"{n} damaged bytes at byte {at}" for at, n in contents.damaged]
    if contents.torn_bytes:
        parts.append(f"{contents.torn_bytes} torn bytes at the end")
    text = f"dropped {contents.dropped_bytes} bytes ({', '.join(parts)})"
    if contents.header_note:
        text += f"; {contents.header_note}"
    return text


def _with_history(header: dict, contents: JournalContents) -> dict:
    """The header with the observer's notes and, for a damaged journal, HISTORY cards saying
    what was dropped."""
    header = _with_notes(header, contents.notes)
    if contents.damaged or contents.header_note:
        text = f"recovered from a damaged journal: {_damage_text(contents)}"
        header = dict(header, _HISTORY=textwrap.wrap(text, 70))   # a HISTORY card holds 72
    return header


def recover(out_dir: Path, products: Products | None = None,
            report: Report | None = None) -> list[Path]:
    """Turn every journal a crashed run left in ``out_dir`` into its FITS file.

    For each ``*.journal`` not locked by a live writer, its intact records become
    ``<scan>.fits`` (written atomically, as :meth:`ScanWriter.close` does):

    * torn trailing bytes (a crash in mid-write) are dropped and said so, and the journal is
      removed;
    * a damaged stretch followed by good records (a bad sector) is skipped, every record after
      it whose CRC-32 holds is kept, and the journal is renamed to ``*.journal.bad`` (kept for
      inspection, never deleted or overwritten); the FITS file says what was dropped in HISTORY
      cards. If the header record is the damaged one, the rows are still written: with the
      header cards read from it if they can be, else without them (the unit of DATA unknown);
    * a journal with a header but no rows is removed and nothing is written;
    * a journal that cannot be read at all (permissions, an I/O error, not a regular file) is
      renamed to ``*.journal.unreadable``, or, if renaming fails too, passed over for the rest
      of this process; either way with one error line, and recovery goes on.

    Stray ``*.fits.tmp`` files of a crashed FITS write are removed.

    Parameters
    ----------
    out_dir : Path
        The archive folder.
    products : callable or None
        Derived products added to each FITS file (see :class:`ScanWriter`).
    report : callable(severity, text) or None
        Told each message (severity ``"info"``, ``"warning"`` or ``"error"``, one line of
        text); without it the messages go to this module's logger.

    Returns
    -------
    list of Path
        The FITS files written.
    """
    out_dir = Path(out_dir)
    written: list[Path] = []
    for jpath in sorted(out_dir.glob("*.journal")):
        try:
            path = _finalise_path(jpath, products, report)
        except OSError as exc:   # disk full: the journal stays, a later start retries
            _say(report, "warning", f"{jpath}: not turned into FITS yet ({_why(exc)}); the "
                 "journal is kept")
            continue
        if path is not None:
            written.append(path)
    for tmp in sorted(out_dir.glob("*.fits.tmp")):
        scan = tmp.name[: -len(".fits.tmp")]
        if (out_dir / f"{scan}.journal").exists():  # a live writer is closing this scan
            continue
        tmp.unlink(missing_ok=True)
        log.warning("removed %s, left by an interrupted FITS write", tmp)
    return written


def finalise_journal(jpath: Path, products: Products | None = None,
                     report: Report | None = None) -> Path | None:
    """Turn one unlocked journal into its FITS file (as :func:`recover` does for each).

    Returns the FITS file, or None when there was nothing to write, a running writer holds
    the journal, or it could not be read (then it is set aside as :func:`recover` does, and
    ``report`` is told). Raises OSError when writing fails (disk full): the journal is kept.
    """
    return _finalise_path(Path(jpath), products, report)


def _finalise_path(jpath: Path, products: Products | None,
                   report: Report | None) -> Path | None:
    """Open and lock one journal, then :func:`_finalise_locked`; see :func:`recover`."""
    if os.path.abspath(jpath) in _PASSED_OVER:
        return None
    try:  # read-only and non-blocking: a FIFO named like a journal must not hang the start
        fd = os.open(jpath, os.O_RDONLY | os.O_NONBLOCK | getattr(os, "O_CLOEXEC", 0))
    except FileNotFoundError:  # a live writer finished meanwhile
        return None
    except OSError as exc:     # no permission, an I/O error, ...
        _set_aside_unreadable(jpath, _why(exc), report)
        return None
    try:
        mode = os.fstat(fd).st_mode
        if not stat.S_ISREG(mode):
            what = ("a directory" if stat.S_ISDIR(mode) else "a FIFO" if stat.S_ISFIFO(mode)
                    else "a socket" if stat.S_ISSOCK(mode) else "a device")
            _set_aside_unreadable(jpath, f"not a regular file but {what}", report)
            return None
        if not try_lock(fd):
            log.info("%s: in use by a running writer; left alone", jpath)
            return None
        if not jpath.exists():  # closed and unlinked between glob and lock
            return None
        try:
            return _finalise_locked(jpath, products, report)
        except _Unreadable as exc:
            _set_aside_unreadable(jpath, str(exc), report)
            return None
    finally:
        os.close(fd)


def _finalise_locked(jpath: Path, products: Products | None = None,
                     report: Report | None = None) -> Path | None:
    """Journal (locked by the caller) -> FITS, then remove the journal (or keep it as
    ``.bad`` if it was damaged); see :func:`recover`."""
    out_dir = jpath.parent
    try:
        contents = read_journal(jpath)
    except FileNotFoundError:
        return None
    except OSError as exc:
        raise _Unreadable(_why(exc)) from exc
    scan = jpath.name[: -len(".journal")]
    damaged = bool(contents.damaged or contents.header_note)
    if not contents.rows:
        if not contents.header_ok and contents.torn_bytes == 0:  # crash right after creating it
            jpath.unlink()
        elif not contents.header_ok or damaged:
            bad = _set_aside(jpath, ".bad")
            where = f"kept as {bad}" if bad is not None else "left in place (cannot rename it)"
            _say(report, "warning", f"{jpath}: damaged and no integration in it is intact "
                 f"({contents.dropped_bytes} bytes); {where}")
        else:
            _say(report, "warning", f"interrupted scan {scan} had no integration; removed its "
                 f"journal (dropped {contents.torn_bytes} torn bytes)")
            jpath.unlink()
        fsync_dir(out_dir)
        return None
    header = contents.header if contents.header is not None else {"BUNIT": None}
    assert contents.nchan is not None, "a journal's rows are read only once its channels are known"
    path = _write_fits_atomic(out_dir, scan, _with_history(header, contents), contents.nchan,
                              contents.rows, contents.tsys, products, contents.rfi)
    n = len(contents.rows)
    if damaged:
        bad = _set_aside(jpath, ".bad")
        if bad is None:   # keep it rather than lose the evidence; a later start does it again
            kept = "the original could not be renamed and stays"
        else:
            kept = f"the original is kept as {bad.name}"
        _say(report, "error", f"recovered {n} integrations of interrupted scan {scan} into "
             f"{path}, but its journal was damaged: {_damage_text(contents)}; {kept}")
    else:
        _say(report, "warning", f"recovered {n} integrations of interrupted scan {scan} into "
             f"{path}; dropped {contents.torn_bytes} torn bytes")
        jpath.unlink()
    fsync_dir(out_dir)
    return path

