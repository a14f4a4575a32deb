"""Least-squares fits of many windows of many progress curves at once, from running sums.

A window [s, e) of a progress curve (reads s … e − 1) is fitted by a line or a quadratic in the
scaled time x = (t − t₀) / (t_last − t₀). The normal equations of any window need only the sums
Σxᵏ (k ≤ 4, the same for every well) and Σxᵏ·y (k ≤ 2) and Σy² (per well); running (prefix) sums
give every window's sums as a difference, so a whole read costs O(reads) per well, whatever
windows are asked for. The absorbances are taken relative to each well's first read, so the
sums stay far from round-off (an absorbance of 2 AU read to 0.0001 AU is 4·10⁴ steps; float64
keeps 16 digits).

Fits (ordinary least squares, Draper & Smith, Applied Regression Analysis, 3rd ed., ch. 5):
β = (XᵀX)⁻¹Xᵀy, SSR = Σy² − βᵀXᵀy, σ̂² = SSR / (n − p), Cov β = σ̂²(XᵀX)⁻¹.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np
import numpy.typing as npt

FloatArray = npt.NDArray[np.float64]
IntArray = npt.NDArray[np.int64]


@dataclass(frozen=True)
class RunningSums:
    """Prefix sums of one plate: index i holds the sum over reads 0 … i − 1."""

    x: FloatArray  # (T,) scaled times
    span_min: float  # t_last − t₀ in minutes: slope per min = slope per x / span
    powers: FloatArray  # (5, T + 1): Σxᵏ, k = 0 … 4
    moments: FloatArray  # (W, 3, T + 1): Σxᵏ·y, k = 0 … 2
    squares: FloatArray  # (W, T + 1): Σy²
    y0: FloatArray  # (W,) each well's first read, subtracted from y


def running_sums(t_min: FloatArray, a: FloatArray, usable_n: IntArray) -> RunningSums:
    """Prefix sums of every well; reads from ``usable_n`` on count as 0 (never inside a window)."""
    span = float(t_min[-1] - t_min[0]) if t_min.size > 1 else 1.0
    x = (t_min - t_min[0]) / span
    keep = np.arange(t_min.size)[None, :] < usable_n[:, None]
    y0 = np.where(np.isfinite(a[:, 0]), a[:, 0], 0.0)
    y = np.where(keep, a - y0[:, None], 0.0)
    zero = np.zeros((1,))
    powers = np.stack([np.concatenate([zero, np.cumsum(x**k)]) for k in range(5)])
    lead = np.zeros((a.shape[0], 1))
    moments = np.stack(
        [np.concatenate([lead, np.cumsum(y * x**k, axis=1)], axis=1) for k in range(3)], axis=1
    )
    squares = np.concatenate([lead, np.cumsum(y * y, axis=1)], axis=1)
    return RunningSums(x, span, powers, moments, squares, y0)


@dataclass(frozen=True)
class WindowFits:
    """Fits of one window per row (rows are wells, or wells × starts, flattened by the caller).

    ``beta`` holds the coefficients in scaled time (intercept, slope, curvature); ``cov_unit``
    is (XᵀX)⁻¹, to be multiplied by σ̂². Derivatives are taken at the window's first read.
    """

    n: IntArray
    params: int
    beta: FloatArray  # (R, p)
    cov_unit: FloatArray  # (R, p, p)
    ssr: FloatArray  # (R,)
    sst: FloatArray  # (R,)
    x_start: FloatArray  # (R,)
    x_end: FloatArray  # (R,)

    @property
    def dof(self) -> IntArray:
        return self.n - self.params

    @property
    def sigma2(self) -> FloatArray:
        with np.errstate(invalid="ignore", divide="ignore"):
            return np.where(self.dof > 0, np.maximum(self.ssr, 0.0) / np.maximum(self.dof, 1), np.nan)

    def start_slope(self) -> tuple[FloatArray, FloatArray]:
        """dy/dx at the window's first read and its variance (gᵀ Cov g, g = (0, 1, 2x_s))."""
        if self.params == 2:
            return self.beta[:, 1], self.sigma2 * self.cov_unit[:, 1, 1]
        g2 = 2.0 * self.x_start
        slope = self.beta[:, 1] + g2 * self.beta[:, 2]
        c = self.cov_unit
        var_unit = c[:, 1, 1] + 2.0 * g2 * c[:, 1, 2] + g2 * g2 * c[:, 2, 2]
        return slope, self.sigma2 * var_unit

    def curvature_t(self) -> FloatArray:
        """Student's t of the quadratic coefficient (0 for a line)."""
        if self.params == 2:
            return np.zeros(self.n.shape)
        with np.errstate(invalid="ignore", divide="ignore"):
            return self.beta[:, 2] / np.sqrt(self.sigma2 * self.cov_unit[:, 2, 2])

    def slope_change(self) -> tuple[FloatArray, FloatArray]:
        """Change of dy/dx across the window, 2β₂(x_e − x_s), and its SE (0 for a line)."""
        if self.params == 2:
            zero = np.zeros(self.n.shape)
            return zero, zero
        width = self.x_end - self.x_start
        with np.errstate(invalid="ignore"):
            se = 2.0 * width * np.sqrt(self.sigma2 * self.cov_unit[:, 2, 2])
        return 2.0 * self.beta[:, 2] * width, se

    def r2(self) -> FloatArray:
        with np.errstate(invalid="ignore", divide="ignore"):
            return np.where(self.sst > 0, 1.0 - self.ssr / self.sst, np.nan)

    def fitted_rise(self) -> FloatArray:
        """Fitted y at the window's last read minus fitted y at its first."""
        rise = self.beta[:, 1] * (self.x_end - self.x_start)
        if self.params == 3:
            rise = rise + self.beta[:, 2] * (self.x_end**2 - self.x_start**2)
        return rise


