"""Reading saved scans for the reduction, one file at a time (memory bounded by one scan).

What is read
------------
Under each folder given (recursively, symbolic links to folders not followed): every
``scan-*.fits`` file, and every ``*.journal`` whose ``<name>.fits`` does not exist: a scan a
crash left unfinished. A file named directly is read as well. Each comes back as a
:class:`ScanRows` (the columns the stack needs, float64 / bool arrays) or an
:class:`Unusable` (its path and one line saying why); never an exception.

Journals are read in memory with the daemon's own reader and its recovery rules
(:func:`spinflip.daemon.storage.journal.read_journal`, as
:func:`spinflip.daemon.storage.recovery.recover` reads them): every record whose CRC-32 holds
is kept, a torn tail and damaged stretches are dropped (said in :attr:`ScanRows.notes`), a
journal held by a running writer (``flock``) is a scan in progress and is left out, one that
is not a regular file is unusable, one whose header record is lost has no unit for DATA and
is unusable. Nothing is ever written, renamed or removed in the data folders: recovery proper
(turning a journal into its FITS file) is the daemon's job at its next start.

FITS files are opened once with astropy (``memmap=False``) and the ``SINGLE DISH`` table of
:mod:`spinflip.daemon.storage.fits_file` is read column by column; the header keeps the same
cards :func:`spinflip.daemon.storage.fits_file.read_scan` keeps (the table-structure keywords
left out, :func:`spinflip.daemon.storage.columns._is_structural`). ``read_scan`` itself builds
an astropy Table and opens the file twice, about twice the time for a season of scans.

A usable scan: written by spinflip (``ORIGIN``), with the columns below, at least one row,
``BUNIT = 'K'`` (a scan in counts is uncalibrated total power: nothing to stack), one rest
frequency within 1 Hz over its rows and equal, within 1 Hz, to the first usable scan's of
the reduction (:class:`RestFrequencyCheck`).

Velocity axis of a row (FITS WCS paper III, alternate axis A, LSRK radio velocity), m/s::

    v_k = CRVAL1A + (k + 1 - CRPIX1A) CDELT1A          (k 0-based)

and where a file predates the A axis, CRVAL1A and CDELT1A are computed from the frequency
axis, RESTFREQ and VFRAME (:func:`spinflip.daemon.sky.spectral_axis.velocity_wcs_m_s`).

References
----------
Greisen, E. W., Calabretta, M. R., Valdes, F. G. & Allen, S. L. 2006, A&A 446, 747
(FITS WCS paper III: linear spectral axes, radio velocity, alternate axis descriptions).
"""

from __future__ import annotations

import os
import stat
import warnings
from collections import Counter
from collections.abc import Callable, Iterable, Iterator
from dataclasses import dataclass, field
from pathlib import Path
from typing import TypeVar

import numpy as np
import numpy.typing as npt

from spinflip.daemon.error_line import one_line
from spinflip.daemon.sky.spectral_axis import velocity_wcs_m_s
from spinflip.daemon.storage.columns import EXTNAME, _is_structural
from spinflip.daemon.storage.durable import fcntl
from spinflip.daemon.storage.fits_file import ORIGIN
from spinflip.daemon.storage.journal import read_journal
from spinflip.daemon.storage.recovery import _damage_text

#: Two rest frequencies closer than this are the same line, Hz.
RESTFREQ_TOLERANCE_HZ = 1.0

#: Row columns the reduction needs (the A axis may be computed instead, see module notes).
NEEDED_COLUMNS = ("DATA", "FLAGGED", "TSYS", "EXPOSURE", "DATE-OBS", "CRVAL1", "CDELT1",
                  "CRPIX1", "RESTFREQ", "VFRAME", "GLON", "GLAT", "OBJECT")

#: Header cards the reduction looks at (the whole table header is kept in ScanRows.header).
HEADER_CARDS = ("OBJECT", "BEAMEFF", "TEMPSCAL", "BUNIT", "DISHDIAM", "PLANNAME", "SWOFFSET",
                "TELESCOP")


