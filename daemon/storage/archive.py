"""Crash-safe archive of one scan: an fsync'ed append-only journal, then an atomic FITS file.

While a scan runs, every finished integration is appended to ``<scan>.journal`` and made
durable (``flush`` + ``os.fsync``) before :meth:`ScanWriter.append` returns, so a power cut or
``kill -9`` loses at most the integration being written. When the scan ends,
:meth:`ScanWriter.close` turns the journal into ``<scan>.fits`` atomically and deletes the
journal; :func:`recover` does the same for journals that a crashed run left behind.

Journal format (all integers little-endian)
-------------------------------------------
A journal is a sequence of records; the first describes the scan, each later one holds one
integration::

    record  = MAGIC (4 bytes, b"SFJ\\x01")
              length  uint32   number of payload bytes
              crc     uint32   CRC-32 (zlib) of the 4 length bytes followed by the payload
              payload
    payload = meta_len uint32, meta (UTF-8 JSON, meta_len bytes)
              [row records only] DATA as float32[nchan], FLAGGED as uint8[nchan]

The header record's meta is ``{"kind": "header", "format": 1, "scan", "nchan", "header"}``;
a row record's meta is ``{"kind": "row", ...}`` with every scalar of the row. A system
temperature record (one firing of the noise source) has meta ``{"kind": "tsys", ...}`` with
its scalars (see :data:`TSYS_SCALARS`) and the per-channel T_sys as float32[nchan]. An
interference record (``{"kind": "rfi", ...}``, :data:`RFI_SCALARS`, no arrays) logs what
kind of interference was seen when. A row may carry ``CHANEXP`` (float32[nchan], the
per-channel exposure after flagging), stored after FLAGGED (meta ``"chanexp": true``).

Reading. A reader walks the records in order. Since each record is fsync'ed before the next is
begun, only the last record can be torn by a crash, and the CRC tells a torn or zero-filled
tail from a whole record (the chance that random bytes pass a CRC-32 is 2**-32). Damage in the
middle of the file (a bad sector, a failing SD card) is another matter: at a record whose
magic, length or CRC does not check out, the reader resynchronises on the next MAGIC marker
whose length and CRC-32 hold (a marker occurring by chance inside a payload fails that check)
and keeps every record after it. Bad bytes after the last good record are a torn tail, the
ordinary mark of a crash; bad bytes followed by good records are damage, and recovery then
keeps the original journal as ``<scan>.journal.bad``. If the header record is the damaged one,
its cards are used if its CRC still holds over them (only the marker was hit), read unverified
if its JSON text still parses as our header, and otherwise lost: the rows are still written,
with the channel count taken from them and the unit of DATA left unknown (no ``BUNIT``).

Atomic FITS write (common practice for crash-safe files on POSIX): write ``<scan>.fits.tmp``
in the same folder, fsync it, ``os.replace`` it onto ``<scan>.fits`` (atomic within one file
system) and fsync the folder so the rename itself is durable. Only then is the journal
removed, so at every instant either the journal or the complete FITS file holds the scan.
A journal that cannot be read at all (no permission, an I/O error, not a regular file) is
renamed to ``<scan>.journal.unreadable`` with one error line, so that it never stops a start.

A live writer holds an exclusive ``flock`` on its journal; :func:`recover` skips journals it
cannot lock, so running it next to a live daemon in the same folder is safe. The kernel drops
the lock when the writing process dies, even by ``SIGKILL``.

FITS layout
-----------
Primary HDU without data; one BINTABLE extension ``EXTNAME = 'SINGLE DISH'`` with one row per
integration. Column and keyword names follow the single-dish FITS (SDFITS) convention (Garwood
2000) and the spectral WCS keywords of FITS WCS paper III (Greisen et al. 2006): the sky
frequency of (1-based) channel ``p`` is ``CRVAL1 + (p - CRPIX1) * CDELT1``.

References
----------
Garwood, R. W. 2000, ASP Conf. Ser. 216, 243 (single-dish FITS convention).
Greisen, E. W., Calabretta, M. R., Valdes, F. G. & Allen, S. L. 2006, A&A 446, 747
(FITS WCS paper III: spectral coordinates).
Pence, W. D. et al. 2010, A&A 524, A42 (FITS standard 3.0: BINTABLE, TUNIT, HIERARCH-free
keywords of at most 8 characters).
"""

from __future__ import annotations

import dataclasses
import datetime as _dt
import json
import logging
import math
import numbers
import os
import stat
import struct
import textwrap
import zlib
from pathlib import Path

