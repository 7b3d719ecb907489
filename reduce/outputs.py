"""What ``spinflip reduce`` writes: one FITS file with the stacks and the derived tables, CSV
files for spreadsheets. Every column carries its unit (FITS ``TUNIT``; CSV names end in it).

``reduction.fits``:

* ``TARGETS`` (BINTABLE): one row per target: ``OBJECT``, ``GLON``/``GLAT`` (deg), ``NSCANS``,
  ``NROWS``, ``EXPOSURE`` (s), ``W``/``W_ERR`` (K km/s), ``NHI``/``NHI_ERR`` (cm-2, optically
  thin), ``VLINE1``/``VLINE2`` (km/s, the window of W), ``BLORDER``, ``EXTNAME`` of its profile;
* one BINTABLE per target, ``PROFILE n``: ``VRAD`` (km/s, LSRK radio), ``TB`` (K), ``SIGMA``
  (K), ``WEIGHT`` (s Hz / K^2, the radiometer weights summed);
* ``ROTATION`` (BINTABLE): the tangent points (the columns of ``rotation-curve.csv``);
* ``FACEON`` (IMAGE): the face-on map, axes x and y in kpc (``CRVALn``/``CDELTn``/``CRPIXn``,
  ``CUNITn = 'kpc'``), ``BUNIT`` its unit.

The header of the primary HDU says the Galactic constants (``R0``, ``THETA0``, ``GALCONST``,
``GCREF``) and the software.

References
----------
FITS standard 4.0 (BINTABLE, TUNIT, IMAGE WCS keywords); RFC 4180 (CSV).
"""

from __future__ import annotations

import csv
from collections.abc import Sequence
from pathlib import Path

import numpy as np
from astropy.io import fits

from spinflip import __version__
from spinflip.daemon.storage.durable import replace_atomically
from spinflip.reduce.constants import GalacticConstants
from spinflip.reduce.faceon import FaceOnMap
from spinflip.reduce.profile import Stack
from spinflip.reduce.tangent import TerminalPoint

#: rotation-curve.csv: the columns the issue names first, then the rest.
ROTATION_COLUMNS = ("glon_deg", "r_kpc", "v_terminal_km_s", "theta_km_s", "theta_err_km_s",
                    "v_terminal_err_km_s", "glat_deg", "quadrant", "object")
#: targets.csv
TARGET_COLUMNS = ("object", "glon_deg", "glat_deg", "n_scans", "n_rows", "exposure_s",
                  "w_k_km_s", "w_err_k_km_s", "nhi_cm2", "nhi_err_cm2", "v_line_lo_km_s",
                  "v_line_hi_km_s")


def _csv(path: Path, header: Sequence[str], rows: Sequence[Sequence]) -> Path:
    """Write a CSV file whole (atomically): a header line, then the rows."""
    import io
    buf = io.StringIO()
    w = csv.writer(buf, lineterminator="\n")
    w.writerow(header)
    for row in rows:
        w.writerow([_cell(x) for x in row])
    replace_atomically(path, buf.getvalue().encode("utf-8"))
    return path


def _cell(x: object) -> object:
    if isinstance(x, float):
        return "" if not np.isfinite(x) else f"{x:.6g}"
    return x


def target_rows(stacks: Sequence[Stack]) -> list[tuple]:
    return [(s.object, s.glon_deg, s.glat_deg, s.n_scans, s.n_rows, s.exposure_s, s.w_k_km_s,
             s.w_err_k_km_s, s.nhi_cm2, s.nhi_err_cm2, s.line_window_km_s[0],
             s.line_window_km_s[1]) for s in stacks]


def rotation_rows(points: Sequence[TerminalPoint]) -> list[tuple]:
    return [(p.glon_deg, p.r_kpc, p.v_terminal_km_s, p.theta_km_s, p.theta_err_km_s,
             p.v_terminal_err_km_s, p.glat_deg, p.quadrant, p.object) for p in points]


def write_csvs(out: Path, stacks: Sequence[Stack], points: Sequence[TerminalPoint],
               facemap: FaceOnMap | None) -> list[Path]:
    """targets.csv, rotation-curve.csv and faceon.csv (cell centres, value, channels)."""
    files = [_csv(out / "targets.csv", TARGET_COLUMNS, target_rows(stacks)),
             _csv(out / "rotation-curve.csv", ROTATION_COLUMNS, rotation_rows(points))]
    if facemap is not None:
        xc = 0.5 * (facemap.x_edges_kpc[:-1] + facemap.x_edges_kpc[1:])
        yc = 0.5 * (facemap.y_edges_kpc[:-1] + facemap.y_edges_kpc[1:])
        unit = facemap.unit.replace(" ", "").replace("/", "_per_").replace("^", "")
        rows = [(float(x), float(y), float(facemap.density[i, j]), int(facemap.counts[i, j]))
                for i, x in enumerate(xc) for j, y in enumerate(yc)
                if facemap.counts[i, j] > 0]
        files.append(_csv(out / "faceon.csv", ("x_kpc", "y_kpc", f"{facemap.quantity}_{unit}",
                                                "channels"), rows))
    return files


