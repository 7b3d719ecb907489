"""Polynomial baseline of a calibrated spectrum, fitted over its line-free channels.

A folded frequency-switched spectrum in kelvin still carries a slow residual shape (standing
waves, imperfect band-pass cancellation, continuum slope). This module fits a low-order
polynomial to the channels that hold no line and keeps it as a separate product, a
:class:`BaselineFit`: the spectrum passed in is never modified, and :meth:`BaselineFit.subtract`
returns a new array.

Model and fit
-------------
With the abscissa x (e.g. LSRK velocity, km/s) mapped linearly onto the scaled variable
u in [-1, 1] over the whole axis,

    u = (2 x - (x_lo + x_hi)) / (x_hi - x_lo),     B(x) = sum_{k=0}^{p} c_k u^k,

the coefficients c_k minimise sum_{i in L} (T_i - B(x_i))^2 over the line-free set L
(``numpy.polynomial.Polynomial.fit`` with ``domain=(x_lo, x_hi)``; the scaled variable keeps
the least-squares problem well conditioned up to p = 8).

Line-free channels
------------------
* User windows: L = unflagged channels with lo <= x_i <= hi for some window (lo, hi); one fit.
* Automatic: start from all unflagged channels and iterate

      r_i     = T_i - B(x_i)                                  (all unflagged channels)
      m       = median_{i in L} r_i
      sigma_r = 1.4826 median_{i in L} |r_i - m|              (robust sigma from the MAD)
      clip_i  = |r_i - m| > clip_sigma sigma_r                (both signs)
      L       = unflagged and not dilate(clip, d channels)

  until L stops changing (or ``max_iter``). Both signs are clipped because the emission line
  is positive and the fold ghosts of frequency switching are negative; the dilation by d
  channels on each side removes the line wings that lie below the clip level. A channel
  clipped in one iteration may come back in the next, since each mask is built afresh from
  the current fit. 1.4826 = 1 / Phi^-1(3/4) makes the MAD a consistent estimator of the
  Gaussian sigma (Rousseeuw & Croux 1993).

References
----------
Rousseeuw, P. J. & Croux, C. 1993, JASA 88, 1273 (median absolute deviation, factor 1.4826;
from memory).
Wilson, T. L., Rohlfs, K. & Huttemeister, S., *Tools of Radio Astronomy* (baselines of
single-dish spectra over line-free channels; common practice).
"""

from __future__ import annotations

import operator
from collections.abc import Iterable, Sequence
from dataclasses import dataclass

import numpy as np
import numpy.typing as npt
from numpy.polynomial import Polynomial

from spinflip.daemon.dsp.robust import robust_sigma
from spinflip.daemon.sky.spectral_axis import monotonic_axis

#: Highest polynomial order accepted.
MAX_ORDER = 8

_SCALED_WINDOW = (-1.0, 1.0)


@dataclass(frozen=True)
class BaselineFit:
    """A fitted polynomial baseline; the spectrum it came from is not part of it.

    Attributes
    ----------
    coef : float64[order + 1]
        Coefficients c_k of the power series in the scaled variable u (see module notes).
    domain : (float, float)
        (x_lo, x_hi), the abscissa range mapped onto u in [-1, 1]: the whole axis.
    order : int
        Polynomial order p.
    line_free : bool[nchan]
        Channels the final fit used.
    rms_k : float
        sqrt(mean r_i^2) of the residuals over the line-free channels, K (no degrees-of-freedom
        correction; with hundreds of channels it is below 1 %).
    x : float64[nchan]
        The abscissa of the fitted spectrum (a copy), used by :meth:`subtract`.
    iterations : int
        Fits made (1 with user windows).
    converged : bool
        The line-free mask stopped changing (always True with user windows).
    """

    coef: np.ndarray
    domain: tuple[float, float]
    order: int
    line_free: np.ndarray
    rms_k: float
    x: np.ndarray
    iterations: int
    converged: bool

    def model(self, x: npt.ArrayLike) -> np.ndarray:
        """Baseline B(x) in K at abscissa values ``x`` (any shape, same unit as the fit's x).

        B(x) = sum_k c_k u^k with u = (2 x - (x_lo + x_hi)) / (x_hi - x_lo).
        """
        poly = Polynomial(self.coef, domain=self.domain, window=_SCALED_WINDOW)
        return poly(np.asarray(x, dtype=np.float64))

    def subtract(self, data: npt.ArrayLike) -> np.ndarray:
        """Return a new array ``data - B(x)`` over the fitted axis; ``data`` is not modified.

        Parameters
        ----------
        data : array_like, float[nchan]
            A spectrum on the same axis as the fit (K).

        Returns
        -------
        float64[nchan]
            Baseline-subtracted spectrum, K.
        """
        d = np.asarray(data, dtype=np.float64)
        if d.shape != self.x.shape:
            raise ValueError(f"data shape {d.shape} does not match the fitted axis "
                             f"{self.x.shape}; pass a spectrum on the same channels")
        return d - self.model(self.x)