def fit_windows(sums: RunningSums, wells: IntArray, start: IntArray, stop: IntArray, params: int) -> WindowFits:
    """Fit window [start, stop) of each listed well by a polynomial with ``params`` terms (2 or 3).

    All arrays have one entry per row; a row whose window has ≤ ``params`` reads gets NaN.
    """
    k = params
    p = sums.powers[:, stop] - sums.powers[:, start]  # (5, R)
    xtx = np.empty((start.size, k, k))
    for i in range(k):
        for j in range(k):
            xtx[:, i, j] = p[i + j]
    xty = np.stack([sums.moments[wells, i, stop] - sums.moments[wells, i, start] for i in range(k)], axis=1)
    syy = sums.squares[wells, stop] - sums.squares[wells, start]
    n = (stop - start).astype(np.int64)
    ok = n > k
    safe = np.where(ok[:, None, None], xtx, np.eye(k)[None, :, :])
    cov_unit = np.linalg.inv(safe)
    beta = np.einsum("rij,rj->ri", cov_unit, xty)
    ssr = syy - np.einsum("ri,ri->r", beta, xty)
    with np.errstate(invalid="ignore", divide="ignore"):
        sst = syy - xty[:, 0] ** 2 / np.maximum(n, 1)
    nan = ~ok
    beta[nan] = np.nan
    ssr[nan] = np.nan
    x_start = sums.x[np.minimum(start, sums.x.size - 1)]
    x_end = sums.x[np.clip(stop - 1, 0, sums.x.size - 1)]
    return WindowFits(n, k, beta, cov_unit, ssr, sst, x_start, x_end)


def prefix_rises(sums: RunningSums, min_points: int, max_reads: IntArray) -> FloatArray:
    """Fitted rise (quadratic) over reads 0 … n − 1 for every n, per well: (W, T + 1), NaN where n < min_points.

    One batched solve per prefix length (the XᵀX of a prefix is the same for every well).
    """
    wells, reads = sums.moments.shape[0], sums.x.size
    out = np.full((wells, reads + 1), np.nan)
    n_all = np.arange(max(min_points, 4), reads + 1)
    if n_all.size == 0:
        return out
    p = sums.powers[:, n_all]  # (5, L)
    xtx = np.stack([np.stack([p[i + j] for j in range(3)], axis=-1) for i in range(3)], axis=-2)  # (L, 3, 3)
    inv = np.linalg.inv(xtx)
    xty = sums.moments[:, :, n_all]  # (W, 3, L)
    beta = np.einsum("lij,wjl->wli", inv, xty)  # (W, L, 3)
    x_end = sums.x[n_all - 1]
    rise = beta[:, :, 1] * x_end + beta[:, :, 2] * x_end**2
    rise = np.where(n_all[None, :] <= max_reads[:, None], rise, np.nan)
    out[:, n_all] = rise
    return out
