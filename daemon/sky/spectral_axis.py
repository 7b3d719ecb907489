"""The spectral axes of a saved row and the average of a scan on the LSRK velocity grid.

For (0-based) channel ``i`` of a row, the FITS WCS paper III linear frequency axis gives the
topocentric sky frequency

    f_i = CRVAL1 + (i + 1 - CRPIX1) * CDELT1                       (CRPIX1 is 1-based)

its topocentric radio velocity

    v_topo,i = c (RESTFREQ - f_i) / RESTFREQ

and, with the row's VFRAME (the LSRK radio velocity of a source at rest relative to the
telescope), its LSRK radio velocity

    v_LSRK,i = v_topo,i + VFRAME.

The LSRK radio velocity is linear in the channel number, so the same axis is written as an
alternate WCS description (letter A) of each row: CTYPE1A = 'VRAD', CRPIX1A = CRPIX1,
CRVAL1A = c (RESTFREQ - CRVAL1) / RESTFREQ + VFRAME, CDELT1A = -c CDELT1 / RESTFREQ (m/s).

VFRAME changes from row to row as the Earth turns, so each row is linearly interpolated
(``np.interp``) onto the LSRK velocity grid of the first row before averaging; flagged
channels get zero weight (normalised convolution: the interpolated ``DATA * good`` divided by
the interpolated ``good``), and parts of the grid that a row does not cover get no weight.

References
----------
Greisen, E. W., Calabretta, M. R., Valdes, F. G. & Allen, S. L. 2006, A&A 446, 747
(FITS WCS paper III: linear spectral axes, radio velocity convention, alternate axes).
"""

from __future__ import annotations

import numpy as np
import numpy.typing as npt

from spinflip.daemon.sky.hi_line import C_M_S, radio_velocity_m_s


def frequency_axis_hz(crval1: float, cdelt1: float, crpix1: float, nchan: int) -> np.ndarray:
    """Sky frequency of each channel, Hz: ``f_i = CRVAL1 + (i + 1 - CRPIX1) CDELT1``.

    References
    ----------
    Greisen et al. 2006, A&A 446, 747, eq. 1 with a linear FREQ axis (CRPIX1 is 1-based).
    """
    pix = np.arange(nchan, dtype=np.float64) + 1.0
    return crval1 + (pix - crpix1) * cdelt1


def velocity_axis_lsrk_m_s(crval1: float, cdelt1: float, crpix1: float, restfreq: float,
                           vframe_m_s: float, nchan: int) -> np.ndarray:
    """LSRK radio velocity of each channel, m/s: ``c (RESTFREQ - f_i) / RESTFREQ + VFRAME``.

    References
    ----------
    Greisen et al. 2006, A&A 446, 747, table 1 (radio convention, VRAD).
    """
    f = frequency_axis_hz(crval1, cdelt1, crpix1, nchan)
    return radio_velocity_m_s(f, restfreq) + vframe_m_s


def scan_average_lsrk(data: np.ndarray, flagged: np.ndarray, crval1: np.ndarray,
                      cdelt1: np.ndarray, crpix1: np.ndarray, restfreq: np.ndarray,
                      vframe_m_s: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """Average the rows of a scan on the LSRK velocity grid of its first row.

    Parameters
    ----------
    data : (nrow, nchan) array
    flagged : (nrow, nchan) bool array; flagged or non-finite channels get no weight
    crval1, cdelt1, crpix1, restfreq, vframe_m_s : (nrow,) arrays, per-row axis description

    Returns
    -------
    v_grid_m_s : (nchan,) LSRK radio velocity of the first row's channels, m/s
    mean : (nchan,) equal-weight average (NaN where no row has an unflagged value)
    """
    data = np.asarray(data, dtype=np.float64)
    nrow, nchan = data.shape
    good = ~np.asarray(flagged, dtype=bool) & np.isfinite(data)
    clean = np.where(good, data, 0.0)
    v_grid = velocity_axis_lsrk_m_s(crval1[0], cdelt1[0], crpix1[0], restfreq[0], vframe_m_s[0],
                                    nchan)
    num = np.zeros(nchan)
    den = np.zeros(nchan)
    for k in range(nrow):
        v = velocity_axis_lsrk_m_s(crval1[k], cdelt1[k], crpix1[k], restfreq[k], vframe_m_s[k],
                                   nchan)
        order = np.argsort(v)  # np.interp needs increasing abscissae; CDELT1 > 0 makes v fall
        num += np.interp(v_grid, v[order], clean[k][order], left=0.0, right=0.0)
        den += np.interp(v_grid, v[order], good[k][order].astype(float), left=0.0, right=0.0)
    with np.errstate(invalid="ignore", divide="ignore"):
        mean = np.where(den > 1e-9, num / den, np.nan)
    return v_grid, mean


def velocity_wcs_m_s(crval1: float, cdelt1: float, restfreq: float, vframe_m_s: float) -> tuple:
    """(CRVAL1A, CDELT1A) of the LSRK radio-velocity alternate axis, m/s (CRPIX1A = CRPIX1).

    ``CRVAL1A = c (RESTFREQ - CRVAL1) / RESTFREQ + VFRAME``, ``CDELT1A = -c CDELT1 / RESTFREQ``
    (Greisen et al. 2006, radio convention, linear in frequency).
    """
    return (C_M_S * (restfreq - crval1) / restfreq + vframe_m_s, -C_M_S * cdelt1 / restfreq)


def monotonic_axis(values: npt.ArrayLike, name: str, size: int | None = None) -> np.ndarray:
    """``values`` as a float64 copy, checked to be a 1-D, finite, strictly monotonic axis.

    Raises ValueError naming ``name`` (one line): not 1-D or not of length ``size``, fewer than
    2 values, a non-finite value, or not strictly increasing or decreasing.
    """
    x = np.array(values, dtype=np.float64)
    if x.ndim != 1 or (size is not None and x.size != size):
        raise ValueError(f"{name} must be 1-D of length {size if size is not None else 'n'}; "
                         f"got shape {x.shape}")
    if x.size < 2 or not np.all(np.isfinite(x)):
        raise ValueError(f"{name} must hold at least 2 finite values; got {x.size} values, "
                         f"{int(np.sum(~np.isfinite(x)))} non-finite")
    dx = np.diff(x)
    if not (np.all(dx > 0) or np.all(dx < 0)):
        raise ValueError(f"{name} must be strictly monotonic (increasing or decreasing); it is not")
    return x
