"""The linear-window search behind ``rates.initial_rates``, for all wells and starts at once.

For each window length n (from ``min_points`` up) every window of n consecutive reads of every
well is fitted by OLS and judged (R², curvature, the slope of the reads after it, against the
well's read noise); the earliest passing start wins, for that start the longest window. The
least-squares projections depend only on the read times, so they are computed once per length.
"""

from __future__ import annotations

from collections.abc import Iterator
from dataclasses import dataclass
from typing import TYPE_CHECKING

import numpy as np
import numpy.typing as npt
from numpy.lib.stride_tricks import sliding_window_view
from scipy import stats

if TYPE_CHECKING:
    from pipeline.science.rates import RateWindowSettings

FloatArray = npt.NDArray[np.float64]

# Residual SD below which a quadratic term is not judged (float round-off on exact data),
# far below any reader's resolution (0.0001 AU is common practice for plate readers).
RESIDUAL_SD_FLOOR_AU = 1e-9
# Upper bound on floats held per intermediate array (wells × starts × points).
_CHUNK_FLOATS = 2_000_000


@dataclass
class Best:
    """Per-well running best window (mutable scratch space inside one search)."""

    start: npt.NDArray[np.int64]
    n: npt.NDArray[np.int64]
    slope: FloatArray
    se: FloatArray
    intercept: FloatArray
    r2: FloatArray
    max_r2: FloatArray

    @classmethod
    def empty(cls, wells: int, reads: int) -> Best:
        nan = np.full(wells, np.nan)
        return cls(
            np.full(wells, reads),
            np.zeros(wells, dtype=np.int64),
            nan.copy(),
            nan.copy(),
            nan.copy(),
            nan.copy(),
            np.full(wells, -np.inf),
        )


