"""Crash-safe archive of one scan: an fsync'ed append-only journal, then an atomic FITS file.

While a scan runs, every finished integration is appended to ``<scan>.journal`` and made
durable (``flush`` + ``os.fsync``) before :meth:`ScanWriter.append` returns, so a power cut or
``kill -9`` loses at most the integration being written. When the scan ends,
:meth:`ScanWriter.close` turns the journal into ``<scan>.fits`` atomically and deletes the
journal; :func:`recover` does the same for journals that a crashed run left behind.

The journal's format and reading live in :mod:`~spinflip.daemon.storage.journal`, the FITS
file in :mod:`~spinflip.daemon.storage.fits_file`, crash recovery in
:mod:`~spinflip.daemon.storage.recovery`; a live writer holds an exclusive ``flock`` on its
journal, so recovery next to a live daemon in the same folder is safe.
"""

from __future__ import annotations

import dataclasses
import logging
import os
from pathlib import Path

import numpy as np

from spinflip.daemon.storage.columns import (
    RFI_SCALARS,
    TSYS_SCALARS,
    _check_header,
    _is_ascii_text,
    _scalars,
)
from spinflip.daemon.storage.durable import fsync_dir, try_lock, write_all
from spinflip.daemon.storage.fits_file import Products, _write_fits_atomic, read_scan
from spinflip.daemon.storage.journal import (
    JOURNAL_FORMAT,
    _encode,
    _row_record,
    count_rows,
    read_journal,
)
from spinflip.daemon.storage.recovery import (
    _damage_text,
    _set_aside,
    _with_history,
    finalise_journal,
    recover,
)

#: The archive as its users see it: the writer, and (from the modules that hold them) reading
#: a journal or a scan and recovering journals left by a crash.
__all__ = ["ScanWriter", "count_rows", "finalise_journal", "read_journal", "read_scan", "recover"]

log = logging.getLogger("spinflip.archive")