def fit_baseline(data_k: npt.ArrayLike, flagged: npt.ArrayLike, x: npt.ArrayLike, order: int,
                 windows: Iterable[Sequence[float]] | None = None, clip_sigma: float = 3.0,
                 dilate: int = 3, max_iter: int = 10) -> BaselineFit:
    """Fit a polynomial baseline to the line-free channels of a spectrum.

    Parameters
    ----------
    data_k : array_like, float[nchan]
        Calibrated spectrum, K. Read only; never modified.
    flagged : array_like, bool[nchan]
        Channels to leave out (RFI, DC, no fold partner). Non-finite data are left out too.
    x : array_like, float[nchan]
        Abscissa, strictly monotonic in either direction (e.g. LSRK velocity, km/s).
    order : int
        Polynomial order p, 0 .. 8.
    windows : sequence of (lo, hi) pairs, optional
        Line-free ranges in the unit of ``x``, each with lo < hi and inside the axis range.
        None: find the line-free channels automatically (iterative clipping, module notes).
    clip_sigma : float
        Automatic mode: clip residuals farther than ``clip_sigma`` robust sigmas from their
        median, either sign. Must be > 0.
    dilate : int
        Automatic mode: grow the clipped mask by this many channels on each side, >= 0.
    max_iter : int
        Automatic mode: at most this many fits, >= 1.

    Returns
    -------
    BaselineFit

    Raises
    ------
    ValueError
        Order outside 0..8; fewer than 2 (order + 1) line-free channels; a window with
        lo >= hi or reaching outside the axis; mismatched shapes; a non-monotonic axis.

    Notes
    -----
    Least squares in the scaled variable u (module notes) with ``Polynomial.fit``. The
    requirement of 2 (p + 1) line-free channels leaves at least as many degrees of freedom
    for the residual rms as there are coefficients.
    """
    order = _check_order(order)
    data = np.asarray(data_k, dtype=np.float64)
    flag = np.asarray(flagged, dtype=bool)
    if data.ndim != 1 or flag.shape != data.shape:
        raise ValueError(f"data_k and flagged must be 1-D of one length; got shapes "
                         f"{data.shape}, {flag.shape}")
    xs = monotonic_axis(x, "x", data.size)      # a copy: the fit keeps it
    x_lo, x_hi = float(xs.min()), float(xs.max())
    domain = (x_lo, x_hi)
    usable = ~flag & np.isfinite(data)
    need = 2 * (order + 1)

    if windows is not None:
        in_window = _window_mask(xs, windows, x_lo, x_hi)
        keep = usable & in_window
        _check_count(keep, need, order, "inside the windows")
        poly = _fit(xs, data, keep, order, domain)
        return _result(poly, domain, order, keep, xs, data, iterations=1, converged=True)

    if not clip_sigma > 0:
        raise ValueError(f"clip_sigma must be > 0; got {clip_sigma!r}")
    dilate = _check_int(dilate, "dilate", 0)
    max_iter = _check_int(max_iter, "max_iter", 1)
    keep = usable.copy()
    _check_count(keep, need, order, "unflagged")
    # below this the residuals are rounding error: nothing is left to clip
    sigma_floor_k = 1e3 * np.finfo(np.float64).eps * max(float(np.max(np.abs(data[usable]))), 1.0)
    converged = False
    iterations = 0
    while True:
        poly = _fit(xs, data, keep, order, domain)
        iterations += 1
        if iterations >= max_iter:
            break
        resid_k = data - poly(xs)
        m_k = np.median(resid_k[keep])
        sigma_k = robust_sigma(resid_k[keep])   # 1.4826 MAD (dsp.robust)
        if sigma_k <= sigma_floor_k:
            converged = True
            break
        clip = usable & (np.abs(resid_k - m_k) > clip_sigma * sigma_k)
        new_keep = usable & ~_dilate(clip, dilate)
        if np.array_equal(new_keep, keep):
            converged = True
            break
        _check_count(new_keep, need, order, "left after clipping (set windows or lower the order)")
        keep = new_keep
    return _result(poly, domain, order, keep, xs, data, iterations, converged)


