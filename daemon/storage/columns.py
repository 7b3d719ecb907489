"""What one scan holds: its columns and their units, the header cards, and their checks.

Column and keyword names follow the single-dish FITS (SDFITS) convention (Garwood 2000); both
the journal (:mod:`spinflip.daemon.storage.journal`) and the FITS file
(:mod:`spinflip.daemon.storage.fits_file`) are written from these tables.

References
----------
Garwood, R. W. 2000, ASP Conf. Ser. 216, 243 (single-dish FITS convention).
Pence, W. D. et al. 2010, A&A 524, A42 (FITS standard 3.0: BINTABLE, TUNIT, HIERARCH-free
keywords of at most 8 characters).
"""

from __future__ import annotations

import math
import numbers

import numpy as np

EXTNAME = "SINGLE DISH"

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
               "CALTIME": "s", "UNKNTIME": "s", "PNTERR": "deg"}
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


def _plain_scalar(key: str, value: object, where: str) -> bool | int | float | str:
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


def _scalars(record: dict, spec: dict, what: str) -> dict:
    """The scalars ``spec`` names (name -> (kind, unit)) of ``record``, checked: "s" printable
    ASCII strings, "f" real numbers (as float); ValueError naming ``what`` and the key."""
    out: dict[str, str | float] = {}
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
