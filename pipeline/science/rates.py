"""Initial rates from kinetic plate reads: a window from the start of the read, fitted honestly.

A kinetic read gives A(t) per well at read times shared by the whole plate. The initial rate is
dA/dt at the first read, in AU/min (docs/assay-rules.md, "Initial rates"). With m = ``min_points``:

* usable reads are those before the first read at or above ``linear_limit_au`` (the reader's
  linear range) or the first non-finite read (an overflow exported as a blank cell);
* the window always starts at the first read. It ends before the read at which the substrate
  converted, (fitted ΔA / (ε·l)) / S₀, first exceeds ``max_conversion`` (default 10 %): under
  Michaelis–Menten kinetics the rate has then fallen by at most that fraction (v(S)/v(S₀) ≥ S/S₀);
* the window is fitted by a quadratic A = β₀ + β₁·t + β₂·t², and the rate is β₁ (the slope at
  the first read). The bend that substrate depletion puts into the window is a fitted term, not
  a bias, so the slope's SE (from n − 3 degrees of freedom) includes the allowed curvature and a
  95 % interval slope ± t·SE holds its coverage (tests/test_rate_truth.py, by simulation);
* a window of fewer than m reads is not fitted: the well is flagged with the reason (too fast for
  the conversion limit, saturated, unreadable) — never fitted on a shorter, noisier stretch;
* curvature test: r, the change of slope across the window, 2·β₂·(t_end − t_start), relative to
  β₁, with its SE from the quadratic fit. An acceleration that exceeds ``max_slope_change``
  significantly (one-sided Student's t at ``curvature_alpha``, n − 3 df) is a lag (depletion
  never speeds a reaction up); a slowing that exceeds ``max_slope_change`` plus the window's
  conversion significantly is a burst. Its power is stated per well: the change found with 80 %
  probability, allowance + (t₁₋α + t₀.₈)·SE(r). The method says what a
  lag or burst well does: ``exclude`` (flagged, with the reason) or ``steady-state``, stated as
  such: after a lag, the hysteretic progress curve fitted over the window from the first read
  with its time constant τ, whose asymptotic slope at the starting substrate is the rate
  (``pipeline.science.lag_fits``; a lag too long for the window to last 3 τ stays flagged with
  that reason); after a burst, the slope at the first later start from which the window no
  longer bends so;
* blank wells (no enzyme) are fitted by a straight line over their whole usable read, or over the
  method's fixed ``blank_window_min``, so that no blank window is chosen from noise.

Cost: running sums give every window's normal equations in O(1), so a plate costs O(reads) per
well (``pipeline.science.progress_fits``); a lag well's hysteretic fit is O(reads) too.
"""

from __future__ import annotations

from collections.abc import Sequence
from typing import Any

import numpy as np
import numpy.typing as npt
from scipy import stats

from pipeline.errors import CalculationError, InputError
from pipeline.science.lag_fits import fit_lags
from pipeline.science.progress_fits import WindowFits, fit_windows, prefix_rises, running_sums
from pipeline.science.rate_types import (
    POWER,
    ROUND_OFF_AU,
    BlankCorrection,
    RateFlag,
    RateShape,
    RateWindowSettings,
    ShapeAction,
    SlopeKind,
    WellRate,
)
from pipeline.science.rate_wording import well_result
from pipeline.science.read_noise import read_noise

__all__ = ["BlankCorrection", "RateFlag", "RateWindowSettings", "ShapeAction", "SlopeKind", "WellRate",
           "blank_corrected", "initial_rates"]

FloatArray = npt.NDArray[np.float64]
IntArray = npt.NDArray[np.int64]
# --------------------------------------------------------------------------- inputs