@dataclass(frozen=True)
class Unusable:
    """A file left out of the reduction, and why (one line)."""

    path: Path
    reason: str

    def __str__(self) -> str:
        return f"{self.path}: {self.reason}"


@dataclass(frozen=True, eq=False)
class ScanRows:
    """The rows of one scan as the reduction needs them.

    Per-row arrays have length ``n`` (rows), per-channel ones shape ``(n, nchan)``.
    ``data`` is float32 in ``unit`` (always "K" for a usable scan); ``flagged`` bool;
    ``chan_exposure_s`` the per-channel exposure after flagging (CHANEXP), None when the file
    has none (then ``exposure_s`` holds for every channel). ``vel_crval_m_s``,
    ``vel_cdelt_m_s``, ``crpix`` describe the LSRK radio-velocity axis (module notes);
    ``channel_hz`` is the channel width |CDELT1|, Hz; ``folded`` whether a row is a folded
    frequency-switched spectrum (FOLDED; False when absent). ``notes`` says what reading had
    to do (a journal's torn tail or damage), empty for an intact FITS file.
    """

    path: Path
    header: dict
    data: np.ndarray
    flagged: np.ndarray
    tsys_k: np.ndarray
    exposure_s: np.ndarray
    chan_exposure_s: np.ndarray | None
    vel_crval_m_s: np.ndarray
    vel_cdelt_m_s: np.ndarray
    crpix: np.ndarray
    glon_deg: np.ndarray
    glat_deg: np.ndarray
    date_obs: np.ndarray
    restfreq_hz: np.ndarray
    unit: str
    channel_hz: np.ndarray
    folded: np.ndarray
    objects: np.ndarray
    from_journal: bool = False
    notes: tuple[str, ...] = field(default=())

    def __repr__(self) -> str:
        return (f"ScanRows({str(self.path)!r}, rows={self.n_rows}, nchan={self.nchan}, "
                f"object={self.object!r})")

    @property
    def n_rows(self) -> int:
        return int(self.data.shape[0])

    @property
    def nchan(self) -> int:
        return int(self.data.shape[1])

    @property
    def name(self) -> str:
        return self.path.name

    @property
    def object(self) -> str:
        """The most common OBJECT of the rows (the header's OBJECT if the rows have none)."""
        return _most_common(self.objects) or str(self.header.get("OBJECT", ""))

    @property
    def position_deg(self) -> tuple[float, float]:
        """Mean (GLON, GLAT) of the rows, deg (:func:`mean_position_deg`)."""
        return mean_position_deg(self.glon_deg, self.glat_deg)

    @property
    def glon_mean_deg(self) -> float:
        return self.position_deg[0]

    @property
    def glat_mean_deg(self) -> float:
        return self.position_deg[1]

    def velocity_m_s(self, row: int) -> np.ndarray:
        """LSRK radio velocity of each channel of ``row``, m/s (module notes)."""
        k = np.arange(self.nchan, dtype=np.float64)
        return self.vel_crval_m_s[row] + (k + 1.0 - self.crpix[row]) * self.vel_cdelt_m_s[row]


@dataclass(frozen=True)
class ScanSummary:
    """What grouping needs of a scan, without its spectra: header, mean position, rows."""

    path: Path
    header: dict
    object: str
    glon_deg: float
    glat_deg: float
    n_rows: int
    restfreq_hz: float
    from_journal: bool = False
    notes: tuple[str, ...] = ()

    @property
    def position_deg(self) -> tuple[float, float]:
        return self.glon_deg, self.glat_deg

    @property
    def name(self) -> str:
        return self.path.name


def mean_position_deg(glon_deg: npt.ArrayLike, glat_deg: npt.ArrayLike) -> tuple[float, float]:
    """Mean position of sky directions, (l, b) deg: the direction of the sum of their unit
    vectors, so that longitudes on both sides of l = 0 average correctly (359 and 1 give 0).
    The result's l is in [0, 360)."""
    lr = np.radians(np.asarray(glon_deg, dtype=np.float64))
    br = np.radians(np.asarray(glat_deg, dtype=np.float64))
    x = float(np.sum(np.cos(br) * np.cos(lr)))
    y = float(np.sum(np.cos(br) * np.sin(lr)))
    z = float(np.sum(np.sin(br)))
    lon = float(np.degrees(np.arctan2(y, x))) % 360.0
    lat = float(np.degrees(np.arctan2(z, np.hypot(x, y))))
    return lon, lat