import numpy as np

try:  # POSIX advisory locks; without them recover() cannot tell a live journal from a dead one
    import fcntl
except ImportError:  # pragma: no cover - non-POSIX
    fcntl = None

log = logging.getLogger("spinflip.archive")

MAGIC = b"SFJ\x01"
JOURNAL_FORMAT = 1
EXTNAME = "SINGLE DISH"
ORIGIN = "spinflip"
_PREFIX = struct.Struct("<4sII")       # magic, payload length, crc32
_U32 = struct.Struct("<I")
_MAX_PAYLOAD = 1 << 30                 # a length beyond this is corruption, not a record

#: Scalar row columns: name -> (kind, FITS unit or None). ``kind`` "f" float, "s" string.
ROW_SCALARS = {
    "TSYS": ("f", "K"),
    "EXPOSURE": ("f", "s"),
    "DATE-OBS": ("s", None),
    "CRVAL1": ("f", "Hz"),
    "CDELT1": ("f", "Hz"),
    "CRPIX1": ("f", None),
    "CTYPE1": ("s", None),
    "RESTFREQ": ("f", "Hz"),
    "VFRAME": ("f", "m/s"),
    "GLON": ("f", "deg"),
    "GLAT": ("f", "deg"),
    "AZIMUTH": ("f", "deg"),
    "ELEVATIO": ("f", "deg"),
    "OBJECT": ("s", None),
}
#: Scalars of a system-temperature history record: name -> (kind, FITS unit or None).
TSYS_SCALARS = {
    "DATE-OBS": ("s", None),
    "TSYS": ("f", "K"),
    "TSYSSIG": ("f", "K"),
    "TSYSREF": ("f", "K"),
    "TCAL": ("f", "K"),
    "ONOFF": ("f", None),
    "NCHANUSE": ("f", None),
    "STATUS": ("s", None),
}
TSYS_EXTNAME = "TSYS HISTORY"
#: Scalars of an interference log record.
RFI_SCALARS = {
    "DATE-OBS": ("s", None),
    "KIND": ("s", None),
    "FREQ": ("f", "Hz"),
    "VALUE": ("f", None),
    "TEXT": ("s", None),
}
RFI_EXTNAME = "RFI LOG"
#: Every key a row must carry.
REQUIRED_ROW_KEYS = ("DATA", "FLAGGED", *ROW_SCALARS)
#: Units DATA may be stored in (header key ``BUNIT``).
DATA_UNITS = ("K", "count")
#: Unit of an extra column guessed from its name's suffix (LO_HZ -> Hz).
_SUFFIX_UNITS = {"_HZ": "Hz", "_K": "K", "_S": "s", "_DEG": "deg", "_MS": "m/s"}
#: Units of the extra columns the daemon writes (FITS keyword names cannot carry a suffix).
EXTRA_UNITS = {"RA": "deg", "DEC": "deg", "CRVAL1A": "m/s", "CDELT1A": "m/s", "TSYSAGE": "s",
               "CALTIME": "s", "UNKNTIME": "s"}
#: Header keywords the FITS table structure owns (indexed ones: NAXISn, TTYPEn, ...).
_STRUCTURAL_EXACT = {"SIMPLE", "XTENSION", "BITPIX", "PCOUNT", "GCOUNT", "TFIELDS", "EXTEND",
                     "THEAP", "END", "COMMENT", "HISTORY", "CONTINUE"}
_STRUCTURAL_INDEXED = ("NAXIS", "TTYPE", "TFORM", "TUNIT", "TDIM", "TNULL", "TSCAL", "TZERO",
                       "TDISP")
#: Keywords this module writes itself; a caller's header may not set them.
_OWNED = {"EXTNAME", "NMATRIX"}


def _is_structural(key: str) -> bool:
    if key in _STRUCTURAL_EXACT:
        return True
    return any(key == stem or (key.startswith(stem) and key[len(stem):].isdigit())
               for stem in _STRUCTURAL_INDEXED)


def _is_ascii_text(value: str) -> bool:
    return all(32 <= ord(c) < 127 for c in value)


# ----------------------------------------------------------------------------------------------
# small durable-file helpers
# ----------------------------------------------------------------------------------------------
def _fsync_dir(path: Path) -> None:
    """fsync a folder so that a create, rename or unlink inside it survives a power cut."""
    try:
        fd = os.open(path, os.O_RDONLY | getattr(os, "O_DIRECTORY", 0))
    except OSError:  # pragma: no cover - platforms without directory fds
        return
    try:
        os.fsync(fd)
    except OSError:  # pragma: no cover - some file systems refuse fsync on folders
        pass
    finally:
        os.close(fd)


