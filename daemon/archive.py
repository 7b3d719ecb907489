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
per-channel exposure after flagging), stored after FLAGGED (meta ``"chanexp": true``). A reader walks
the records in order and stops at the first one whose magic, length or CRC does not check
out: since each record is fsync'ed before the next is begun, only the last record can be torn
by a crash, and the CRC tells a torn or zero-filled tail from a whole record (the chance that
random bytes pass a CRC-32 is 2**-32).

Atomic FITS write (common practice for crash-safe files on POSIX): write ``<scan>.fits.tmp``
in the same folder, fsync it, ``os.replace`` it onto ``<scan>.fits`` (atomic within one file
system) and fsync the folder so the rename itself is durable. Only then is the journal
removed, so at every instant either the journal or the complete FITS file holds the scan.

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

import datetime as _dt
import json
import logging
import math
import numbers
import os
import struct
import zlib
from dataclasses import dataclass, field
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
@dataclass
class JournalContents:
    """What a journal holds: its intact records and how many trailing bytes were not intact."""
    path: Path
    scan: str | None = None
    nchan: int | None = None
    header: dict | None = None
    rows: list = field(default_factory=list)
    tsys: list = field(default_factory=list)
    rfi: list = field(default_factory=list)
    notes: list = field(default_factory=list)
    intact_bytes: int = 0
    torn_bytes: int = 0

    @property
    def header_ok(self) -> bool:
        return self.header is not None


def _records(buf: bytes):
    """Yield (end_offset, meta, array_bytes) for each intact record from the start of ``buf``."""
    pos = 0
    n = len(buf)
    while pos + _PREFIX.size <= n:
        magic, length, crc = _PREFIX.unpack_from(buf, pos)
        start = pos + _PREFIX.size
        if magic != MAGIC or length < _U32.size or length > _MAX_PAYLOAD or start + length > n:
            return
        payload = buf[start:start + length]
        if zlib.crc32(payload, zlib.crc32(_U32.pack(length))) != crc:
            return
        (mlen,) = _U32.unpack_from(payload, 0)
        if _U32.size + mlen > length:
            return
        try:
            meta = json.loads(payload[_U32.size:_U32.size + mlen].decode("utf-8"))
        except (UnicodeDecodeError, ValueError):
            return
        yield start + length, meta, payload[_U32.size + mlen:]
        pos = start + length


def read_journal(path: Path) -> JournalContents:
    """Parse a journal; stop at the first record that is not whole (a torn tail).

    Returns
    -------
    JournalContents
        ``header`` is None if even the first (header) record is not intact. ``rows`` are dicts
        with numpy ``DATA`` (float32) and ``FLAGGED`` (bool) and every scalar of the row.
    """
    path = Path(path)
    buf = path.read_bytes()
    out = JournalContents(path=path)
    for end, meta, arrays in _records(buf):
        if out.header is None:
            if meta.get("kind") != "header" or meta.get("format") != JOURNAL_FORMAT:
                break
            out.scan, out.nchan, out.header = meta["scan"], int(meta["nchan"]), meta["header"]
        elif meta.get("kind") == "tsys":
            if len(arrays) != 4 * out.nchan:
                break
            rec = {k: meta[k] for k in TSYS_SCALARS if k in meta}
            rec["TSYSCHAN"] = np.frombuffer(arrays, dtype="<f4", count=out.nchan).astype(np.float32)
            out.tsys.append(rec)
        elif meta.get("kind") == "rfi":
            out.rfi.append({k: meta[k] for k in RFI_SCALARS if k in meta})
        elif meta.get("kind") == "note":
            out.notes.append({"DATE-OBS": meta.get("DATE-OBS", ""), "TEXT": meta.get("TEXT", "")})
        else:
            nchan = out.nchan
            has_exp = bool(meta.get("chanexp"))
            if meta.get("kind") != "row" or len(arrays) != (9 if has_exp else 5) * nchan:
                break
            row = {k: v for k, v in meta.items() if k not in ("kind", "extra", "chanexp")}
            row.update(meta.get("extra", {}))
            row["DATA"] = np.frombuffer(arrays, dtype="<f4", count=nchan).astype(np.float32)
            row["FLAGGED"] = np.frombuffer(arrays, dtype=np.uint8, offset=4 * nchan,
                                           count=nchan) != 0
            if has_exp:
                row["CHANEXP"] = np.frombuffer(arrays, dtype="<f4", offset=5 * nchan,
                                               count=nchan).astype(np.float32)
            out.rows.append(row)
        out.intact_bytes = end
    out.torn_bytes = len(buf) - out.intact_bytes
    return out


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
    for key, value in header.items():
        if key in ("EXTVER", "TELESCOP", "DATE", "ORIGIN", "_NOTES"):
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
            path = None
            if contents.rows:
                path = _write_fits_atomic(self.out_dir, self.scan_name,
                                          _with_notes(self.header, contents.notes),
                                          self.nchan, contents.rows, contents.tsys, self.products,
                                          contents.rfi)
            self.journal_path.unlink()
            _fsync_dir(self.out_dir)
        finally:
            os.close(self._fd)  # releases the flock
            self._closed = True
        return path