def _most_common(values: Iterable[str]) -> str:
    """The most frequent non-empty text (the first seen on a tie), "" if none."""
    counts = Counter(v.strip() for v in values if str(v).strip())
    return counts.most_common(1)[0][0] if counts else ""


# ----------------------------------------------------------------------------------------------
# finding the files
# ----------------------------------------------------------------------------------------------
def _is_scan_fits(name: str) -> bool:
    return name.startswith("scan-") and name.endswith(".fits")


def find_scan_files(paths: Iterable[Path | str]) -> Iterator[Path | Unusable]:
    """Every scan file under ``paths`` in a stable order (by path), each once.

    Folders are walked recursively (links to folders not followed); ``scan-*.fits`` files and
    ``*.journal`` files without their ``.fits`` are yielded. A file named directly is yielded
    if it ends in ``.fits`` or ``.journal``; a path that does not exist is an
    :class:`Unusable`.
    """
    seen: set[str] = set()
    for given in paths:
        p = Path(given)
        if not os.path.lexists(p):
            yield Unusable(p, "no such file or folder")
            continue
        if p.is_dir():
            found: list[Path] = []
            for root, dirs, files in os.walk(p, followlinks=False):
                dirs.sort()
                names = set(files)
                for name in files:
                    if _is_scan_fits(name) or (name.endswith(".journal")
                                               and f"{name[:-len('.journal')]}.fits" not in names):
                        found.append(Path(root) / name)
            candidates = sorted(found)
        elif p.name.endswith((".fits", ".journal")):
            candidates = [p]
        else:
            yield Unusable(p, "not a folder, a .fits scan or a .journal")
            continue
        for c in candidates:
            key = os.path.realpath(c)
            if key not in seen:
                seen.add(key)
                yield c


# ----------------------------------------------------------------------------------------------
# reading one file
# ----------------------------------------------------------------------------------------------
class _NotUsable(Exception):
    """Raised inside the readers with the one-line reason."""


def _regular_file(path: Path) -> None:
    """_NotUsable unless ``path`` is a regular file we may open (a FIFO would hang a read)."""
    try:
        mode = os.stat(path).st_mode
    except OSError as exc:
        raise _NotUsable(f"cannot read it ({exc.strerror or exc})") from None
    if not stat.S_ISREG(mode):
        what = ("a folder" if stat.S_ISDIR(mode) else "a FIFO" if stat.S_ISFIFO(mode)
                else "a socket" if stat.S_ISSOCK(mode) else "a device")
        raise _NotUsable(f"not a regular file but {what}")


def _fits_table(path: Path, columns: Iterable[str] | None
                ) -> tuple[dict, dict[str, np.ndarray], int]:
    """(header, {column: array}, rows) of the SINGLE DISH table; ``columns`` None: all."""
    from astropy.io import fits

    _regular_file(path)
    try:
        with warnings.catch_warnings():
            warnings.simplefilter("ignore")          # a damaged card is answered below
            with fits.open(path, memmap=False) as hdul:
                names = [h.name for h in hdul]
                if EXTNAME not in names:
                    origin = str(hdul[0].header.get("ORIGIN", "")).strip()
                    who = f" (written by {origin!r})" if origin and origin != ORIGIN else ""
                    raise _NotUsable(f"not a spinflip scan: no {EXTNAME!r} table{who}")
                hdu = hdul[EXTNAME]
                hdr = hdu.header
                header = {k: v for k, v in hdr.items() if k and not _is_structural(k)}
                origin = str(header.get("ORIGIN", "")).strip()
                if origin != ORIGIN:
                    raise _NotUsable(f"not a spinflip scan: written by {origin or 'an unnamed program'!r}")
                table = hdu.data
                have = [] if table is None else list(table.columns.names)
                wanted = have if columns is None else [c for c in columns if c in have]
                cols = {c: np.array(table[c]) for c in wanted} if table is not None else {}
                n = 0 if table is None else len(table)
    except _NotUsable:
        raise
    except OSError as exc:
        raise _NotUsable(f"cannot read it as FITS ({one_line(exc, 160)})") from None
    except Exception as exc:  # astropy raises many kinds on a damaged file
        raise _NotUsable(f"cannot read it as a FITS table ({one_line(exc, 160)})") from None
    return header, cols, n