def _write_all(fd: int, data: bytes) -> None:
    view = memoryview(data)
    while view:
        n = os.write(fd, view)
        view = view[n:]


def _try_lock(fd: int) -> bool:
    """Exclusive, non-blocking flock; True if taken (or if the platform has no flock)."""
    if fcntl is None:  # pragma: no cover
        return True
    try:
        fcntl.flock(fd, fcntl.LOCK_EX | fcntl.LOCK_NB)
    except BlockingIOError:
        return False
    return True


# ----------------------------------------------------------------------------------------------
# validation and record encoding
# ----------------------------------------------------------------------------------------------
def _plain_scalar(key: str, value, where: str):
    """A header or extra-column value as a JSON-safe bool/int/float/str, or ValueError."""
    if isinstance(value, (bool, np.bool_)):
        return bool(value)
    if isinstance(value, numbers.Integral):
        return int(value)
    if isinstance(value, numbers.Real):
        return float(value)
    if isinstance(value, str):
        return value
    raise ValueError(f"{where} {key!r}: {value!r} is not a number or string")


def _check_header(header: dict) -> dict:
    out = {}
    for key, value in header.items():
        k = str(key).upper()
        if not k or any(c not in "ABCDEFGHIJKLMNOPQRSTUVWXYZ0123456789-_" for c in k):
            raise ValueError(f"header key {key!r}: use letters, digits, '-' or '_'")
        if _is_structural(k) or k in _OWNED:
            raise ValueError(f"header key {key!r} is set by the FITS structure itself")
        v = _plain_scalar(k, value, "header key")
        if isinstance(v, str) and not _is_ascii_text(v):
            raise ValueError(f"header key {key!r}: {v!r} is not printable ASCII (FITS 3.0)")
        if isinstance(v, float) and not math.isfinite(v):
            raise ValueError(f"header key {key!r}: {v!r} cannot be written to a FITS header")
        out[k] = v
    unit = out.get("BUNIT", "K")
    if unit not in DATA_UNITS:
        raise ValueError(f"header key 'BUNIT': {unit!r}; allowed: {', '.join(DATA_UNITS)}")
    out["BUNIT"] = unit
    return out


def _encode(meta: dict, arrays: bytes = b"") -> bytes:
    """One journal record: MAGIC, length, CRC-32(length bytes + payload), payload."""
    mbytes = json.dumps(meta, separators=(",", ":"), allow_nan=True).encode("utf-8")
    payload = _U32.pack(len(mbytes)) + mbytes + arrays
    length = _U32.pack(len(payload))
    return MAGIC + length + _U32.pack(zlib.crc32(payload, zlib.crc32(length))) + payload


def _scalars(record: dict, spec: dict, what: str) -> dict:
    """The scalars ``spec`` names (name -> (kind, unit)) of ``record``, checked: "s" printable
    ASCII strings, "f" real numbers (as float); ValueError naming ``what`` and the key."""
    out = {}
    for key, (kind, _unit) in spec.items():
        value = record[key]
        if kind == "s":
            if not isinstance(value, str) or not _is_ascii_text(value):
                raise ValueError(f"{what} {key}: {value!r} is not a printable ASCII string")
            out[key] = value
        else:
            if isinstance(value, (bool, np.bool_)) or not isinstance(value, numbers.Real):
                raise ValueError(f"{what} {key}: {value!r} is not a number")
            out[key] = float(value)
    return out