# ----------------------------------------------------------------------------------------------
# recovery and reading
# ----------------------------------------------------------------------------------------------
def recover(out_dir: Path, products=None) -> list[Path]:
    """Turn every journal a crashed run left in ``out_dir`` into its FITS file.

    For each ``*.journal`` not locked by a live writer: its intact records become
    ``<scan>.fits`` (written atomically, as :meth:`ScanWriter.close` does), torn trailing bytes
    are dropped and logged, and the journal is removed. A journal with a header but no rows is
    removed and nothing is written; one whose header record is damaged is renamed to
    ``*.journal.bad`` (kept for inspection, never deleted). Stray ``*.fits.tmp`` files of a
    crashed FITS write are removed.

    Returns
    -------
    list of Path
        The FITS files written.
    """
    out_dir = Path(out_dir)
    written: list[Path] = []
    for jpath in sorted(out_dir.glob("*.journal")):
        try:
            fd = os.open(jpath, os.O_RDWR | getattr(os, "O_CLOEXEC", 0))
        except FileNotFoundError:  # a live writer finished meanwhile
            continue
        try:
            if not _try_lock(fd):
                log.info("%s: in use by a running writer; left alone", jpath)
                continue
            if not jpath.exists():  # closed and unlinked between glob and lock
                continue
            try:
                path = _finalise_locked(jpath, products)
            except OSError as exc:   # disk full: the journal stays, a later start retries
                log.warning("%s: not turned into FITS yet (%s); the journal is kept", jpath, exc)
                continue
            if path is not None:
                written.append(path)
        finally:
            os.close(fd)
    for tmp in sorted(out_dir.glob("*.fits.tmp")):
        scan = tmp.name[: -len(".fits.tmp")]
        if (out_dir / f"{scan}.journal").exists():  # a live writer is closing this scan
            continue
        tmp.unlink(missing_ok=True)
        log.warning("removed %s, left by an interrupted FITS write", tmp)
    return written


def finalise_journal(jpath: Path, products=None) -> Path | None:
    """Turn one unlocked journal into its FITS file (as :func:`recover` does for each).

    Returns the FITS file, or None when there was nothing to write or a running writer holds
    the journal. Raises OSError when writing fails (disk full): the journal is then kept.
    """
    jpath = Path(jpath)
    try:
        fd = os.open(jpath, os.O_RDWR | getattr(os, "O_CLOEXEC", 0))
    except FileNotFoundError:
        return None
    try:
        if not _try_lock(fd) or not jpath.exists():
            return None
        return _finalise_locked(jpath, products)
    finally:
        os.close(fd)


def _finalise_locked(jpath: Path, products=None) -> Path | None:
    """Journal (locked by the caller) -> FITS, then remove the journal; see :func:`recover`."""
    out_dir = jpath.parent
    contents = read_journal(jpath)
    scan = jpath.name[: -len(".journal")]
    if not contents.header_ok:
        if contents.torn_bytes == 0:  # empty file: crash right after creating it
            jpath.unlink()
        else:
            bad = jpath.with_name(jpath.name + ".bad")
            os.replace(jpath, bad)
            log.warning("%s: header record damaged; %d bytes kept as %s",
                        jpath, contents.torn_bytes, bad)
        _fsync_dir(out_dir)
        return None
    path = None
    if contents.rows:
        path = _write_fits_atomic(out_dir, scan, _with_notes(contents.header, contents.notes),
                                  contents.nchan, contents.rows, contents.tsys, products,
                                  contents.rfi)
        log.warning("recovered %d integrations of interrupted scan %s into %s; "
                    "dropped %d torn bytes", len(contents.rows), scan, path, contents.torn_bytes)
    else:
        log.warning("interrupted scan %s had no integration; removed its journal "
                    "(dropped %d torn bytes)", scan, contents.torn_bytes)
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
