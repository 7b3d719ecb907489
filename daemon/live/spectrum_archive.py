"""The archive of ``spinflip collect``: every integration of each station, durable on disk.

Per station and UTC day (the day of the spectrum's ``time_utc``) two files in
``DIR/NAME/``::

    spectra-YYYYMMDD.bin     the payload frames of each spectrum, back to back, exactly as on
                             the wire (little-endian arrays, C order)
    spectra-YYYYMMDD.jsonl   one line per spectrum, a UTF-8 JSON object:
        {"bin_offset": int,    where its payload starts in the .bin file, bytes
         "bin_bytes": int,     payload length, bytes (sum over header.arrays)
         "crc32": int,         CRC-32 (zlib) of those payload bytes
         "received_utc": str,  when the collector received it (ISO 8601, Z)
         "header": {...}}      the relayed wire header (station filled in)

A spectrum that repeats the last one archived for its station (same ``scan``, ``kind``,
``row`` and ``time_utc``; a daemon re-sends its latest message to a subscriber that joins or
reconnects) is not archived again, also across a restart of the collector.

The wire schema therefore describes the archive too: the arrays of a line are its
``header["arrays"]``, in order, starting at ``bin_offset``. :func:`read_spectra` reads a
day file back into :class:`~spinflip.daemon.live.schema.Message` objects.

Crash safety: each spectrum is made durable before the next is read. Its payload is
appended to the ``.bin`` file and fsync'ed, then its line is appended to the ``.jsonl``
file and fsync'ed; so a line exists only for payload already on disk. A crash can leave
(a) payload bytes at the end of the ``.bin`` that no line refers to, harmless since offsets
are absolute, and (b) a last ``.jsonl`` line without its newline, which a reader ignores and
the next writer cuts off before appending. A writer holds an exclusive ``flock`` on the
``.jsonl`` file, so two collectors cannot write one archive. (Append + fsync per record and
write-ahead ordering of data before index: common practice for crash-safe logs on POSIX.)
"""

from __future__ import annotations

import datetime as _dt
import json
import math
import os
import zlib
from pathlib import Path

import numpy as np

from spinflip.daemon.live import schema
from spinflip.daemon.storage.durable import fsync_dir, write_all

try:  # POSIX advisory locks
    import fcntl
except ImportError:  # pragma: no cover - non-POSIX
    fcntl = None  # type: ignore[assignment]  # the module is absent; callers test for None


def _spectrum_key(header: dict) -> tuple:
    """What makes a spectrum the same spectrum again (a daemon re-sends its latest message to
    a new or reconnected subscriber)."""
    return (header["scan"], header["kind"], header["row"], header["time_utc"])


def _utc_day(time_utc: str) -> str:
    t = _dt.datetime.fromisoformat(time_utc).astimezone(_dt.UTC)
    return t.strftime("%Y%m%d")


class _DayFiles:
    """The open ``.bin`` / ``.jsonl`` pair of one station and day (locked, torn tail cut)."""

    def __init__(self, folder: Path, day: str):
        self.last_key: tuple | None = None
        self.index_path = folder / f"spectra-{day}.jsonl"
        self.bin_path = folder / f"spectra-{day}.bin"
        created = not self.index_path.exists() or not self.bin_path.exists()
        self.index_fd = os.open(self.index_path, os.O_RDWR | os.O_CREAT, 0o644)
        try:
            if fcntl is not None:
                try:
                    fcntl.flock(self.index_fd, fcntl.LOCK_EX | fcntl.LOCK_NB)
                except BlockingIOError:
                    raise ValueError(f"archive {self.index_path} is being written by another "
                                     "spinflip collect: give another --archive") from None
            self._cut_torn_tail()
            self.bin_fd = os.open(self.bin_path, os.O_WRONLY | os.O_CREAT | os.O_APPEND, 0o644)
        except BaseException:
            os.close(self.index_fd)
            raise
        if created:
            fsync_dir(folder)

    def _cut_torn_tail(self) -> None:
        """Drop a last line that a crash left without its newline."""
        size = os.lseek(self.index_fd, 0, os.SEEK_END)
        if size == 0:
            return
        keep, pos = 0, size
        while pos > 0:                       # find the last newline, reading backwards
            step = min(65536, pos)
            pos -= step
            chunk = os.pread(self.index_fd, step, pos)
            i = chunk.rfind(b"\n")
            if i >= 0:
                keep = pos + i + 1
                break
        if keep != size:
            os.ftruncate(self.index_fd, keep)
            os.fsync(self.index_fd)
        os.lseek(self.index_fd, keep, os.SEEK_SET)
        if keep:                             # the last whole line: what was archived last
            start = keep - 1
            while start > 0:
                step = min(65536, start)
                chunk = os.pread(self.index_fd, step, start - step)
                i = chunk.rfind(b"\n")
                if i >= 0:
                    start = start - step + i + 1
                    break
                start -= step
            try:
                self.last_key = _spectrum_key(
                    json.loads(os.pread(self.index_fd, keep - start, start))["header"])
            except (ValueError, KeyError, TypeError):
                pass

    def append(self, header_json: bytes, payload: list[bytes], received_utc: str) -> None:
        blob = b"".join(payload)
        offset = os.lseek(self.bin_fd, 0, os.SEEK_END)
        write_all(self.bin_fd, blob)
        os.fsync(self.bin_fd)
        line = (b'{"bin_offset":%d,"bin_bytes":%d,"crc32":%d,"received_utc":%s,"header":'
                % (offset, len(blob), zlib.crc32(blob), json.dumps(received_utc).encode())
                + header_json + b"}\n")
        write_all(self.index_fd, line)
        os.fsync(self.index_fd)

    def close(self) -> None:
        os.close(self.bin_fd)
        os.close(self.index_fd)         # releases the flock