def _row_record(row: dict, nchan: int) -> bytes:
    """Validate one integration and encode it as a journal record (nothing is written)."""
    missing = [k for k in REQUIRED_ROW_KEYS if k not in row]
    if missing:
        raise ValueError(f"row lacks {', '.join(missing)}")
    data = np.asarray(row["DATA"], dtype="<f4")
    flagged = np.asarray(row["FLAGGED"])
    if data.shape != (nchan,) or flagged.shape != (nchan,):
        raise ValueError(f"row DATA {data.shape} / FLAGGED {flagged.shape}: expected ({nchan},)")
    if flagged.dtype != bool:
        raise ValueError(f"row FLAGGED has dtype {flagged.dtype}; expected bool")
    meta: dict = {"kind": "row", **_scalars(row, ROW_SCALARS, "row")}
    try:
        _dt.datetime.fromisoformat(meta["DATE-OBS"])
    except ValueError:
        raise ValueError(f"row DATE-OBS: {meta['DATE-OBS']!r} is not an ISO 8601 time") from None
    arrays = data.tobytes() + flagged.astype(np.uint8).tobytes()
    if "CHANEXP" in row:
        chanexp = np.asarray(row["CHANEXP"], dtype="<f4")
        if chanexp.shape != (nchan,):
            raise ValueError(f"row CHANEXP {chanexp.shape}: expected ({nchan},)")
        meta["chanexp"] = True
        arrays += chanexp.tobytes()
    extras = {}
    for key, value in row.items():
        if key in meta or key in ("DATA", "FLAGGED", "CHANEXP"):
            continue
        if not isinstance(key, str) or not key or key.upper() != key or key == "kind":
            raise ValueError(f"row extra column {key!r}: use an upper-case name")
        if isinstance(value, (bool, np.bool_)):
            extras[key] = int(value)
        elif isinstance(value, numbers.Integral):
            extras[key] = int(value)
        elif isinstance(value, numbers.Real):
            extras[key] = float(value)
        else:
            raise ValueError(f"row extra column {key!r}: {value!r} is not a numeric scalar")
    meta["extra"] = extras
    return _encode(meta, arrays)


# ----------------------------------------------------------------------------------------------
# reading a journal
# ----------------------------------------------------------------------------------------------
@dataclasses.dataclass
class JournalContents:
    """What a journal holds: its intact records, and which bytes were not intact.

    ``torn_bytes`` are the bytes after the last usable record (a write torn by a crash, a
    zero-filled tail: ordinary after a power cut). ``damaged`` lists the stretches of bad bytes
    that are followed by good records, as (offset, number of bytes): that is not a crash but
    damage to the stored file (a bad sector, a failing card). ``header_note`` says what was done
    when the first (header) record itself was damaged ("" when it was intact); ``header`` is
    then the cards read from the damaged record, or None if they could not be read (``nchan``
    is then counted from the rows).
    """
    path: Path
    scan: str | None = None
    nchan: int | None = None
    header: dict | None = None
    rows: list = dataclasses.field(default_factory=list)
    tsys: list = dataclasses.field(default_factory=list)
    rfi: list = dataclasses.field(default_factory=list)
    notes: list = dataclasses.field(default_factory=list)
    intact_bytes: int = 0
    torn_bytes: int = 0
    damaged: list = dataclasses.field(default_factory=list)
    header_note: str = ""

    @property
    def header_ok(self) -> bool:
        return self.header is not None

    @property
    def dropped_bytes(self) -> int:
        """Bytes not used: the damaged stretches and the torn tail."""
        return self.torn_bytes + sum(n for _, n in self.damaged)


def _check_body(buf: bytes, pos: int, length: int, crc: int):
    """(end, meta, arrays) of the record at ``pos`` with this length and CRC if its payload
    checks out (sane length, CRC-32, a JSON object as meta), else None. The magic is not
    looked at."""
    start = pos + _PREFIX.size
    if length < _U32.size or length > _MAX_PAYLOAD or start + length > len(buf):
        return None
    payload = memoryview(buf)[start:start + length]   # a view: records are not copied
    if zlib.crc32(payload, zlib.crc32(_U32.pack(length))) != crc:
        return None
    (mlen,) = _U32.unpack_from(payload, 0)
    if _U32.size + mlen > length:
        return None
    try:
        meta = json.loads(bytes(payload[_U32.size:_U32.size + mlen]).decode("utf-8"))
    except (UnicodeDecodeError, ValueError):
        return None
    if not isinstance(meta, dict):
        return None
    return start + length, meta, payload[_U32.size + mlen:]


def _record_at(buf: bytes, pos: int):
    """(end, meta, arrays) of the whole record starting at ``pos``, or None."""
    if pos + _PREFIX.size > len(buf):
        return None
    magic, length, crc = _PREFIX.unpack_from(buf, pos)
    if magic != MAGIC:
        return None
    return _check_body(buf, pos, length, crc)


def _next_record(buf: bytes, pos: int) -> int:
    """Offset of the first whole record at or after ``pos`` (``len(buf)`` if none).

    A MAGIC marker can also occur by chance inside a payload (DATA is arbitrary bytes): a
    marker counts only if the length after it stays inside the file and the CRC-32 over length
    and payload holds, so a false marker is taken with probability 2**-32."""
    while True:
        q = buf.find(MAGIC, pos)
        if q < 0:
            return len(buf)
        if _record_at(buf, q) is not None:
            return q
        pos = q + 1