def _check_columns(cols: dict, needed: Iterable[str]) -> None:
    missing = [c for c in needed if c not in cols]
    if missing:
        raise _NotUsable(f"not a spinflip scan: lacks the column{'s' if len(missing) > 1 else ''} "
                         f"{', '.join(missing)}")


def _check_unit(header: dict) -> str:
    unit = header.get("BUNIT")
    if unit is None:
        raise _NotUsable("the unit of DATA is unknown (no BUNIT: the journal's header record "
                         "is lost); not stacked")
    if str(unit).strip() != "K":
        raise _NotUsable(f"DATA is in {str(unit).strip()!r}, not K (uncalibrated total "
                         "power): nothing to stack")
    return "K"


def _one_restfreq(restfreq: np.ndarray) -> float:
    """The scan's rest frequency; _NotUsable if its rows disagree by more than 1 Hz."""
    if restfreq.size == 0 or not np.all(np.isfinite(restfreq)):
        raise _NotUsable("RESTFREQ is missing or not a number")
    if float(np.ptp(restfreq)) > RESTFREQ_TOLERANCE_HZ:
        raise _NotUsable(f"its rows have several rest frequencies ({float(restfreq.min()):.0f} "
                         f"to {float(restfreq.max()):.0f} Hz)")
    return float(restfreq[0])


def _rows_from_columns(path: Path, header: dict, cols: dict, from_journal: bool,
                       notes: tuple[str, ...]) -> ScanRows:
    """ScanRows from column arrays (FITS table columns, or journal rows stacked)."""
    _check_columns(cols, NEEDED_COLUMNS)
    unit = _check_unit(header)
    data = np.asarray(cols["DATA"], dtype=np.float32)
    if data.ndim != 2 or data.shape[0] == 0:
        raise _NotUsable("no integration in it")
    n, nchan = data.shape
    f64 = {k: np.asarray(cols[k], dtype=np.float64).reshape(n)
           for k in ("TSYS", "EXPOSURE", "CRVAL1", "CDELT1", "CRPIX1", "RESTFREQ", "VFRAME",
                     "GLON", "GLAT")}
    _one_restfreq(f64["RESTFREQ"])
    if "CRVAL1A" in cols and "CDELT1A" in cols:
        vcrval = np.asarray(cols["CRVAL1A"], dtype=np.float64).reshape(n)
        vcdelt = np.asarray(cols["CDELT1A"], dtype=np.float64).reshape(n)
        crpix = (np.asarray(cols["CRPIX1A"], dtype=np.float64).reshape(n)
                 if "CRPIX1A" in cols else f64["CRPIX1"])
    else:                          # a file without the A axis: from the frequency axis
        pairs = [velocity_wcs_m_s(float(a), float(b), float(c), float(d)) for a, b, c, d
                 in zip(f64["CRVAL1"], f64["CDELT1"], f64["RESTFREQ"], f64["VFRAME"],
                        strict=True)]
        vcrval = np.array([p[0] for p in pairs], dtype=np.float64)
        vcdelt = np.array([p[1] for p in pairs], dtype=np.float64)
        crpix = f64["CRPIX1"]
    chanexp = cols.get("CHANEXP")
    folded = (np.asarray(cols["FOLDED"]).reshape(n) != 0 if "FOLDED" in cols
              else np.zeros(n, dtype=bool))
    return ScanRows(
        path=path, header=header, data=data,
        flagged=np.asarray(cols["FLAGGED"], dtype=bool).reshape(n, nchan),
        tsys_k=f64["TSYS"], exposure_s=f64["EXPOSURE"],
        chan_exposure_s=(None if chanexp is None
                         else np.asarray(chanexp, dtype=np.float64).reshape(n, nchan)),
        vel_crval_m_s=np.asarray(vcrval, dtype=np.float64),
        vel_cdelt_m_s=np.asarray(vcdelt, dtype=np.float64), crpix=np.asarray(crpix, np.float64),
        glon_deg=f64["GLON"], glat_deg=f64["GLAT"],
        date_obs=np.asarray(cols["DATE-OBS"]).astype(str).reshape(n),
        restfreq_hz=f64["RESTFREQ"], unit=unit, channel_hz=np.abs(f64["CDELT1"]),
        folded=folded, objects=np.asarray(cols["OBJECT"]).astype(str).reshape(n),
        from_journal=from_journal, notes=notes)


