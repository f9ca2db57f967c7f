"""Least-squares O2 slopes of closed windows from running sums, so logs of any size stream.

Rules of this module
--------------------
- A window's fit depends only on nine sums over its readings (n, Σx, Σx², Σx³, Σx⁴, Σy, Σxy,
  Σx²y, Σy²), so readings can be added chunk by chunk (:class:`SlopeSums`) and the fit taken
  at the end (:func:`fit_sums`). :func:`fit_o2_slope` is the same fit on whole arrays and is
  what tests compare with ``numpy.polyfit`` and ``scipy.stats.linregress``.
- x is time in hours from a centre chosen before any data is seen (the middle of the fitted
  part of the window), y is O2 in µmol L⁻¹ minus the window's first reading. Both keep the
  sums small, so the differences of sums below lose no meaningful precision in float64.
- Pure: no I/O, no clock, no globals.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np
import numpy.typing as npt
from scipy import stats

__all__ = ["SlopeFit", "SlopeSums", "fit_o2_slope", "fit_sums"]

F = npt.NDArray[np.float64]
_SUM_NAMES = ("n", "sx", "sxx", "sx3", "sx4", "sy", "sxy", "sx2y", "syy")


class SlopeSums:
    """Running least-squares sums of many windows at once.

    Parameters
    ----------
    n_windows
        Number of windows, dimensionless.

    Attributes
    ----------
    sums
        Array of shape ``(9, n_windows)``: n, Σx, Σx², Σx³, Σx⁴, Σy, Σxy, Σx²y, Σy² with x in
        h and y in µmol L⁻¹ (see the module rules).
    """

    def __init__(self, n_windows: int) -> None:
        self.sums: F = np.zeros((len(_SUM_NAMES), n_windows))

    def add(self, window: npt.NDArray[np.intp], x_h: F, y: F) -> None:
        """Add readings to their windows.

        Parameters
        ----------
        window
            Index of each reading's window, dimensionless.
        x_h
            Time of each reading from its window's centre, h.
        y
            O2 of each reading minus its window's reference reading, µmol L⁻¹.
        """
        if len(window) == 0:
            return
        size = self.sums.shape[1]
        x2 = x_h * x_h
        for row, weights in enumerate(
            (None, x_h, x2, x2 * x_h, x2 * x2, y, x_h * y, x2 * y, y * y)
        ):
            self.sums[row] += np.bincount(window, weights=weights, minlength=size)


@dataclass(frozen=True, kw_only=True)
class SlopeFit:
    """Straight-line fit of O2 against time for one or many windows (arrays of equal length).

    Attributes
    ----------
    n
        Readings fitted, dimensionless.
    slope_umol_l_h
        Ordinary least-squares slope dC/dt, µmol L⁻¹ h⁻¹.
    slope_se_umol_l_h
        Its standard error, µmol L⁻¹ h⁻¹ (NaN with fewer than 3 readings).
    mean_x_h
        Mean time of the readings from the window centre, h.
    mean_y_umol_l
        Mean O2 minus the reference reading, µmol L⁻¹ (the line passes through the means).
    r2
        Coefficient of determination, dimensionless (NaN when O2 did not vary).
    quad_umol_l_h2
        Coefficient c of the quadratic fit a + b·x + c·x², µmol L⁻¹ h⁻².
    quad_p
        Two-sided p-value of the t-test of c = 0, dimensionless (NaN under 4 readings).
    """

    n: npt.NDArray[np.int64]
    slope_umol_l_h: F
    slope_se_umol_l_h: F
    mean_x_h: F
    mean_y_umol_l: F
    r2: F
    quad_umol_l_h2: F
    quad_p: F


def fit_sums(sums: F) -> SlopeFit:
    """Linear and quadratic least-squares fits from running sums.

    Parameters
    ----------
    sums
        Shape ``(9, n_windows)``, as :attr:`SlopeSums.sums` (x in h, y in µmol L⁻¹).

    Returns
    -------
    SlopeFit
        Arrays over windows; NaN where too few readings.

    Notes
    -----
    Slope b = Sxy/Sxx and its standard error √(s²/Sxx) with s² = SSE/(n − 2), the textbook
    ordinary least-squares formulas (e.g. Draper & Smith, *Applied Regression Analysis*,
    3rd ed., ch. 1, from memory). The quadratic term comes from the 3×3 normal equations;
    its p-value from Student's t with n − 3 degrees of freedom.
    """
    n, sx, sxx, sx3, sx4, sy, sxy, sx2y, syy = (np.asarray(s, dtype=float) for s in sums)
    count = n.astype(np.int64)
    with np.errstate(divide="ignore", invalid="ignore"):
        mx, my = sx / n, sy / n
        cxx = sxx - sx * mx
        cxy = sxy - sx * my
        cyy = syy - sy * my
        b = cxy / cxx
        sse = np.maximum(cyy - b * cxy, 0.0)
        se = np.where(n > 2, np.sqrt(sse / (n - 2) / cxx), np.nan)
        r2 = np.where(cyy > 0, 1.0 - sse / cyy, np.nan)
    b = np.where((n >= 2) & (cxx > 0), b, np.nan)
    se = np.where(np.isfinite(b), se, np.nan)
    quad, quad_p = _quadratic(n, sx, sxx, sx3, sx4, sy, sxy, sx2y, syy)
    return SlopeFit(
        n=count,
        slope_umol_l_h=b,
        slope_se_umol_l_h=se,
        mean_x_h=np.where(n > 0, mx, np.nan),
        mean_y_umol_l=np.where(n > 0, my, np.nan),
        r2=np.where(np.isfinite(b), r2, np.nan),
        quad_umol_l_h2=quad,
        quad_p=quad_p,
    )


def _quadratic(n: F, sx: F, sxx: F, sx3: F, sx4: F, sy: F, sxy: F, sx2y: F, syy: F) -> tuple[F, F]:
    """Quadratic coefficient and its two-sided p-value for every window (NaN if n < 4)."""
    size = len(n)
    quad = np.full(size, np.nan)
    p = np.full(size, np.nan)
    ok = n >= 4
    if not ok.any():
        return quad, p
    gram = np.stack(
        [
            np.stack([n, sx, sxx], axis=-1),
            np.stack([sx, sxx, sx3], axis=-1),
            np.stack([sxx, sx3, sx4], axis=-1),
        ],
        axis=-2,
    )[ok]
    rhs = np.stack([sy, sxy, sx2y], axis=-1)[ok]
    det = np.linalg.det(gram)
    good = np.abs(det) > 1e-12 * np.abs(gram[:, 0, 0] * gram[:, 1, 1] * gram[:, 2, 2])
    idx = np.flatnonzero(ok)[good]
    if len(idx) == 0:
        return quad, p
    gram, rhs = gram[good], rhs[good]
    inverse = np.linalg.inv(gram)
    beta = np.einsum("kij,kj->ki", inverse, rhs)
    sse = np.maximum(syy[idx] - np.einsum("ki,ki->k", beta, rhs), 0.0)
    dof = n[idx] - 3
    with np.errstate(divide="ignore", invalid="ignore"):
        se_c = np.sqrt(sse / dof * inverse[:, 2, 2])
        t = beta[:, 2] / se_c
    quad[idx] = beta[:, 2]
    # t is NaN only for 0/0 (an exact straight line): no curvature at all
    p[idx] = np.where(np.isnan(t), 1.0, 2.0 * stats.t.sf(np.abs(np.nan_to_num(t)), dof))
    return quad, p


def fit_o2_slope(t_s: npt.ArrayLike, o2_umol_l: npt.ArrayLike) -> SlopeFit:
    """Straight-line fit of one window's O2 readings against time.

    Parameters
    ----------
    t_s
        Time of each reading, s (any origin).
    o2_umol_l
        Dissolved O2, µmol L⁻¹; NaN readings are left out.

    Returns
    -------
    SlopeFit
        Length-1 arrays; ``mean_x_h`` is measured from the mean of ``t_s``.
    """
    t = np.asarray(t_s, dtype=float)
    y = np.asarray(o2_umol_l, dtype=float)
    keep = np.isfinite(t) & np.isfinite(y)
    t, y = t[keep], y[keep]
    sums = SlopeSums(1)
    if len(t):
        x_h = (t - t.mean()) / 3600.0
        sums.add(np.zeros(len(t), dtype=np.intp), x_h, y - y[0])
    return fit_sums(sums.sums)