def _scan_records(buf: bytes):
    """Walk ``buf``: yield ``(start, end, meta, arrays)`` for each whole record and
    ``(start, end, None, None)`` for each stretch of bytes between them that is not one.

    After a bad record the walk resynchronises on the next MAGIC marker whose record checks
    out (:func:`_next_record`), so damage in the middle of a journal costs only the records it
    touches."""
    pos, n = 0, len(buf)
    while pos < n:
        rec = _record_at(buf, pos)
        if rec is not None:
            yield pos, rec[0], rec[1], rec[2]
            pos = rec[0]
        else:
            nxt = _next_record(buf, pos + 1)
            yield pos, nxt, None, None
            pos = nxt


def _record_nchan(meta: dict, arrays: bytes) -> int | None:
    """Channels a row or tsys record implies by the size of its arrays (None: cannot tell)."""
    kind = meta.get("kind")
    per = (9 if meta.get("chanexp") else 5) if kind == "row" else 4 if kind == "tsys" else 0
    if not per or len(arrays) % per or not arrays:
        return None
    return len(arrays) // per


def _salvage_header(buf: bytes, end: int, nchan: int | None):
    """Header meta from a damaged first record spanning ``buf[:end]``, and how sure it is.

    Returns (meta, verified) or (None, False). If only the marker was hit, length and CRC-32
    still check out: the meta is verified. Otherwise the JSON text is read where the record
    puts it (after marker, length, CRC and meta length: byte 16); it is used only if it parses
    as a whole JSON object of our header form, its cards pass the header checks, and its
    channel count matches the rows'. Such cards are unverified (the CRC failed)."""
    if end >= _PREFIX.size:
        _magic, length, crc = _PREFIX.unpack_from(buf, 0)
        rec = _check_body(buf[:end], 0, length, crc)
        if rec is not None and rec[0] == end:
            return rec[1], True
    text_at = _PREFIX.size + _U32.size
    try:
        meta, _ = json.JSONDecoder().raw_decode(buf[text_at:end].decode("utf-8"))
    except (UnicodeDecodeError, ValueError):
        return None, False
    try:
        ok = (isinstance(meta, dict) and meta.get("kind") == "header"
              and meta.get("format") == JOURNAL_FORMAT and isinstance(meta.get("scan"), str)
              and isinstance(meta.get("nchan"), int) and meta["nchan"] >= 1
              and (nchan is None or meta["nchan"] == nchan)
              and isinstance(meta.get("header"), dict)
              and _check_header(meta["header"]) == meta["header"])
    except ValueError:
        ok = False
    return (meta, False) if ok else (None, False)


def read_journal(path: Path) -> JournalContents:
    """Parse a journal, keeping every record whose CRC-32 holds.

    A torn tail (a crash in mid-write) is counted in ``torn_bytes``. A damaged stretch in the
    middle (a bad sector) is skipped: reading resumes at the next whole record and the stretch
    is listed in ``damaged``. Records that check out but do not fit the scan (an unknown kind,
    arrays of another size) are skipped the same way.

    Returns
    -------
    JournalContents
        ``rows`` are dicts with numpy ``DATA`` (float32) and ``FLAGGED`` (bool) and every
        scalar of the row. If the header record is damaged, ``header`` holds the cards that
        could still be read from it (or None) and ``header_note`` says so.

    Raises
    ------
    OSError
        The journal cannot be read (permissions, an I/O error).
    """
    path = Path(path)
    buf = path.read_bytes()
    out = JournalContents(path=path)
    items = list(_scan_records(buf))
    gaps: list[list[int]] = []          # [start, end) stretches not used, merged

    def drop(start: int, end: int) -> None:
        if gaps and gaps[-1][1] == start:
            gaps[-1][1] = end
        else:
            gaps.append([start, end])

    first = items[0] if items else None
    if first is not None and first[2] is not None and first[2].get("kind") == "header":
        meta = first[2]
        if meta.get("format") != JOURNAL_FORMAT:       # another format: read nothing of it
            out.torn_bytes = len(buf)
            return out
        out.scan, out.nchan, out.header = meta["scan"], int(meta["nchan"]), meta["header"]
        out.intact_bytes = first[1]
        items = items[1:]
    elif first is not None:                            # the header record is damaged
        nchan = next((k for _s, _e, m, a in items if m is not None
                      for k in [_record_nchan(m, a)] if k is not None), None)
        hdr_end = first[1] if first[2] is None else 0
        meta, verified = _salvage_header(buf, hdr_end, nchan) if hdr_end else (None, False)
        if meta is not None:
            out.scan, out.nchan, out.header = meta["scan"], int(meta["nchan"]), meta["header"]
            out.header_note = ("only the header record's marker was hit; its cards check out "
                               "and are used" if verified else "the header cards were read from "
                               "the damaged header record, unverified (its CRC-32 failed)")
        else:
            out.nchan = nchan
            out.header_note = ("the header record is lost: channels counted from the rows; "
                               "site, telescope and the unit of DATA are unknown")
        if hdr_end:
            drop(0, hdr_end)
            items = items[1:]
    for start, end, meta, arrays in items:
        if meta is None or out.nchan is None or not _take(out, meta, arrays):
            drop(start, end)
        else:
            out.intact_bytes = end
    out.torn_bytes = len(buf) - out.intact_bytes
    out.damaged = [(s, e - s) for s, e in gaps if e <= out.intact_bytes]
    return out