# -- helpers ------------------------------------------------------------------------------------
def _check_order(order: int) -> int:
    if isinstance(order, bool):
        raise ValueError(f"order must be an integer 0..{MAX_ORDER}; got {order!r}")
    try:
        p = operator.index(order)
    except TypeError:
        raise ValueError(f"order must be an integer 0..{MAX_ORDER}; got {order!r}") from None
    if not 0 <= p <= MAX_ORDER:
        raise ValueError(f"order must be an integer 0..{MAX_ORDER}; got {p}")
    return p


def _check_int(value: int, name: str, lowest: int) -> int:
    try:
        v = operator.index(value)
    except TypeError:
        raise ValueError(f"{name} must be an integer >= {lowest}; got {value!r}") from None
    if isinstance(value, bool) or v < lowest:
        raise ValueError(f"{name} must be an integer >= {lowest}; got {value!r}")
    return v


def _check_count(keep: np.ndarray, need: int, order: int, where: str) -> None:
    n = int(keep.sum())
    if n < need:
        raise ValueError(f"too few line-free channels for order {order}: {n} {where}, "
                         f"need at least {need} = 2 (order + 1)")


def _window_mask(xs: np.ndarray, windows: Iterable[Sequence[float]], x_lo: float,
                 x_hi: float) -> np.ndarray:
    """Channels inside any window (lo <= x <= hi); each window checked against the axis."""
    pairs = list(windows)
    if not pairs:
        raise ValueError("windows must hold at least one (lo, hi) pair; got none "
                         "(pass None for automatic line-free channels)")
    mask = np.zeros(xs.shape, dtype=bool)
    for w in pairs:
        try:
            lo, hi = (float(v) for v in w)
        except (TypeError, ValueError):
            raise ValueError(f"each window must be a (lo, hi) pair of numbers; got {w!r}") from None
        if not lo < hi:
            raise ValueError(f"window ({lo:g}, {hi:g}) must have lo < hi")
        if lo < x_lo or hi > x_hi:
            raise ValueError(f"window ({lo:g}, {hi:g}) reaches outside the axis "
                             f"[{x_lo:g}, {x_hi:g}]; windows must lie inside it")
        mask |= (xs >= lo) & (xs <= hi)
    return mask


def _dilate(mask: np.ndarray, d: int) -> np.ndarray:
    """Grow True runs of ``mask`` by ``d`` channels on each side."""
    if d == 0 or not mask.any():
        return mask
    grown = np.convolve(mask.astype(np.int64), np.ones(2 * d + 1, dtype=np.int64), mode="same")
    return grown > 0


def _fit(xs: np.ndarray, data: np.ndarray, keep: np.ndarray, order: int,
         domain: tuple[float, float]) -> Polynomial:
    # least squares for c_k in u = scaled x (module notes)
    return Polynomial.fit(xs[keep], data[keep], deg=order, domain=domain, window=_SCALED_WINDOW)


def _result(poly: Polynomial, domain: tuple[float, float], order: int, keep: np.ndarray,
            xs: np.ndarray, data: np.ndarray, iterations: int, converged: bool) -> BaselineFit:
    resid_k = data[keep] - poly(xs[keep])
    rms_k = float(np.sqrt(np.mean(resid_k ** 2)))           # rms over the line-free channels
    coef = np.zeros(order + 1)
    coef[:poly.coef.size] = poly.coef                       # Polynomial may trim trailing zeros
    return BaselineFit(coef=coef, domain=domain, order=order, line_free=keep.copy(),
                       rms_k=rms_k, x=xs, iterations=iterations, converged=converged)