def _journal_contents(path: Path) -> tuple[dict, list, tuple[str, ...]]:
    """(header, rows, notes) of a journal, read with the daemon's recovery rules (module
    notes); _NotUsable when recovery would write nothing of it or it is in use."""
    try:  # read-only and non-blocking, as recovery opens it
        fd = os.open(path, os.O_RDONLY | os.O_NONBLOCK | getattr(os, "O_CLOEXEC", 0))
    except OSError as exc:
        raise _NotUsable(f"cannot read this journal ({exc.strerror or exc})") from None
    try:
        mode = os.fstat(fd).st_mode
        if not stat.S_ISREG(mode):
            _regular_file(path)                     # says what it is
        if fcntl is not None:                       # a shared probe, released at once
            try:
                fcntl.flock(fd, fcntl.LOCK_SH | fcntl.LOCK_NB)
            except BlockingIOError:
                raise _NotUsable("a scan in progress (its journal is held by a running "
                                 "writer); left out") from None
            fcntl.flock(fd, fcntl.LOCK_UN)
    finally:
        os.close(fd)
    try:
        contents = read_journal(path)
    except OSError as exc:
        raise _NotUsable(f"cannot read this journal ({exc.strerror or exc})") from None
    if not contents.rows:
        raise _NotUsable("no intact integration in this journal")
    notes: list[str] = ["read from a journal left by an interrupted scan (not yet recovered)"]
    if contents.damaged or contents.header_note:
        notes.append(f"damaged journal: {_damage_text(contents)}")
    elif contents.torn_bytes:
        notes.append(f"dropped {contents.torn_bytes} torn bytes at the end")
    header = dict(contents.header) if contents.header is not None else {}
    if contents.header is None:
        header["BUNIT"] = None
    header.setdefault("ORIGIN", ORIGIN)
    return header, contents.rows, tuple(notes)


def _journal_columns(rows: list, names: Iterable[str]) -> dict:
    """Row dicts -> {column: stacked array} for the columns every row has."""
    out = {}
    for name in names:
        if all(name in r for r in rows):
            vals = [r[name] for r in rows]
            out[name] = np.stack(vals) if isinstance(vals[0], np.ndarray) else np.array(vals)
    return out


_ROW_COLUMNS = NEEDED_COLUMNS + ("CHANEXP", "CRVAL1A", "CDELT1A", "CRPIX1A", "FOLDED")
_SUMMARY_COLUMNS = ("GLON", "GLAT", "OBJECT", "RESTFREQ")


def read_rows(path: Path | str) -> ScanRows | Unusable:
    """One scan file (``.fits`` or ``.journal``) as :class:`ScanRows`, or :class:`Unusable`."""
    p = Path(path)
    try:
        if p.name.endswith(".journal"):
            header, rows, notes = _journal_contents(p)
            return _rows_from_columns(p, header, _journal_columns(rows, _ROW_COLUMNS), True,
                                      notes)
        header, cols, _n = _fits_table(p, _ROW_COLUMNS)
        return _rows_from_columns(p, header, cols, False, ())
    except _NotUsable as exc:
        return Unusable(p, str(exc))
    except (MemoryError, KeyboardInterrupt):
        raise
    except Exception as exc:  # never a traceback for one bad file
        return Unusable(p, f"cannot read it ({type(exc).__name__}: {one_line(exc, 160)})")