def _take(out: JournalContents, meta: dict, arrays: bytes) -> bool:
    """Add one whole record to ``out``; False if it does not fit the scan."""
    nchan = out.nchan
    kind = meta.get("kind")
    if kind == "tsys":
        if len(arrays) != 4 * nchan:
            return False
        rec = {k: meta[k] for k in TSYS_SCALARS if k in meta}
        rec["TSYSCHAN"] = np.frombuffer(arrays, dtype="<f4", count=nchan).astype(np.float32)
        out.tsys.append(rec)
    elif kind == "rfi":
        out.rfi.append({k: meta[k] for k in RFI_SCALARS if k in meta})
    elif kind == "note":
        out.notes.append({"DATE-OBS": meta.get("DATE-OBS", ""), "TEXT": meta.get("TEXT", "")})
    elif kind == "row":
        has_exp = bool(meta.get("chanexp"))
        if len(arrays) != (9 if has_exp else 5) * nchan or any(k not in meta
                                                                 for k in ROW_SCALARS):
            return False
        row = {k: v for k, v in meta.items() if k not in ("kind", "extra", "chanexp")}
        row.update(meta.get("extra", {}))
        row["DATA"] = np.frombuffer(arrays, dtype="<f4", count=nchan).astype(np.float32)
        row["FLAGGED"] = np.frombuffer(arrays, dtype=np.uint8, offset=4 * nchan,
                                       count=nchan) != 0
        if has_exp:
            row["CHANEXP"] = np.frombuffer(arrays, dtype="<f4", offset=5 * nchan,
                                           count=nchan).astype(np.float32)
        out.rows.append(row)
    else:
        return False
    return True


def count_rows(path: Path) -> int:
    """Number of intact integration records in a journal (a torn tail is not counted)."""
    return len(read_journal(path).rows)


# ----------------------------------------------------------------------------------------------
# FITS
# ----------------------------------------------------------------------------------------------
def _utc_now_iso() -> str:
    return _dt.datetime.now(_dt.timezone.utc).replace(tzinfo=None).isoformat(timespec="seconds")


def _scalar_columns(records: list, spec: dict) -> list:
    """FITS columns of the scalars ``spec`` names (name -> (kind, unit)) over ``records``."""
    from astropy.io import fits

    cols = []
    for key, (kind, unit) in spec.items():
        if kind == "s":
            values = [str(r.get(key, "")) for r in records]
            width = max(8, max(len(v) for v in values))
            cols.append(fits.Column(name=key, format=f"{width}A", array=np.array(values)))
        else:
            cols.append(fits.Column(name=key, format="D", unit=unit, array=np.array(
                [float(r.get(key, np.nan)) for r in records], dtype=np.float64)))
    return cols


def _with_notes(header: dict, notes: list) -> dict:
    """The header with the observer's notes attached (written as HISTORY cards)."""
    return dict(header, _NOTES=[f"{n['DATE-OBS']} {n['TEXT']}" for n in notes]) if notes else header


def _rfi_hdu(rfi: list):
    """The RFI LOG BINTABLE: what kind of interference was seen when."""
    from astropy.io import fits

    hdu = fits.BinTableHDU.from_columns(_scalar_columns(rfi, RFI_SCALARS), nrows=len(rfi))
    hdu.header["EXTNAME"] = (RFI_EXTNAME, "interference seen, by kind and time")
    hdu.header["COMMENT"] = ("KIND carrier-on/carrier-off (FREQ sky Hz, VALUE excess in sigma, "
                             "NaN if removed by SK), impulses (VALUE count), sk (VALUE fraction)")
    return hdu