def _validated(
    time_min: npt.ArrayLike, absorbance: npt.ArrayLike, wells: Sequence[str]
) -> tuple[FloatArray, FloatArray, tuple[str, ...]]:
    try:
        t = np.asarray(time_min, dtype=float)
        a = np.asarray(absorbance, dtype=float)
    except (TypeError, ValueError) as exc:
        raise InputError(f"read times and absorbances must be numbers: {exc}") from exc
    if a.ndim == 1:
        a = a[None, :]
    if t.ndim != 1 or a.ndim != 2 or a.shape[1] != t.shape[0]:
        raise InputError(
            f"absorbance must have one row per well and one column per read time; received "
            f"{a.shape} absorbances for {t.shape} read times"
        )
    names = (wells,) if isinstance(wells, str) else tuple(wells)
    if len(names) != a.shape[0]:
        raise InputError(f"{len(names)} well names given for {a.shape[0]} absorbance traces")
    if len(set(names)) != len(names):
        seen: set[str] = set()
        twice = sorted({w for w in names if w in seen or seen.add(w)})  # type: ignore[func-returns-value]
        raise InputError(f"well names must be unique; repeated: {twice}")
    if not np.all(np.isfinite(t)) or np.any(np.diff(t) <= 0):
        raise InputError(f"read times must be finite and strictly increasing; received {t.tolist()}")
    return t, a, names


def _substrates(substrate_mm: npt.ArrayLike | None, wells: int) -> FloatArray:
    if substrate_mm is None:
        return np.full(wells, np.nan)
    s = np.asarray([np.nan if v is None else v for v in np.atleast_1d(np.asarray(substrate_mm, dtype=object))],
                   dtype=float)
    if s.shape != (wells,):
        raise InputError(f"{s.size} substrate concentrations given for {wells} wells")
    return s


# --------------------------------------------------------------------------- the search


def _shape(fits: WindowFits, slope: FloatArray, conversion: FloatArray, settings: RateWindowSettings,
           noise: tuple[FloatArray, FloatArray], early_slope: FloatArray) -> RateShape:
    """Lag and burst: a change of slope beyond its allowance, or a shape no quadratic follows.

    With r the change relative to the rate and SE(r) its standard error, a lag is
    (r − a) / SE(r) > t₁₋α (a = ``max_slope_change``) and a burst (−r − a − conversion) / SE(r) > t₁₋α,
    one-sided at ``curvature_alpha``: a bend inside the allowance is flagged in at most α of wells.
    The change found with 80 % probability is the allowance plus (t₁₋α + t₀.₈)·SE(r).
    A sharp lag or burst bends the curve where no quadratic follows it: the quadratic's residual
    variance is then above the well's read-noise variance, F = σ̂²/σ̂²_noise > F₁₋α; it is a lag when
    the first reads rise more slowly than the fitted start slope, a burst when faster.
    """
    change, change_se = fits.slope_change()
    dof = np.maximum(fits.dof, 1)
    t_crit = stats.t.ppf(1.0 - settings.curvature_alpha, dof)
    t_power = stats.t.ppf(POWER, dof)
    allowed_drop = settings.max_slope_change + np.nan_to_num(conversion, nan=0.0)
    noise_sd, noise_dof = noise
    with np.errstate(invalid="ignore", divide="ignore"):
        relative = change * np.sign(slope) / np.abs(slope)
        relative_se = change_se / np.abs(slope)
        detectable = settings.max_slope_change + (t_crit + t_power) * relative_se
        lag = (relative - settings.max_slope_change) > t_crit * relative_se
        burst = (-relative - allowed_drop) > t_crit * relative_se
        misfit = fits.sigma2 / noise_sd**2 > stats.f.ppf(1.0 - settings.curvature_alpha, dof, noise_dof)
        slower_start = early_slope * np.sign(slope) < np.abs(slope)
    misfit &= (fits.dof > 0) & (fits.sigma2 > ROUND_OFF_AU**2)
    lag |= misfit & slower_start
    burst |= misfit & ~slower_start
    return RateShape(relative, detectable, lag & np.isfinite(relative), burst & np.isfinite(relative))