def _window_chunks(wells: int, starts: int, n: int) -> Iterator[slice]:
    size = max(1, _CHUNK_FLOATS // max(1, starts * n))
    for first in range(0, wells, size):
        yield slice(first, min(wells, first + size))


def _read_noise(
    t: FloatArray, a: FloatArray, usable_n: npt.NDArray[np.int64]
) -> tuple[FloatArray, FloatArray]:
    """Robust read-to-read noise SD of each well, and its degrees of freedom.

    From third divided differences over four consecutive reads,
    d_i = Σ_j w_j·A_j / √(Σ_j w_j²) with w_j = 1 / Π_{k≠j}(t_j − t_k), j, k = i … i+3:
    any quadratic A(t) gives d = 0 and independent read noise of SD σ gives SD(d) = σ, so
    σ̂ = 1.4826 · median|d| over the usable reads (a smooth bend barely moves it, a stretch
    of sharp bending is outvoted by the median). Floored at a round-off level.
    """
    order = 4
    if a.shape[1] < order:
        return np.full(a.shape[0], RESIDUAL_SD_FLOOR_AU), np.ones(a.shape[0])
    tw = sliding_window_view(t, order)  # (m, 4)
    gaps = tw[:, :, None] - tw[:, None, :]
    gaps[:, np.arange(order), np.arange(order)] = 1.0
    weights = 1.0 / gaps.prod(axis=2)
    weights /= np.sqrt(np.sum(weights**2, axis=1, keepdims=True))
    with np.errstate(invalid="ignore"):
        d = np.einsum("wmk,mk->wm", sliding_window_view(a, order, axis=1), weights)
    last_read = np.arange(order - 1, a.shape[1])
    valid = (last_read[None, :] < usable_n[:, None]) & np.isfinite(d)
    count = valid.sum(axis=1)
    sd = np.full(a.shape[0], RESIDUAL_SD_FLOOR_AU)
    has = count > 0
    if np.any(has):
        abs_d = np.where(valid[has], np.abs(d[has]), np.nan)
        rough = 1.4826 * np.nanmedian(abs_d, axis=1, keepdims=True)
        kept = abs_d <= 3.5 * rough
        rms = np.sqrt(
            np.nansum(np.where(kept, abs_d**2, 0.0), axis=1) / np.maximum(kept.sum(axis=1), 1)
        )
        sd[has] = np.fmax(rms, RESIDUAL_SD_FLOOR_AU)
    return sd, np.maximum(count - 1, 1).astype(float)


@dataclass(frozen=True)
class _Plate:
    """Per-plate quantities shared by every window length of one search."""

    t: FloatArray
    a: FloatArray
    usable_n: npt.NDArray[np.int64]
    exempt_r2: npt.NDArray[np.bool_]
    noise_sd: FloatArray
    t_crit: FloatArray
    m: int  # reads per short run (min_points)
    local_slope: FloatArray  # slope of every run of m reads, (W, T − m + 1)
    local_se: FloatArray  # (T − m + 1,) SE of a run's slope per unit σ: 1 / √Σu²


def plate_quantities(
    t: FloatArray,
    a: FloatArray,
    usable_n: npt.NDArray[np.int64],
    exempt_r2: npt.NDArray[np.bool_],
    settings: RateWindowSettings,
) -> _Plate:
    """Noise level, critical t and the short-run slopes b_i = Σu·A / Σu² (SE = σ̂ / √Σu²)."""
    noise_sd, noise_dof = _read_noise(t, a, usable_n)
    t_crit = np.asarray(stats.t.ppf(1.0 - settings.curvature_alpha / 2.0, noise_dof), dtype=float)
    m = min(settings.min_points, t.size)
    tw = sliding_window_view(t, m)
    u = tw - tw.mean(axis=1, keepdims=True)
    suu = np.einsum("sn,sn->s", u, u)
    with np.errstate(invalid="ignore"):
        local = np.einsum("wsn,sn->ws", sliding_window_view(a, m, axis=1), u) / suu
    return _Plate(t, a, usable_n, exempt_r2, noise_sd, t_crit, m, local, 1.0 / np.sqrt(suu))


@dataclass(frozen=True)
class _Windows:
    """Read-time geometry of every window of n reads (S = T − n + 1 starts)."""

    n: int
    t_start: FloatArray  # (S,)
    u: FloatArray  # (S, n) centred times t − t̄
    suu: FloatArray  # (S,) Σu²
    half_span: FloatArray  # (S,)
    c2_projection: FloatArray  # (S, n) row of the quadratic's pseudo-inverse giving c₂
    c2_se_factor: FloatArray  # (S,) √[(XᵀX)⁻¹]₂₂


def _windows(t: FloatArray, n: int) -> _Windows:
    """Least-squares projections of every window of ``n`` reads; they depend on times only."""
    tw = sliding_window_view(t, n)
    u = tw - tw.mean(axis=1, keepdims=True)
    half_span = (tw[:, -1] - tw[:, 0]) / 2.0
    v = u / half_span[:, None]
    design = np.stack([np.ones_like(v), v, v * v], axis=2)  # (S, n, 3)
    inverse = np.linalg.inv(np.einsum("snk,snj->skj", design, design))
    return _Windows(
        n=n,
        t_start=tw[:, 0],
        u=u,
        suu=np.einsum("sn,sn->s", u, u),
        half_span=half_span,
        c2_projection=np.einsum("sk,snk->sn", inverse[:, 2, :], design),
        c2_se_factor=np.sqrt(inverse[:, 2, 2]),
    )


def _bent(
    plate: _Plate, rows: slice, win: _Windows, y: FloatArray, slope: FloatArray, limit: float
) -> npt.NDArray[np.bool_]:
    """Windows whose slope visibly changes by more than ``limit`` (relative to |b|).

    Each test needs both a change beyond the limit and a change beyond t·SE (σ̂-based):
    1. quadratic term, change = 4|c₂| / (h·|b|), SE(c₂) = σ̂·√[(XᵀX)⁻¹]₂₂;
    2. windows of ≥ 2·m reads: first against last m reads, |b_tail − b_head| / |b|;
    3. the next m usable reads after the window, |b_next − b| / |b|.
    """
    m = plate.m
    starts = win.t_start.size
    sd = plate.noise_sd[rows, None]
    t_crit = plate.t_crit[rows, None]
    local, local_se = plate.local_slope[rows], plate.local_se
    magnitude = np.abs(slope)

    c2 = np.abs(np.einsum("wsn,sn->ws", y, win.c2_projection))
    bent = (c2 > t_crit * sd * win.c2_se_factor) & ~(
        4.0 * c2 / (win.half_span * magnitude) <= limit
    )

    if win.n >= 2 * m:
        tail = slice(win.n - m, win.n - m + starts)
        diff = np.abs(local[:, tail] - local[:, :starts])
        se_diff = sd * np.hypot(local_se[:starts], local_se[tail])
        bent |= (diff > t_crit * se_diff) & ~(diff / magnitude <= limit)

    after = np.arange(starts) + win.n  # first read after each window
    has_next = after + m <= plate.t.size
    if np.any(has_next):
        k = after[has_next]
        jump = np.abs(local[:, k] - slope[:, has_next])
        se_jump = sd * np.sqrt(local_se[k] ** 2 + 1.0 / win.suu[has_next])
        next_usable = (k + m)[None, :] <= plate.usable_n[rows, None]
        bent[:, has_next] |= (
            next_usable & (jump > t_crit * se_jump) & (jump > limit * magnitude[:, has_next])
        )
    return bent


def scan_length(plate: _Plate, n: int, settings: RateWindowSettings, best: Best) -> None:
    """Fit every window of ``n`` reads in every well; keep the earliest passing start.

    Line: A = ȳ + b·u with u = t − t̄, b = Σu·A / Σu², SE(b) = √(SSR / (n − 2) / Σu²),
    R² = 1 − SSR / SST, intercept at t = 0: ȳ − b·t̄.
    """
    t = plate.t
    win = _windows(t, n)
    starts = win.t_start.size
    for rows in _window_chunks(plate.a.shape[0], starts, n):
        y = sliding_window_view(plate.a[rows], n, axis=1)  # (w, S, n)
        with np.errstate(invalid="ignore", divide="ignore"):
            ybar = y.mean(axis=2)
            slope = np.einsum("wsn,sn->ws", y, win.u) / win.suu
            centred = y - ybar[..., None]
            ssr = np.sum((centred - slope[..., None] * win.u) ** 2, axis=2)
            sst = np.sum(centred**2, axis=2)
            r2 = np.where(sst > 0, 1.0 - ssr / sst, np.nan)
            se = np.sqrt(ssr / (n - 2) / win.suu)
            bent = _bent(plate, rows, win, y, slope, settings.max_slope_change)

        usable = (np.arange(starts) + n)[None, :] <= plate.usable_n[rows, None]
        read_span = t[np.maximum(plate.usable_n[rows] - 1, 0)] - t[0]
        early = (win.t_start - t[0])[None, :] <= settings.max_start_fraction * read_span[:, None]
        best.max_r2[rows] = np.fmax(best.max_r2[rows], np.where(usable, r2, -np.inf).max(axis=1))
        linear = (r2 >= settings.min_r2) | plate.exempt_r2[rows, None]
        passes = usable & early & linear & ~bent & np.isfinite(slope)
        found = passes.any(axis=1)
        first = passes.argmax(axis=1)
        # Lengths arrive in increasing order: an equal start with more reads replaces the old.
        idx = np.flatnonzero(found & (first <= best.start[rows]))
        if idx.size == 0:
            continue
        target = np.arange(rows.start, rows.stop)[idx]
        s = first[idx]
        best.start[target] = s
        best.n[target] = n
        best.slope[target] = slope[idx, s]
        best.se[target] = se[idx, s]
        best.intercept[target] = ybar[idx, s] - slope[idx, s] * (t[s] - win.u[s, 0])
        best.r2[target] = r2[idx, s]