def _tsys_hdu(tsys: list, nchan: int):
    """The TSYS HISTORY BINTABLE: one row per firing of the noise source."""
    from astropy.io import fits

    cols = _scalar_columns(tsys, TSYS_SCALARS)
    cols.append(fits.Column(name="TSYSCHAN", format=f"{nchan}E", unit="K",
                            array=np.stack([r["TSYSCHAN"] for r in tsys]).astype(np.float32)))
    hdu = fits.BinTableHDU.from_columns(cols, nrows=len(tsys))
    hdu.header["EXTNAME"] = (TSYS_EXTNAME, "system temperature from the noise source")
    hdu.header["COMMENT"] = ("TSYS = TCAL sum(Poff) / sum(Pon - Poff) over line-free channels, "
                             "mean of both switching phases; TSYSCHAN per channel, signal phase")
    return hdu


def _build_hdul(header: dict, nchan: int, rows: list, tsys: list | None = None,
                products=None, rfi: list | None = None):
    """The FITS HDU list of one scan: empty primary HDU, the SINGLE DISH BINTABLE, then the
    TSYS HISTORY table (if the noise source fired) and any HDUs ``products(header, nchan, rows)``
    returns (derived products, e.g. the baselined scan average)."""
    from astropy.io import fits

    now = _utc_now_iso()
    bunit = header.get("BUNIT", "K")
    n = len(rows)
    cols = [
        fits.Column(name="DATA", format=f"{nchan}E", unit=bunit,
                    array=np.stack([r["DATA"] for r in rows]).astype(np.float32)),
        fits.Column(name="FLAGGED", format=f"{nchan}L",
                    array=np.stack([r["FLAGGED"] for r in rows]).astype(bool)),
    ]
    if all("CHANEXP" in r for r in rows):
        cols.append(fits.Column(name="CHANEXP", format=f"{nchan}E", unit="s",
                                array=np.stack([r["CHANEXP"] for r in rows]).astype(np.float32)))
    for key, (kind, unit) in ROW_SCALARS.items():
        if kind == "s":
            values = [r[key] for r in rows]
            width = max(8, max(len(v) for v in values))
            cols.append(fits.Column(name=key, format=f"{width}A", array=np.array(values)))
        else:
            cols.append(fits.Column(name=key, format="D", unit=unit,
                                    array=np.array([r[key] for r in rows], dtype=np.float64)))
    standard = set(REQUIRED_ROW_KEYS) | {"CHANEXP"}
    extra_keys: list[str] = []
    for r in rows:
        for k in r:
            if k not in standard and k not in extra_keys:
                extra_keys.append(k)
    for key in extra_keys:
        values = [r.get(key) for r in rows]
        unit = EXTRA_UNITS.get(key) or next(
            (u for suf, u in _SUFFIX_UNITS.items() if key.endswith(suf)), None)
        if all(isinstance(v, int) for v in values):  # every row has it, all integers
            cols.append(fits.Column(name=key, format="K", unit=unit,
                                    array=np.array(values, dtype=np.int64)))
        else:  # a float column, NaN where a row lacks the value
            arr = np.array([np.nan if v is None else float(v) for v in values], dtype=np.float64)
            cols.append(fits.Column(name=key, format="D", unit=unit, array=arr))

    table = fits.BinTableHDU.from_columns(cols, nrows=n)
    th = table.header
    th["EXTNAME"] = (EXTNAME, "single-dish FITS convention")
    th["EXTVER"] = (int(header.get("EXTVER", 1)), "version of this extension")
    th["NMATRIX"] = (1, "one DATA matrix column")
    th["ORIGIN"] = (ORIGIN, "program that wrote this file")
    th["DATE"] = (now, "UTC time this file was written")
    th["TELESCOP"] = (str(header.get("TELESCOP", "")), "telescope")
    comments = {"SITELAT": "site latitude, deg", "SITELONG": "site east longitude, deg",
                "SITEELEV": "site height above the ellipsoid, m",
                "SPECSYS": "frame of the frequency axis (CRVAL1, CDELT1)",
                "BUNIT": "unit of DATA", "OBSERVER": "observer"}
    for note in header.get("_NOTES", []):
        th.add_history(f"note {note}")
    for line in header.get("_HISTORY", []):
        th.add_history(line)
    for key, value in header.items():
        if key in ("EXTVER", "TELESCOP", "DATE", "ORIGIN", "_NOTES", "_HISTORY") or value is None:
            continue
        card_key = key if len(key) <= 8 else f"HIERARCH {key}"
        th[card_key] = (value, comments.get(key, ""))
    primary = fits.PrimaryHDU()
    primary.header["ORIGIN"] = (ORIGIN, "program that wrote this file")
    primary.header["DATE"] = (now, "UTC time this file was written")
    primary.header["TELESCOP"] = (str(header.get("TELESCOP", "")), "telescope")
    hdus = [primary, table]
    if tsys:
        hdus.append(_tsys_hdu(tsys, nchan))
    if rfi:
        hdus.append(_rfi_hdu(rfi))
    if products is not None:
        try:
            hdus.extend(products(header, nchan, rows))
        except Exception as exc:  # a derived product must never cost the measured data
            log.error("derived products not written: %s", exc)
    return fits.HDUList(hdus)


