"""The writer thread: scans onto the disk, and what happens when the disk is full.

The DSP loop hands items (:mod:`spinflip.daemon.storage.items`) to :meth:`ScanStore.put` and
never waits for the disk:

* a :class:`~spinflip.daemon.products.row.Row`: one finished integration;
* :class:`OpenScan` / :class:`CloseScan`: a scan file begins / ends;
* :class:`TsysRecord`, :class:`RfiRecord`, :class:`Note`: a system-temperature measurement, an
  interference log record, an observer's note.

They become the file's columns here (:mod:`spinflip.daemon.storage.row_columns`).

Items are written in the order they came, each durable (journal + fsync,
:class:`spinflip.daemon.storage.archive.ScanWriter`) before the next. When a write fails (ENOSPC,
EIO, a card gone read-only) the journal is left at its last whole record, the item stays at
the head of a queue in memory, an error event says so, and every later item waits behind it,
up to ``hold_bytes`` of spectra (``output.hold_mb``): past that, new integrations are dropped,
counted, and said so, rather than the daemon running out of memory. Every ``retry_s`` the
head item is tried again; when it goes through, the held items follow in order and an info
event says writing resumed. A scan whose FITS file could not be made (the journal is whole)
is finalised at a later retry or by the recovery at the next start. No file is ever left
half-written: journals are cut back to their last whole record, FITS files are written to
a temporary name and renamed, and the temporary is removed on failure.

An item that fails for any other reason (a bug, a record the journal refuses) is dropped with an
error event and counted (``failed_items``; rows among them in ``failed_rows``), and writing goes on with the next: one bad note never stops the saving of
spectra. The thread body runs under the daemon's supervisor
(:mod:`spinflip.daemon.run.supervisor`): should it fail all the same, it runs again with its queue
and held items intact; and if it cannot, :meth:`ScanStore.finish` writes what is left from the
calling thread, so every finished integration is saved or counted as unsaved.
"""

from __future__ import annotations

import collections
import queue
import threading
import time as _time
from collections.abc import Callable
from pathlib import Path

from spinflip.daemon.products.row import Row
from spinflip.daemon.run.supervisor import one_line
from spinflip.daemon.storage import archive
from spinflip.daemon.storage.fits_file import Products
from spinflip.daemon.storage.items import (
    CloseScan,
    Item,
    Note,
    OpenScan,
    RfiRecord,
    TsysRecord,
    item_bytes,
)
from spinflip.daemon.storage.row_columns import (
    note_columns,
    rfi_columns,
    row_columns,
    tsys_columns,
)

_STOP = object()
_WHAT = {OpenScan: "the start of a scan", CloseScan: "the end of a scan",
         TsysRecord: "a system-temperature record", RfiRecord: "an interference record",
         Note: "a note"}


