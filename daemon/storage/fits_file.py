"""The FITS file of one scan: building its HDUs, writing it atomically, reading it back.

Atomic FITS write (common practice for crash-safe files on POSIX): write ``<scan>.fits.tmp``
in the same folder, fsync it, ``os.replace`` it onto ``<scan>.fits`` (atomic within one file
system) and fsync the folder so the rename itself is durable. Only then is the journal
removed, so at every instant either the journal or the complete FITS file holds the scan.

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

import logging
import os
from collections.abc import Callable
from pathlib import Path
from typing import TYPE_CHECKING

import numpy as np

from spinflip.daemon.storage.columns import (
    _SUFFIX_UNITS,
    EXTNAME,
    EXTRA_UNITS,
    REQUIRED_ROW_KEYS,
    RFI_EXTNAME,
    RFI_SCALARS,
    ROW_SCALARS,
    TSYS_EXTNAME,
    TSYS_SCALARS,
    _is_structural,
)
from spinflip.daemon.storage.durable import fsync_dir
from spinflip.daemon.utc import utc_iso

if TYPE_CHECKING:  # astropy is imported where it is used: it is slow to import
    from astropy.io import fits
    from astropy.table import Table

log = logging.getLogger("spinflip.archive")

#: Derived products of a scan: ``products(header, nchan, rows)`` returns the extra HDUs to
#: append to its FITS file (e.g. :func:`spinflip.daemon.products.scan_average.scan_products`).
Products = Callable[[dict, int, list], list]

ORIGIN = "spinflip"


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


def _rfi_hdu(rfi: list) -> fits.BinTableHDU:
    """The RFI LOG BINTABLE: what kind of interference was seen when."""
    from astropy.io import fits

    hdu = fits.BinTableHDU.from_columns(_scalar_columns(rfi, RFI_SCALARS), nrows=len(rfi))
    hdu.header["EXTNAME"] = (RFI_EXTNAME, "interference seen, by kind and time")
    hdu.header["COMMENT"] = ("KIND carrier-on/carrier-off (FREQ sky Hz, VALUE excess in sigma, "
                             "NaN if removed by SK), impulses (VALUE count), sk (VALUE fraction)")
    return hdu


def _tsys_hdu(tsys: list, nchan: int) -> fits.BinTableHDU:
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
                products: Products | None = None, rfi: list | None = None) -> fits.HDUList:
    """The FITS HDU list of one scan: empty primary HDU, the SINGLE DISH BINTABLE, then the
    TSYS HISTORY table (if the noise source fired) and any HDUs ``products(header, nchan, rows)``
    returns (derived products, e.g. the baselined scan average)."""
    from astropy.io import fits

    now = utc_iso()
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
                       tsys: list | None = None, products: Products | None = None,
                       rfi: list | None = None) -> Path:
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
    fsync_dir(out_dir)
    return final


# ----------------------------------------------------------------------------------------------


def read_scan(path: Path) -> tuple[dict, Table]:
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
