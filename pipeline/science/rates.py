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
  lag or burst well does: ``exclude`` (flagged, with the reason) or ``steady-state`` (the slope at
  the first later start from which the window no longer bends so, stated as such);
* blank wells (no enzyme) are fitted by a straight line over their whole usable read, or over the
  method's fixed ``blank_window_min``, so that no blank window is chosen from noise.

Cost: running sums give every window's normal equations in O(1), so a plate costs O(reads) per
well (``pipeline.science.progress_fits``).
"""

from __future__ import annotations

from collections.abc import Mapping, Sequence
from dataclasses import asdict, dataclass, fields
from enum import StrEnum
from typing import Any

import numpy as np
import numpy.typing as npt
from scipy import stats

from pipeline.errors import CalculationError, InputError, SpecificationError
from pipeline.plain_data import to_plain
from pipeline.science.progress_fits import WindowFits, fit_windows, prefix_rises, running_sums
from pipeline.science.read_noise import read_noise

FloatArray = npt.NDArray[np.float64]
IntArray = npt.NDArray[np.int64]
POWER = 0.80  # the power at which the curvature test's detectable change is stated
# Residual SD below which no lack of fit is judged (round-off on exact data): far below any
# reader's resolution (0.0001 AU is common practice for plate readers).
ROUND_OFF_AU = 1e-6


class RateFlag(StrEnum):
    """Why a well has no usable initial rate."""

    TOO_FEW_POINTS = "too-few-points"
    SATURATED = "saturated"
    NON_FINITE = "non-finite"
    CONVERSION_LIMIT = "conversion-limit"
    LAG = "lag"
    BURST = "burst"


class ShapeAction(StrEnum):
    """What a well with a lag or a burst gives, as the method says."""

    EXCLUDE = "exclude"
    STEADY_STATE = "steady-state"


class SlopeKind(StrEnum):
    INITIAL = "initial"  # quadratic from the first read, slope at the first read
    STEADY_STATE = "steady-state"  # quadratic from a later read, after a lag or burst
    WHOLE_READ = "blank-line"  # straight line over a blank's whole read (or fixed window)


# --------------------------------------------------------------------------- settings and results


@dataclass(frozen=True)
class RateWindowSettings:
    """Method parameters of the initial-rate window (defaults: common practice)."""

    min_points: int = 5
    linear_limit_au: float = 2.0
    max_conversion: float = 0.10
    max_slope_change: float = 0.10
    curvature_alpha: float = 0.01
    shape_action: ShapeAction = ShapeAction.EXCLUDE
    blank_window_min: float | None = None

    def __post_init__(self) -> None:
        if isinstance(self.min_points, bool) or not isinstance(self.min_points, int):
            raise SpecificationError(f"min_points must be a whole number; received {self.min_points!r}")
        if self.min_points < 5:
            raise SpecificationError(
                f"min_points must be at least 5 (a quadratic and 2 degrees of freedom for its "
                f"curvature test); received {self.min_points}"
            )
        checks = (
            ("linear_limit_au", self.linear_limit_au, 0.0, np.inf, "a positive absorbance"),
            ("max_conversion", self.max_conversion, 0.0, 0.5, "a fraction above 0 and at most 0.5"),
            ("max_slope_change", self.max_slope_change, 0.0, np.inf, "a positive fraction"),
            ("curvature_alpha", self.curvature_alpha, 0.0, 0.5, "between 0 and 0.5"),
        )
        for name, value, low, high, allowed in checks:
            number = value if isinstance(value, int | float) and not isinstance(value, bool) else None
            if number is None or not np.isfinite(number) or not (low < number <= high):
                raise SpecificationError(f"{name} must be {allowed}; received {value!r}")
        try:
            object.__setattr__(self, "shape_action", ShapeAction(self.shape_action))
        except ValueError as exc:
            raise SpecificationError(
                f"shape_action must be one of {[a.value for a in ShapeAction]}; received {self.shape_action!r}"
            ) from exc
        window = self.blank_window_min
        if window is not None and (isinstance(window, bool) or not isinstance(window, int | float)
                                   or not np.isfinite(window) or window <= 0):
            raise SpecificationError(f"blank_window_min must be a positive time in minutes or absent; received {window!r}")

    @classmethod
    def from_mapping(cls, mapping: Mapping[str, Any]) -> RateWindowSettings:
        """Build settings from a method file section; unknown keys are an error."""
        known = {f.name for f in fields(cls)}
        unknown = sorted(set(mapping) - known)
        if unknown:
            raise SpecificationError(f"unknown rate-window setting(s) {unknown}; allowed: {sorted(known)}")
        return cls(**dict(mapping))

    def to_dict(self) -> dict[str, Any]:
        return dict(to_plain(asdict(self)))


@dataclass(frozen=True)
class WellRate:
    """Initial rate of one well; ``flag`` is None when the rate can be used.

    ``slope_dof`` is the degrees of freedom of the slope's SE (n − 3 for a quadratic, n − 2 for a
    blank's line); ``conversion_pct`` the substrate converted by the window's end;
    ``slope_change_pct`` the fitted change of slope across the window relative to the rate, and
    ``detectable_change_pct`` the change the curvature test finds with 80 % probability.
    """

    well: str
    slope_au_per_min: float
    slope_se_au_per_min: float
    intercept_au: float
    r2: float
    window_start_min: float
    window_end_min: float
    n_points: int
    flag: str | None
    reason: str
    slope_dof: int = 0
    conversion_pct: float = float("nan")
    slope_change_pct: float = float("nan")
    detectable_change_pct: float = float("nan")
    shape: str | None = None
    slope_kind: str | None = None

    @property
    def ok(self) -> bool:
        return self.flag is None

    def to_dict(self) -> dict[str, Any]:
        out: dict[str, Any] = to_plain(vars(self))  # flat fields (a night has ~10^5 wells)
        out["ok"] = self.ok
        return out


@dataclass(frozen=True)
class BlankCorrection:
    """Sample rates minus the mean blank rate (spontaneous reaction without enzyme)."""

    corrected_slopes_au_per_min: tuple[float, ...]
    blank_mean_au_per_min: float
    blank_se_au_per_min: float
    n_blanks: int

    def to_dict(self) -> dict[str, Any]:
        return dict(to_plain(self))


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


@dataclass(frozen=True)
class _Shape:
    change: FloatArray  # relative change of slope across the window (signed: + = speeding up)
    detectable: FloatArray
    lag: npt.NDArray[np.bool_]
    burst: npt.NDArray[np.bool_]


def _shape(fits: WindowFits, slope: FloatArray, conversion: FloatArray, settings: RateWindowSettings,
           noise: tuple[FloatArray, FloatArray], early_slope: FloatArray) -> _Shape:
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
    return _Shape(relative, detectable, lag & np.isfinite(relative), burst & np.isfinite(relative))


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
    shaped = np.flatnonzero((shape.lag | shape.burst) & ~is_blank & (stop >= m))
    if settings.shape_action is ShapeAction.STEADY_STATE and shaped.size:
        first, steady = _steady_starts(sums, shaped, stop[shaped], conversion[shaped], settings,
                                       (noise[0][shaped], noise[1][shaped]))
        steady_start[shaped] = first
    steady_slope, steady_var = steady.start_slope() if steady is not None else (np.array([]), np.array([]))
    steady_rows = {int(w): k for k, w in enumerate(shaped[steady_start[shaped] >= 0])}

    results = []
    for i, name in enumerate(names):
        usable = int(usable_n[i])
        cut = None if usable >= n_reads else ("saturated" if saturated[i, usable] else "not a number")
        results.append(_well_result(name, i, t, a[i], sums, settings, usable, cut, int(stop[i]), bool(is_blank[i]), bool(limited[i]),
                                    (quad, q_slope, q_var), (line, l_slope, l_var), shape,
                                    float(conversion[i]), steady_rows.get(i), int(steady_start[i]),
                                    (steady, steady_slope, steady_var)))
    return tuple(results)


def _well_result(name: str, i: int, t: FloatArray, a_well: FloatArray, sums: Any, settings: RateWindowSettings,
                 usable: int, cut: str | None, stop: int, blank: bool, limited: bool, quad: Any, line: Any, shape: _Shape,
                 conversion: float, steady_row: int | None, steady_start: int, steady: Any) -> WellRate:
    """One well's rate, flag and analyst wording."""
    m = settings.min_points
    nan = float("nan")
    cut_text = "" if cut is None else f"; reads from {t[usable]:g} min excluded ({cut})"

    def flagged(flag: RateFlag, text: str, **extra: Any) -> WellRate:
        return WellRate(name, nan, nan, nan, nan, nan, nan, 0, flag.value, f"well {name}: {text}", **extra)

    if stop < m:
        if t.size < m:
            return flagged(RateFlag.TOO_FEW_POINTS, f"only {t.size} reads on the plate; at least {m} are needed")
        if limited and stop < usable:
            return flagged(RateFlag.CONVERSION_LIMIT,
                           f"more than {100 * settings.max_conversion:g} % of the substrate is converted within "
                           f"{stop + 1} reads (by {t[min(stop, t.size - 1)]:g} min); at least {m} reads are needed "
                           f"below the limit: dilute the sample further or read more often")
        if cut == "saturated" and usable < m:
            return flagged(RateFlag.SATURATED, f"only {usable} reads before {t[usable]:g} min, where the well reaches "
                                               f"the linear limit {settings.linear_limit_au:g} AU; at least {m} are needed")
        if cut == "not a number" and usable < m:
            return flagged(RateFlag.NON_FINITE, f"only {usable} reads before {t[usable]:g} min, where the well has a "
                                                f"non-numeric read; at least {m} are needed")
        return flagged(RateFlag.TOO_FEW_POINTS, f"only {stop} reads in the window; at least {m} are needed")

    fits, slope, var = line if blank else quad
    x_to_min = sums.span_min
    start_read = 0
    kind = SlopeKind.WHOLE_READ if blank else SlopeKind.INITIAL
    row = i
    shape_name: str | None = None
    note = ""
    if not blank and (shape.lag[i] or shape.burst[i]):
        shape_name = RateFlag.LAG.value if shape.lag[i] else RateFlag.BURST.value
        what = (("a lag: the first reads rise more slowly" if shape.lag[i] else "a burst: the first reads rise faster")
                + f" than the rest of {t[0]:g}–{t[stop - 1]:g} min allows (fitted slope change "
                f"{100 * float(shape.change[i]):+.0f} %, allowed {100 * settings.max_slope_change:g} %"
                + ("" if shape.lag[i] else f" plus the {100 * conversion:.1f} % converted")
                + f"; or the curve bends more sharply than its read noise allows; tested at {settings.curvature_alpha:g})")
        if settings.shape_action is ShapeAction.EXCLUDE or steady_row is None:
            why = "" if settings.shape_action is ShapeAction.EXCLUDE else "; no later stretch is free of it"
            return flagged(RateFlag(shape_name), f"{what}{why}; excluded as the method says",
                           conversion_pct=100 * conversion, slope_change_pct=100 * float(shape.change[i]),
                           shape=shape_name)
        fits, slope, var = steady
        row, start_read, kind = steady_row, steady_start, SlopeKind.STEADY_STATE
        note = f"; {what}: steady-state slope from {t[start_read]:g} min, as the method says"
    b = float(slope[row]) / x_to_min
    se = float(np.sqrt(var[row])) / x_to_min
    x_s = fits.x_start[row]
    beta = fits.beta[row]
    fitted_start = beta[0] + beta[1] * x_s + (beta[2] * x_s * x_s if fits.params == 3 else 0.0)
    intercept = float(sums.y0[i] + fitted_start - b * t[start_read])
    n = int(fits.n[row])
    end = start_read + n - 1
    if blank:
        text = f"blank line over {t[0]:g}–{t[end]:g} min ({n} reads)"
    else:
        text = (f"window {t[start_read]:g}–{t[end]:g} min ({n} reads), "
                f"{100 * conversion:.1f} % of the substrate converted" if np.isfinite(conversion)
                else f"window {t[start_read]:g}–{t[end]:g} min ({n} reads)")
        text += (f"; slope change {100 * float(shape.change[i]):+.1f} % (a change of "
                 f"{100 * float(shape.detectable[i]):.0f} % is found with 80 % probability)")
    return WellRate(
        well=name, slope_au_per_min=b, slope_se_au_per_min=se, intercept_au=intercept,
        r2=float(fits.r2()[row]), window_start_min=float(t[start_read]), window_end_min=float(t[end]),
        n_points=n, flag=None, reason=f"well {name}: {text}{note}{cut_text}", slope_dof=int(fits.dof[row]),
        conversion_pct=100 * conversion, slope_change_pct=nan if blank else 100 * float(shape.change[i]),
        detectable_change_pct=nan if blank else 100 * float(shape.detectable[i]),
        shape=shape_name, slope_kind=kind.value,
    )


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