def write_fits(path: Path, stacks: Sequence[Stack], points: Sequence[TerminalPoint],
               facemap: FaceOnMap | None, consts: GalacticConstants) -> Path:
    """reduction.fits (see the module docstring), written atomically."""
    primary = fits.PrimaryHDU()
    h = primary.header
    h["ORIGIN"] = ("spinflip " + __version__, "software")
    h["GALCONST"] = (consts.name, "Galactic constants")
    h["R0"] = (consts.r0_kpc, "[kpc] Sun - Galactic centre")
    h["THETA0"] = (consts.theta0_km_s, "[km/s] circular speed at R0")
    h["GCREF"] = consts.reference[:68]
    hdus: list = [primary]
    cols = [("OBJECT", "A68", None), ("GLON", "D", "deg"), ("GLAT", "D", "deg"),
            ("NSCANS", "J", None), ("NROWS", "J", None), ("EXPOSURE", "D", "s"),
            ("W", "D", "K km/s"), ("W_ERR", "D", "K km/s"), ("NHI", "D", "cm-2"),
            ("NHI_ERR", "D", "cm-2"), ("VLINE1", "D", "km/s"), ("VLINE2", "D", "km/s"),
            ("BLORDER", "J", None), ("PROFILE", "A16", None)]
    values: list = list(zip(*[(s.object, s.glon_deg, s.glat_deg, s.n_scans, s.n_rows, s.exposure_s,
                         s.w_k_km_s, s.w_err_k_km_s, s.nhi_cm2, s.nhi_err_cm2,
                         s.line_window_km_s[0], s.line_window_km_s[1], s.baseline_order,
                         f"PROFILE {i + 1}") for i, s in enumerate(stacks)], strict=True)) \
        if stacks else [[] for _ in cols]
    targets = fits.BinTableHDU.from_columns(
        [fits.Column(name=n, format=f, unit=u, array=np.asarray(v))
         for (n, f, u), v in zip(cols, values, strict=True)], name="TARGETS")
    targets.header["COMMENT"] = "N(HI) = 1.823e18 W cm-2, optically thin (Dickey & Lockman 1990)"
    hdus.append(targets)
    for i, s in enumerate(stacks):
        prof = fits.BinTableHDU.from_columns([
            fits.Column(name="VRAD", format="D", unit="km/s", array=s.v_km_s),
            fits.Column(name="TB", format="D", unit="K", array=s.tb_k),
            fits.Column(name="SIGMA", format="D", unit="K", array=s.sigma_k),
            fits.Column(name="WEIGHT", format="D", unit="s Hz / K2", array=s.weight),
        ], name=f"PROFILE {i + 1}")
        prof.header["OBJECT"] = s.object[:68]
        prof.header["GLON"] = (s.glon_deg, "[deg]")
        prof.header["GLAT"] = (s.glat_deg, "[deg]")
        prof.header["SPECSYS"] = "LSRK"
        prof.header["VELDEF"] = "RADI-LSR"
        hdus.append(prof)
    rot_units = {"glon_deg": "deg", "r_kpc": "kpc", "v_terminal_km_s": "km/s",
                 "theta_km_s": "km/s", "theta_err_km_s": "km/s", "v_terminal_err_km_s": "km/s",
                 "glat_deg": "deg"}
    rows = rotation_rows(points)
    rot_cols = []
    for k, name in enumerate(ROTATION_COLUMNS):
        data = [r[k] for r in rows]
        if name == "object":
            rot_cols.append(fits.Column(name="OBJECT", format="A68", array=np.asarray(data,
                                                                                       dtype="U68")))
        elif name == "quadrant":
            rot_cols.append(fits.Column(name="QUADRANT", format="J", array=np.asarray(data,
                                                                                     dtype=int)))
        else:
            rot_cols.append(fits.Column(name=_fits_name(name), format="D",
                                        unit=rot_units[name],
                                        array=np.asarray(data, dtype=float)))
    hdus.append(fits.BinTableHDU.from_columns(rot_cols, name="ROTATION"))
    if facemap is not None:
        img = fits.ImageHDU(np.asarray(facemap.density.T, dtype=np.float32), name="FACEON")
        x, y = facemap.x_edges_kpc, facemap.y_edges_kpc
        for n, edges, axis in ((1, x, "X"), (2, y, "Y")):
            img.header[f"CTYPE{n}"] = axis
            img.header[f"CUNIT{n}"] = "kpc"
            img.header[f"CRPIX{n}"] = 1.0
            img.header[f"CRVAL{n}"] = float(0.5 * (edges[0] + edges[1]))
            img.header[f"CDELT{n}"] = float(edges[1] - edges[0])
        img.header["BUNIT"] = facemap.unit
        img.header["QUANTITY"] = facemap.quantity[:68]
        img.header["AMBIGUTY"] = facemap.ambiguity[:68]
        hdus.append(img)
    tmp = path.with_name(path.name + ".part")
    fits.HDUList(hdus).writeto(tmp, overwrite=True)
    blob = tmp.read_bytes()
    tmp.unlink()
    replace_atomically(path, blob)
    return path


def _fits_name(name: str) -> str:
    """A rotation-curve column's FITS name: glon_deg -> GLON, theta_err_km_s -> THETA_ERR."""
    for suffix in ("_km_s", "_deg", "_kpc"):
        if name.endswith(suffix):
            name = name[: -len(suffix)]
            break
    return name.upper().replace("V_TERMINAL", "VTERM")