def _steady_starts(sums: Any, wells: IntArray, stop: IntArray, conversion: FloatArray,
                   settings: RateWindowSettings, noise: tuple[FloatArray, FloatArray]) -> tuple[IntArray, WindowFits | None]:
    """For each listed well, the first later start whose window to ``stop`` no longer bends (−1: none)."""
    m = settings.min_points
    reads = sums.x.size
    starts = np.arange(1, reads)
    rows_w = np.repeat(wells, starts.size)
    rows_s = np.tile(starts, wells.size)
    rows_e = np.repeat(stop, starts.size)
    fits = fit_windows(sums, rows_w, rows_s, np.maximum(rows_e, rows_s + 1), 3)
    slope, _ = fits.start_slope()
    early = fit_windows(sums, rows_w, rows_s, np.minimum(rows_s + m, rows_e), 2).start_slope()[0]
    shape = _shape(fits, slope, np.repeat(conversion, starts.size), settings,
                   (np.repeat(noise[0], starts.size), np.repeat(noise[1], starts.size)), early)
    good = ((rows_e - rows_s) >= m) & ~shape.lag & ~shape.burst & np.isfinite(slope)
    good = good.reshape(wells.size, starts.size)
    found = good.any(axis=1)
    first = np.where(found, starts[good.argmax(axis=1)], -1)
    if not found.any():
        return first, None
    pick = np.flatnonzero(found)
    chosen = fit_windows(sums, wells[pick], first[pick], stop[pick], 3)
    return first, chosen