class SpectrumArchive:
    """Append-only, fsync'ed archive of relayed spectra, one folder per station.

    Parameters
    ----------
    folder : Path
        The archive's root; station NAME writes ``folder/NAME/spectra-YYYYMMDD.{bin,jsonl}``
        (see the module docstring for the format).

    Notes
    -----
    :meth:`append` returns once the spectrum is on stable storage. OSError (disk full, I/O
    error) propagates: a collector that cannot archive stops rather than drop data quietly.
    """

    def __init__(self, folder: Path):
        self.folder = Path(folder)
        self.folder.mkdir(parents=True, exist_ok=True)
        self._open: dict[str, tuple[str, _DayFiles]] = {}
        self._last: dict[str, tuple] = {}

    def append(self, station: str, frames: list[bytes]) -> Path | None:
        """Append one encoded spectrum (``schema.encode`` frames).

        Returns the ``.jsonl`` path, or None when the spectrum repeats the last one archived
        for ``station`` (same scan, kind, row and time_utc): a station re-sends its latest
        message when the collector (re)subscribes, and the archive keeps each spectrum once.
        """
        header = json.loads(frames[1])
        day = _utc_day(header["time_utc"])
        current = self._open.get(station)
        if current is None or current[0] != day:
            if current is not None:
                current[1].close()
                del self._open[station]
            folder = self.folder / station
            if not folder.exists():
                folder.mkdir()
                fsync_dir(self.folder)
            current = (day, _DayFiles(folder, day))
            self._open[station] = current
            if current[1].last_key is not None:
                self._last[station] = current[1].last_key
        key = _spectrum_key(header)
        if self._last.get(station) == key:
            return None
        self._last[station] = key
        current[1].append(bytes(frames[1]), [bytes(f) for f in frames[2:]],
                          schema.now_utc_iso())
        return current[1].index_path

    def close(self) -> None:
        for _day, files in self._open.values():
            files.close()
        self._open.clear()


def read_spectra(index_path: Path) -> list[schema.Message]:
    """Read one archive day file back (``spectra-YYYYMMDD.jsonl`` and its ``.bin``).

    Parameters
    ----------
    index_path : Path
        The ``.jsonl`` file; the ``.bin`` file beside it holds the payloads.

    Returns
    -------
    list[schema.Message]
        The spectra in the order they were archived, each checked against the wire schema.
        A last line without its newline (a crash while writing it) is skipped.

    Raises
    ------
    ValueError
        A whole line that is not JSON, or whose payload is missing or fails its CRC.
    """
    index_path = Path(index_path)
    bin_path = index_path.with_suffix(".bin")
    raw = index_path.read_bytes()
    lines = raw.split(b"\n")[:-1]            # the part after the last newline is torn or empty
    out = []
    with open(bin_path, "rb") as fh:
        for n, line in enumerate(lines, start=1):
            try:
                rec = json.loads(line)
                offset, nbytes, crc = rec["bin_offset"], rec["bin_bytes"], rec["crc32"]
                header = rec["header"]
            except (ValueError, KeyError, TypeError):
                raise ValueError(f"{index_path} line {n} is not an archive record") from None
            fh.seek(offset)
            blob = fh.read(nbytes)
            if len(blob) != nbytes or zlib.crc32(blob) != crc:
                raise ValueError(f"{index_path} line {n}: payload at byte {offset} of "
                                 f"{bin_path.name} is missing or fails its CRC")
            frames = [header["topic"].encode("ascii"), json.dumps(header).encode("utf-8")]
            pos = 0
            for d in header["arrays"]:
                itemsize = np.dtype(d["dtype"]).itemsize if d["dtype"] in schema.DTYPES else 0
                size = math.prod(d["shape"]) * itemsize
                frames.append(blob[pos:pos + size])
                pos += size
            out.append(schema.decode(frames))
    return out