class ScanWriter:
    """Append-only, fsync'ed journal of one scan, turned into a FITS file on :meth:`close`.

    Parameters
    ----------
    out_dir : Path
        Folder of the archive (must exist).
    scan_name : str
        Base name of the files. If ``<scan_name>.fits`` or ``.journal`` already exists, a
        suffix ``-1``, ``-2`` ... is added so an earlier scan is never overwritten; the name in
        use is :attr:`scan_name`.
    header : dict
        Scalar header cards (SITELAT, SITELONG, SITEELEV, TELESCOP, SPECSYS, BUNIT, ...).
        ``BUNIT`` is the unit of DATA, "K" or "count" (default "K").
    nchan : int
        Channels per spectrum.

    Notes
    -----
    :meth:`append` returns only once the record is on stable storage (``os.fsync``). If a
    write fails part-way (disk full), the journal is truncated back to its last whole record
    before the error is raised, so later appends still land in a readable journal.
    """

    def __init__(self, out_dir: Path, scan_name: str, header: dict, nchan: int,
                 products: Products | None = None):
        self.products = products
        self.out_dir = Path(out_dir)
        self.nchan = int(nchan)
        if self.nchan < 1:
            raise ValueError(f"nchan = {nchan}: expected a positive number of channels")
        if not scan_name or "/" in scan_name or scan_name.startswith("."):
            raise ValueError(f"scan name {scan_name!r}: expected a plain file name")
        self.header = _check_header(header)
        self.rows = 0
        self._closed = False
        flags = os.O_WRONLY | os.O_CREAT | os.O_EXCL | os.O_APPEND | getattr(os, "O_CLOEXEC", 0)
        k = 0
        while True:
            name = scan_name if k == 0 else f"{scan_name}-{k}"
            k += 1
            if (self.out_dir / f"{name}.fits").exists():
                continue
            try:
                self._fd = os.open(self.out_dir / f"{name}.journal", flags, 0o644)
            except FileExistsError:
                continue
            break
        self.scan_name = name
        self.journal_path = self.out_dir / f"{name}.journal"
        self.fits_path = self.out_dir / f"{name}.fits"
        try_lock(self._fd)
        head = {"kind": "header", "format": JOURNAL_FORMAT, "scan": name, "nchan": self.nchan,
                "header": self.header}
        self._size = 0
        try:
            self._append_bytes(_encode(head))
            fsync_dir(self.out_dir)
        except OSError:               # disk full at the start: leave no empty journal behind
            os.close(self._fd)
            self.journal_path.unlink(missing_ok=True)
            raise

    def __repr__(self) -> str:
        return f"ScanWriter({str(self.journal_path)!r}, rows={self.rows})"

    def _append_bytes(self, rec: bytes) -> None:
        try:
            write_all(self._fd, rec)
            os.fsync(self._fd)
        except OSError:
            try:  # drop the partial record so the journal stays readable past it
                os.ftruncate(self._fd, self._size)
            except OSError:
                pass
            raise
        self._size += len(rec)

    def append(self, row: dict) -> None:
        """Write one integration to the journal; durable when this returns.

        Raises
        ------
        ValueError
            The row lacks a column, has the wrong number of channels or a non-scalar extra
            (nothing is written).
        OSError
            The write or fsync failed (the journal is left at its last whole record).
        """
        if self._closed:
            raise ValueError(f"{self.journal_path}: append after close")
        self._append_bytes(_row_record(row, self.nchan))
        self.rows += 1

    def append_note(self, rec: dict) -> None:
        """Write an observer's note (``DATE-OBS``, ``TEXT``); it becomes a HISTORY card.

        FITS header cards hold printable ASCII only (FITS 4.0, section 4.1), while the control
        socket accepts any printable text: characters beyond ASCII are kept as Python-style
        backslash escapes (``café`` -> ``caf\\xe9``), so nothing the observer wrote is lost.
        """
        if self._closed:
            raise ValueError(f"{self.journal_path}: append after close")
        text = str(rec["TEXT"]).encode("ascii", "backslashreplace").decode("ascii")
        if not _is_ascii_text(text):
            raise ValueError(f"note {text!r}: not printable")
        self._append_bytes(_encode({"kind": "note", "DATE-OBS": str(rec["DATE-OBS"]),
                                    "TEXT": text}))

    def append_rfi(self, rec: dict) -> None:
        """Write one interference log record (keys of :data:`RFI_SCALARS`); durable on return."""
        if self._closed:
            raise ValueError(f"{self.journal_path}: append after close")
        self._append_bytes(_encode({"kind": "rfi", **_scalars(rec, RFI_SCALARS, "rfi")}))

    def append_tsys(self, rec: dict) -> None:
        """Write one system-temperature measurement (keys of :data:`TSYS_SCALARS` and
        ``TSYSCHAN`` float[nchan]) to the journal; durable when this returns."""
        if self._closed:
            raise ValueError(f"{self.journal_path}: append after close")
        meta: dict = {"kind": "tsys", **_scalars(rec, TSYS_SCALARS, "tsys")}
        chan = rec.get("TSYSCHAN")
        chan = np.full(self.nchan, np.nan) if chan is None else np.asarray(chan)
        if chan.shape != (self.nchan,):
            raise ValueError(f"tsys TSYSCHAN {chan.shape}: expected ({self.nchan},)")
        self._append_bytes(_encode(meta, chan.astype("<f4").tobytes()))

    def close(self) -> Path | None:
        """Write ``<scan>.fits`` atomically from the journal and delete the journal.

        Returns
        -------
        Path or None
            The FITS file; None if the scan has no integration (then nothing is written and the
            journal is removed). A second call returns the same answer without writing.
        """
        if self._closed:
            return self.fits_path if self.fits_path.exists() and self.rows else None
        try:
            contents = read_journal(self.journal_path)
            if contents.header_note:    # the header in memory is whole: nothing of it is lost
                contents = dataclasses.replace(contents, header_note="")
            path = None
            if contents.rows:
                path = _write_fits_atomic(self.out_dir, self.scan_name,
                                          _with_history(self.header, contents),
                                          self.nchan, contents.rows, contents.tsys, self.products,
                                          contents.rfi)
            if contents.damaged or contents.header_note:   # the stored journal was damaged
                bad = _set_aside(self.journal_path, ".bad")
                log.error("scan %s: its journal was damaged on the disk: %s; %s",
                          self.scan_name, _damage_text(contents), f"the original is kept as {bad}"
                          if bad is not None else "the original could not be kept")
            else:
                self.journal_path.unlink()
            fsync_dir(self.out_dir)
        finally:
            os.close(self._fd)  # releases the flock
            self._closed = True
        return path


# ----------------------------------------------------------------------------------------------
# recovery and reading
# ----------------------------------------------------------------------------------------------