class ScanStore:
    """Writes scans on a thread of its own; holds them in memory while the disk refuses.

    Parameters
    ----------
    out_dir : Path
        The archive folder (exists and was writable at the start).
    nchan : int
        Channels per spectrum.
    products : callable or None
        Scan products added to each FITS file (:func:`spinflip.daemon.products.scan_average.scan_products`).
    event : callable(severity, text)
        The daemon's event log (published and logged).
    hold_bytes : int
        Most bytes of spectra held in memory while writing fails.
    retry_s : float
        Seconds between attempts while writing fails.
    on_open : callable(name) or None
        Told the name a scan was opened under (``-1``, ``-2`` ... added if it was taken).
    guard : callable(worker, body) -> target, or None
        Wraps the thread body (the daemon's :meth:`Supervisor.guard`); None: run it bare.
    """

    def __init__(self, out_dir: Path, nchan: int, products: Products | None,
                 event: Callable[[str, str], None], hold_bytes: int,
                 retry_s: float = 2.0, on_open: Callable[[str], None] | None = None,
                 guard: Callable[[str, Callable[[], None]], Callable[[], None]] | None = None):
        self.out_dir = Path(out_dir)
        self.nchan = nchan
        self.products = products
        self.event = event
        self.hold_bytes = int(hold_bytes)
        self.retry_s = float(retry_s)
        self.on_open = on_open
        self.q: queue.Queue = queue.Queue()
        self.files: list[Path] = []
        self.file_rows: dict = {}          # str(path) -> integrations in it
        self.scan_name: str | None = None   # name in use by the open scan (with -1, -2 ...)
        self.held: collections.deque = collections.deque()
        self.held_bytes = 0
        self.dropped_rows = 0
        self.unsaved_rows = 0               # rows still held when the store had to give up
        self.failed_items = 0               # items dropped because writing them raised a bug
        self.failed_rows = 0                # integrations among them
        self.error: OSError | None = None   # the write error, while writing fails
        self._unfinished: list[Path] = []   # journals whose FITS file is still to be made
        self._writer: archive.ScanWriter | None = None
        self._stopping_since: float | None = None
        self._give_up_after_s = 5.0
        self._done = False                  # the thread body saw the stop and ended
        target = guard("writer", self._run) if guard is not None else self._run
        self._thread = threading.Thread(target=target, name="writer")

    # -- the DSP loop's side -----------------------------------------------------------------
    def start(self) -> None:
        self._thread.start()

    def put(self, item: Item) -> None:
        """Queue an item for writing (never waits)."""
        if not isinstance(item, (Row, OpenScan, CloseScan, TsysRecord, RfiRecord, Note)):
            raise TypeError(f"ScanStore.put: {type(item).__name__} is not a writer item")
        self.q.put(item)

    def finish(self, give_up_after_s: float = 5.0) -> None:
        """Write what is queued, close the open scan, and end the thread. While the disk still
        refuses, keep trying for ``give_up_after_s`` s, then count what stays unsaved."""
        self._give_up_after_s = float(give_up_after_s)
        self.q.put(_STOP)
        self._thread.join()
        if not self._done:            # the thread failed for good: finish from here
            try:
                self._run()
            except Exception as exc:  # noqa: BLE001 - counted as unsaved, said in one line
                self.unsaved_rows += self.held_rows + sum(
                    1 for it in list(self.q.queue) if isinstance(it, Row))
                self.event("error", f"writing failed at the end ({one_line(exc)}): "
                           f"{self.unsaved_rows} integration(s) not saved")
                try:                  # what the journal holds becomes the FITS file
                    self._close()
                except Exception as close_exc:  # noqa: BLE001 - the journal stays for recovery
                    self.event("error", f"scan file not finished ({one_line(close_exc)}); its "
                               "journal is recovered at the next start")

    @property
    def state(self) -> str:
        """``writing``, ``holding`` (a write failed; items wait in memory) or ``failed`` (the
        writer thread is gone; the daemon is stopping)."""
        if self._thread.ident is not None and not self._thread.is_alive() and not self._done:
            return "failed"
        return "holding" if self.error is not None else "writing"

    def unsaved_text(self) -> str:
        """What could not be saved, by cause; '' when everything finished is saved."""
        parts = []
        if self.unsaved_rows:
            parts.append(f"{self.unsaved_rows} still held when the disk kept refusing "
                         f"({self.error or 'write error'})")
        if self.dropped_rows:
            parts.append(f"{self.dropped_rows} dropped at the memory bound output.hold_mb")
        if self.failed_rows:
            parts.append(f"{self.failed_rows} failed to write (see the log)")
        n = self.unsaved_rows + self.dropped_rows + self.failed_rows
        return f"{n} integration(s) could not be saved: " + ", ".join(parts) if n else ""

    @property
    def held_rows(self) -> int:
        return sum(1 for it in self.held if isinstance(it, Row))

    # -- the thread --------------------------------------------------------------------------
    def _run(self) -> None:
        while True:
            if self._stopping_since is None:
                try:
                    item = self.q.get(timeout=self.retry_s if self.error is not None else None)
                except queue.Empty:
                    item = None
                if item is _STOP:
                    self._stopping_since = _time.monotonic()
                    self.held.append(CloseScan())
                elif item is not None:
                    self._hold(item)
            self._drain()
            if self._stopping_since is not None:
                if self.error is None:
                    break
                if _time.monotonic() - self._stopping_since >= self._give_up_after_s:
                    self._give_up()
                    break
                _time.sleep(min(self.retry_s, 0.5))
        self._retry_unfinished()
        self._done = True

    def _hold(self, item: Item) -> None:
        """Queue an item behind the ones waiting; drop a row past the memory bound."""
        size = item_bytes(item)
        if self.held and isinstance(item, Row) and self.held_bytes + size > self.hold_bytes:
            self.dropped_rows += 1
            if self.dropped_rows == 1 or self.dropped_rows % 100 == 0:
                self.event("error", f"cannot write to {self.out_dir} and {self.held_bytes / 1e6:.0f}"
                           f" MB are already held (output.hold_mb): {self.dropped_rows} "
                           "integration(s) dropped so far; free space on the disk")
            return
        self.held.append(item)
        self.held_bytes += size

    def _drain(self) -> None:
        """Write held items in order until one fails."""
        while self.held:
            item = self.held[0]
            try:
                self._write(item)
            except OSError as exc:
                if self.error is None:
                    self.event("error", f"cannot write to {self.out_dir} ({exc.strerror or exc}):"
                               " writing paused; finished integrations are held in memory (up to"
                               f" {self.hold_bytes / 1e6:.0f} MB) and written when it works again")
                self.error = exc
                return
            except Exception as exc:  # noqa: BLE001 - one bad item never stops the writer
                self._failed(item, exc)
            self.held.popleft()
            self.held_bytes -= item_bytes(item)
        if self.error is not None:
            self.error = None
            self.event("info", f"writing to {self.out_dir} resumed; every held integration is "
                       "saved" + (f" ({self.dropped_rows} were dropped while memory was full)"
                                  if self.dropped_rows else ""))
            self._retry_unfinished()

    def _failed(self, item: Item, exc: Exception) -> None:
        """An item that could not be written for a reason other than the disk: dropped, counted
        and said; the items after it are written as usual."""
        self.failed_items += 1
        if isinstance(item, Row):
            self.failed_rows += 1
            what = "an integration"
        else:
            what = _WHAT.get(type(item), "a record")
        self.event("error", f"could not save {what} ({one_line(exc)}): it is dropped; writing "
                   "goes on with the next")

    def _write(self, item: Item) -> None:
        if isinstance(item, OpenScan):
            self._close()
            self._writer = archive.ScanWriter(self.out_dir, item.name, item.header, self.nchan,
                                              products=self.products)
            self.scan_name = self._writer.scan_name
            if self.on_open is not None:
                self.on_open(self.scan_name)
        elif isinstance(item, CloseScan):
            self._close()
        elif self._writer is None:                # no scan open (its start failed)
            if isinstance(item, Row):
                raise RuntimeError("no scan file is open")
            return
        elif isinstance(item, Row):
            self._writer.append(row_columns(item))
        elif isinstance(item, TsysRecord):
            self._writer.append_tsys(tsys_columns(item))
        elif isinstance(item, RfiRecord):
            self._writer.append_rfi(rfi_columns(item))
        else:
            self._writer.append_note(note_columns(item))

    def _close(self) -> None:
        w, self._writer = self._writer, None
        if w is None:
            return
        rows = w.rows
        try:
            path = w.close()
        except OSError as exc:          # the journal is whole; its FITS file comes later
            self._unfinished.append(w.journal_path)
            why = exc.strerror or exc
            self.event("warning", f"scan {w.scan_name}: FITS file not written yet ({why}); its "
                       "journal keeps every integration and it is made as soon as there is room"
                       " (or at the next start)")
            return
        if path:
            self._saved(path, rows)

    def _saved(self, path: Path, rows: int | None) -> None:
        self.files.append(path)
        if rows is not None:
            self.file_rows[str(path)] = rows

    def _retry_unfinished(self) -> None:
        """Make the FITS files that could not be made at close. A journal damaged meanwhile is
        read past its damage and kept as ``.bad``, one that can no longer be read is set aside
        (:func:`archive.finalise_journal`); either is an event, and neither is tried again."""
        for jpath in list(self._unfinished):
            try:
                rows = archive.count_rows(jpath)
            except OSError:                 # gone, or unreadable: finalise_journal says which
                rows = None
            try:
                path = archive.finalise_journal(jpath, self.products, report=self.event)
            except OSError:                 # still no room: the journal is whole, try later
                continue
            self._unfinished.remove(jpath)
            if path is not None:
                self._saved(path, rows)

    def _give_up(self) -> None:
        assert self.error is not None, "given up on only while a write keeps failing"
        self.unsaved_rows = self.held_rows
        if self.unsaved_rows:
            self.event("error", f"stopping with {self.unsaved_rows} integration(s) that could not"
                       f" be written to {self.out_dir} ({self.error.strerror or self.error})")
        self.held.clear()
        self.held_bytes = 0
        w, self._writer = self._writer, None
        if w is not None:                   # its journal is whole up to the failure
            try:
                w.close()
            except OSError:
                self._unfinished.append(w.journal_path)