def _write_fits_atomic(out_dir: Path, scan: str, header: dict, nchan: int, rows: list,
                       tsys: list | None = None, products=None, rfi: list | None = None) -> Path:
    """Write ``<scan>.fits`` via ``<scan>.fits.tmp`` + fsync + os.replace + fsync(folder)."""
    final = out_dir / f"{scan}.fits"
    tmp = out_dir / f"{scan}.fits.tmp"
    hdul = _build_hdul(header, nchan, rows, tsys, products, rfi)
    try:
        with open(tmp, "wb") as fh:  # "wb" truncates a .tmp a crashed run may have left
            hdul.writeto(fh)
            fh.flush()
            os.fsync(fh.fileno())
    except BaseException:            # disk full and the like: no half-written file stays
        tmp.unlink(missing_ok=True)
        raise
    os.replace(tmp, final)
    _fsync_dir(out_dir)
    return final


# ----------------------------------------------------------------------------------------------
# the writer
# ----------------------------------------------------------------------------------------------
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

    def __init__(self, out_dir: Path, scan_name: str, header: dict, nchan: int, products=None):
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
        _try_lock(self._fd)
        head = {"kind": "header", "format": JOURNAL_FORMAT, "scan": name, "nchan": self.nchan,
                "header": self.header}
        self._size = 0
        try:
            self._append_bytes(_encode(head))
            _fsync_dir(self.out_dir)
        except OSError:               # disk full at the start: leave no empty journal behind
            os.close(self._fd)
            self.journal_path.unlink(missing_ok=True)
            raise

    def __repr__(self) -> str:
        return f"ScanWriter({str(self.journal_path)!r}, rows={self.rows})"

    def _append_bytes(self, rec: bytes) -> None:
        try:
            _write_all(self._fd, rec)
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
            _fsync_dir(self.out_dir)
        finally:
            os.close(self._fd)  # releases the flock
            self._closed = True
        return path


# ----------------------------------------------------------------------------------------------
# recovery and reading
# ----------------------------------------------------------------------------------------------
#: Unreadable journals that could not be renamed either: passed over for the rest of this
#: process, so a retry loop does not hit (and report) them again and again.
_PASSED_OVER: set[str] = set()


def _say(report, severity: str, text: str) -> None:
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
    _fsync_dir(jpath.parent)
    return aside


def _set_aside_unreadable(jpath: Path, why: str, report) -> None:
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


def recover(out_dir: Path, products=None, report=None) -> list[Path]:
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


def finalise_journal(jpath: Path, products=None, report=None) -> Path | None:
    """Turn one unlocked journal into its FITS file (as :func:`recover` does for each).

    Returns the FITS file, or None when there was nothing to write, a running writer holds
    the journal, or it could not be read (then it is set aside as :func:`recover` does, and
    ``report`` is told). Raises OSError when writing fails (disk full): the journal is kept.
    """
    return _finalise_path(Path(jpath), products, report)


def _finalise_path(jpath: Path, products, report) -> Path | None:
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
        if not _try_lock(fd):
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


def _finalise_locked(jpath: Path, products=None, report=None) -> Path | None:
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
        _fsync_dir(out_dir)
        return None
    header = contents.header if contents.header is not None else {"BUNIT": None}
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
    _fsync_dir(out_dir)
    return path


def read_scan(path: Path):
    """Read a scan written by this module.

    Returns
    -------
    header : dict
        The SINGLE DISH extension's keywords, without the table-structure ones.
    table : astropy.table.Table
        One row per integration; columns carry their FITS units (``table["TSYS"].unit``).
    """
    from astropy.io import fits
    from astropy.table import Table

    with fits.open(path, memmap=False) as hdul:
        hdr = hdul[EXTNAME].header
        header = {k: v for k, v in hdr.items() if k and not _is_structural(k)}
    table = Table.read(path, hdu=EXTNAME, format="fits", memmap=False,
                       character_as_bytes=False)
    return header, table
