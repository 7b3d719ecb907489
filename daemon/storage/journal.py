"""The journal of one scan: an fsync'ed append-only file of CRC-checked records, and reading it.

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
"""

from __future__ import annotations

import dataclasses
import datetime as _dt
import json
import numbers
import struct
import zlib
from collections.abc import Iterator
from pathlib import Path

import numpy as np

from spinflip.daemon.storage.columns import (
    REQUIRED_ROW_KEYS,
    RFI_SCALARS,
    ROW_SCALARS,
    TSYS_SCALARS,
    _check_header,
    _scalars,
)

MAGIC = b"SFJ\x01"
JOURNAL_FORMAT = 1
_PREFIX = struct.Struct("<4sII")       # magic, payload length, crc32
_U32 = struct.Struct("<I")
_MAX_PAYLOAD = 1 << 30                 # a length beyond this is corruption, not a record


def _encode(meta: dict, arrays: bytes = b"") -> bytes:
    """One journal record: MAGIC, length, CRC-32(length bytes + payload), payload."""
    mbytes = json.dumps(meta, separators=(",", ":"), allow_nan=True).encode("utf-8")
    payload = _U32.pack(len(mbytes)) + mbytes + arrays
    length = _U32.pack(len(payload))
    return MAGIC + length + _U32.pack(zlib.crc32(payload, zlib.crc32(length))) + payload


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
    extras: dict[str, int | float] = {}
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


def _check_body(buf: bytes, pos: int, length: int,
                crc: int) -> tuple[int, dict, memoryview] | None:
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


def _record_at(buf: bytes, pos: int) -> tuple[int, dict, memoryview] | None:
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


def _scan_records(buf: bytes) -> Iterator[tuple[int, int, dict | None, memoryview | None]]:
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


def _record_nchan(meta: dict, arrays: bytes | memoryview) -> int | None:
    """Channels a row or tsys record implies by the size of its arrays (None: cannot tell)."""
    kind = meta.get("kind")
    per = (9 if meta.get("chanexp") else 5) if kind == "row" else 4 if kind == "tsys" else 0
    if not per or len(arrays) % per or not arrays:
        return None
    return len(arrays) // per


def _salvage_header(buf: bytes, end: int, nchan: int | None) -> tuple[dict | None, bool]:
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
        head = first[2]
        if head.get("format") != JOURNAL_FORMAT:       # another format: read nothing of it
            out.torn_bytes = len(buf)
            return out
        out.scan, out.nchan, out.header = head["scan"], int(head["nchan"]), head["header"]
        out.intact_bytes = first[1]
        items = items[1:]
    elif first is not None:                            # the header record is damaged
        nchan = next((k for _s, _e, m, a in items if m is not None and a is not None
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
        if meta is None or arrays is None or out.nchan is None or not _take(out, meta, arrays):
            drop(start, end)
        else:
            out.intact_bytes = end
    out.torn_bytes = len(buf) - out.intact_bytes
    out.damaged = [(s, e - s) for s, e in gaps if e <= out.intact_bytes]
    return out


def _take(out: JournalContents, meta: dict, arrays: bytes | memoryview) -> bool:
    """Add one whole record to ``out``; False if it does not fit the scan."""
    nchan = out.nchan
    assert nchan is not None, "records are taken only once the scan's channel count is known"
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