def initial_rates(
    time_min: npt.ArrayLike,
    absorbance: npt.ArrayLike,
    wells: Sequence[str],
    settings: RateWindowSettings | None = None,
    *,
    blank_wells: Sequence[str] = (),
    substrate_mm: npt.ArrayLike | None = None,
    au_per_mm: float | None = None,
) -> tuple[WellRate, ...]:
    """Initial rate of every well of a plate (see the module text for the rules).

    ``time_min`` has shape (T,), ``absorbance`` shape (W, T), ``wells`` W names;
    ``substrate_mm`` the starting substrate of each well (None or NaN: unknown, no conversion
    limit) and ``au_per_mm`` = ε·l, the absorbance of 1 mM product. Wells named in
    ``blank_wells`` get a straight line over their whole read (or the fixed blank window).
    """
    settings = settings or RateWindowSettings()
    t, a, names = _validated(time_min, absorbance, wells)
    unknown_blanks = sorted(set(blank_wells) - set(names))
    if unknown_blanks:
        raise InputError(f"blank well(s) {unknown_blanks} are not among the plate's wells")
    if au_per_mm is not None and not (np.isfinite(au_per_mm) and au_per_mm != 0):
        raise InputError(f"ε·l must be a finite, non-zero absorbance per mM; received {au_per_mm!r}")
    n_wells, n_reads = a.shape
    s0 = _substrates(substrate_mm, n_wells)
    m = settings.min_points

    not_number = ~np.isfinite(a)
    saturated = ~not_number & (a >= settings.linear_limit_au)
    stop_read = not_number | saturated
    usable_n = np.where(stop_read.any(axis=1), stop_read.argmax(axis=1), n_reads).astype(np.int64)
    is_blank = np.isin(np.asarray(names, dtype=object), np.asarray(tuple(blank_wells), dtype=object))
    sums = running_sums(t, a, usable_n)

    # Window ends: the conversion limit for enzyme wells, the whole read (or fixed window) for blanks.
    capacity = abs(au_per_mm) * s0 if au_per_mm is not None else np.full(n_wells, np.nan)
    limited = np.isfinite(capacity) & (capacity > 0) & ~is_blank
    stop = usable_n.copy()
    conversion_at = np.full((n_wells, n_reads + 1), np.nan)
    if limited.any():
        rises = prefix_rises(sums, m, usable_n)
        with np.errstate(invalid="ignore"):
            conversion_at = np.abs(rises) / capacity[:, None]
        over = conversion_at > settings.max_conversion
        first_over = np.where(over.any(axis=1), over.argmax(axis=1), n_reads + 1)
        stop = np.where(limited, np.minimum(usable_n, first_over - 1), usable_n)
    if settings.blank_window_min is not None:
        fixed = int(np.searchsorted(t - t[0], settings.blank_window_min, side="right"))
        stop = np.where(is_blank, np.minimum(usable_n, fixed), stop)
    stop = np.maximum(stop, 0)
    conversion = np.where(limited, conversion_at[np.arange(n_wells), stop], np.nan)

    index = np.arange(n_wells)
    zero = np.zeros(n_wells, dtype=np.int64)
    quad = fit_windows(sums, index, zero, stop, 3)
    line = fit_windows(sums, index, zero, stop, 2)
    q_slope, q_var = quad.start_slope()
    l_slope, l_var = line.start_slope()
    noise = read_noise(t, a, usable_n)
    early = fit_windows(sums, index, zero, np.minimum(stop, m), 2).start_slope()[0]
    shape = _shape(quad, q_slope, conversion, settings, noise, early)

    steady_start = np.full(n_wells, -1)
    steady: WindowFits | None = None
    steady_state = settings.shape_action is ShapeAction.STEADY_STATE
    shaped = np.flatnonzero(shape.burst & ~shape.lag & ~is_blank & (stop >= m))
    if steady_state and shaped.size:
        first, steady = _steady_starts(sums, shaped, stop[shaped], conversion[shaped], settings,
                                       (noise[0][shaped], noise[1][shaped]))
        steady_start[shaped] = first
    lagged = np.flatnonzero(shape.lag & ~is_blank & (stop >= m)) if steady_state else np.array([], dtype=np.int64)
    lags = fit_lags(t, a[lagged] - sums.y0[lagged, None], stop[lagged]) if lagged.size else None
    lag_rows = {int(w): k for k, w in enumerate(lagged)}
    steady_slope, steady_var = steady.start_slope() if steady is not None else (np.array([]), np.array([]))
    steady_rows = {int(w): k for k, w in enumerate(shaped[steady_start[shaped] >= 0])}

    results = []
    for i, name in enumerate(names):
        usable = int(usable_n[i])
        cut = None if usable >= n_reads else ("saturated" if saturated[i, usable] else "not a number")
        results.append(well_result(name, i, t, a[i], sums, settings, usable, cut, int(stop[i]), bool(is_blank[i]), bool(limited[i]),
                                    (quad, q_slope, q_var), (line, l_slope, l_var), shape,
                                    float(conversion[i]), steady_rows.get(i), int(steady_start[i]),
                                    (steady, steady_slope, steady_var),
                                    None if lags is None or i not in lag_rows else (lags, lag_rows[i])))
    return tuple(results)


def blank_corrected(sample_slopes: npt.ArrayLike, blank_slopes: npt.ArrayLike) -> BlankCorrection:
    """Subtract the mean blank rate from each sample rate.

    corrected = sample − mean(blank); SE(mean blank) = sd(blank, n−1) / √n (NaN for one blank).
    A NaN sample rate (flagged well) stays NaN; a blank rate must be available.
    """
    samples = np.atleast_1d(np.asarray(sample_slopes, dtype=float))
    blanks = np.atleast_1d(np.asarray(blank_slopes, dtype=float))
    if blanks.size == 0:
        raise CalculationError("no blank rate given; at least one blank well is needed")
    if not np.all(np.isfinite(blanks)):
        raise CalculationError(
            f"blank rates must all be available; received {blanks.tolist()} "
            f"(a flagged blank well has no rate)"
        )
    mean = float(blanks.mean())
    se = float(blanks.std(ddof=1) / np.sqrt(blanks.size)) if blanks.size > 1 else float("nan")
    return BlankCorrection(
        corrected_slopes_au_per_min=tuple(float(x) for x in samples - mean),
        blank_mean_au_per_min=mean,
        blank_se_au_per_min=se,
        n_blanks=int(blanks.size),
    )