def summarise(path: Path | str) -> ScanSummary | Unusable:
    """The header, mean position, OBJECT, number of rows and rest frequency of a scan,
    without keeping its spectra; :class:`Unusable` as :func:`read_rows` would say (except
    a column only the stack needs)."""
    p = Path(path)
    try:
        if p.name.endswith(".journal"):
            header, rows, notes = _journal_contents(p)
            cols = _journal_columns(rows, _SUMMARY_COLUMNS)
            n, from_journal = len(rows), True
        else:
            header, cols, n = _fits_table(p, _SUMMARY_COLUMNS)
            notes, from_journal = (), False
        _check_columns(cols, _SUMMARY_COLUMNS)
        _check_unit(header)
        if n == 0:
            raise _NotUsable("no integration in it")
        restfreq = _one_restfreq(np.asarray(cols["RESTFREQ"], dtype=np.float64))
        lon, lat = mean_position_deg(cols["GLON"], cols["GLAT"])
        obj = _most_common(np.asarray(cols["OBJECT"]).astype(str)) or str(header.get("OBJECT", ""))
        return ScanSummary(p, header, obj, lon, lat, n, restfreq, from_journal, notes)
    except _NotUsable as exc:
        return Unusable(p, str(exc))
    except (MemoryError, KeyboardInterrupt):
        raise
    except Exception as exc:
        return Unusable(p, f"cannot read it ({type(exc).__name__}: {one_line(exc, 160)})")


# ----------------------------------------------------------------------------------------------
# a whole reduction
# ----------------------------------------------------------------------------------------------
class RestFrequencyCheck:
    """One rest frequency per reduction: the first usable scan's; a scan whose RESTFREQ
    differs from it by more than :data:`RESTFREQ_TOLERANCE_HZ` becomes :class:`Unusable`."""

    def __init__(self, tolerance_hz: float = RESTFREQ_TOLERANCE_HZ) -> None:
        self.tolerance_hz = float(tolerance_hz)
        self.reference_hz: float | None = None
        self.reference_path: Path | None = None

    def __call__(self, path: Path, restfreq_hz: float) -> Unusable | None:
        if self.reference_hz is None:
            self.reference_hz, self.reference_path = float(restfreq_hz), path
            return None
        if abs(float(restfreq_hz) - self.reference_hz) > self.tolerance_hz:
            ref = self.reference_path.name if self.reference_path is not None else "?"
            return Unusable(path, f"rest frequency {float(restfreq_hz):.1f} Hz differs from "
                            f"{self.reference_hz:.1f} Hz of the first scan ({ref}); one line "
                            "per reduction")
        return None


T = TypeVar("T", ScanRows, ScanSummary)


def _checked(paths: Iterable[Path | str], read: Callable[[Path], T | Unusable],
             restfreq: Callable[[T], float], check: RestFrequencyCheck | None
             ) -> Iterator[T | Unusable]:
    """``read`` of every scan under ``paths`` in turn, mixed rest frequencies refused."""
    check = check if check is not None else RestFrequencyCheck()
    for item in find_scan_files(paths):
        if isinstance(item, Unusable):
            yield item
            continue
        got = read(item)
        if isinstance(got, Unusable):
            yield got
            continue
        bad = check(item, restfreq(got))
        yield bad if bad is not None else got


def iter_scans(paths: Iterable[Path | str], *,
               restfreq_check: RestFrequencyCheck | None = None
               ) -> Iterator[ScanRows | Unusable]:
    """Every scan under ``paths`` read in turn (:func:`find_scan_files`, :func:`read_rows`),
    one in memory at a time; mixed rest frequencies are :class:`Unusable` (the first usable
    scan sets the line; pass a shared ``restfreq_check`` to carry it across calls)."""
    return _checked(paths, read_rows, lambda s: float(s.restfreq_hz[0]), restfreq_check)


def iter_summaries(paths: Iterable[Path | str], *,
                   restfreq_check: RestFrequencyCheck | None = None
                   ) -> Iterator[ScanSummary | Unusable]:
    """:func:`summarise` of every scan under ``paths`` (as :func:`iter_scans`)."""
    return _checked(paths, summarise, lambda s: float(s.restfreq_hz), restfreq_check)