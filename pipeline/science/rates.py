"""Initial rates from kinetic plate reads, with an automatically chosen linear window.

A kinetic read gives A(t) per well at read times shared by the whole plate. The initial rate
is the OLS slope of the initial linear part of A(t), in AU/min. The window is chosen, not
assumed (docs/assay-rules.md, "Activity"). With m = ``min_points``:

* usable reads are those before the first read at or above ``linear_limit_au`` (the reader's
  linear range) or the first non-finite read (an overflow exported as a blank cell);
* a candidate window is a run of at least m consecutive usable reads whose line has
  R² ≥ ``min_r2`` and whose slope does not change by more than ``max_slope_change`` (relative
  to its slope b), judged three ways: the quadratic term across the window,
  |2·c₂·(t_end − t_start)| / |b|; for windows of ≥ 2m reads, the slopes of the first and the
  last m reads; and the slope of the next m usable reads after the window. A change counts only
  when it is also significant against the well's read noise σ̂ (Student's t at
  ``curvature_alpha``), so noise alone does not reject a window;
* it must start within the first ``max_start_fraction`` of the usable read time (a linear
  stretch found only late in the read is not an initial rate);
* the earliest-starting candidate wins; for that start, the longest.

A lag (slow start), a burst (fast start), saturation and substrate depletion (bending at the
end) therefore fall outside the window, provided the bend is resolvable above the read noise
within m reads; a well without a candidate is flagged, not fitted. The maths runs per window
length over all wells and window starts at once: the least-squares projections depend only on
the read times, so they are computed once per window and applied to every well.
"""

from __future__ import annotations

import re
from collections.abc import Iterator, Mapping, Sequence
from dataclasses import asdict, dataclass, fields
from typing import Any

import numpy as np
import numpy.typing as npt
from numpy.lib.stride_tricks import sliding_window_view
from scipy import stats

from pipeline.errors import CalculationError, InputError, SpecificationError

FloatArray = npt.NDArray[np.float64]

# Residual SD below which a quadratic term is not judged (float round-off on exact data),
# far below any reader's resolution (0.0001 AU is common practice for plate readers).
_RESIDUAL_SD_FLOOR_AU = 1e-9
# Upper bound on floats held per intermediate array (wells × starts × points).
_CHUNK_FLOATS = 2_000_000

PLATE_FORMATS: Mapping[int, tuple[int, int]] = {96: (8, 12), 384: (16, 24)}
_WELL_PATTERN = re.compile(r"^\s*([A-Za-z])\s*0*(\d{1,3})\s*$")


# --------------------------------------------------------------------------- wells


def _plate_shape(plate_format: int) -> tuple[int, int]:
    if plate_format not in PLATE_FORMATS:
        raise InputError(
            f"plate format {plate_format!r} is not supported; allowed: 96 or 384 wells"
        )
    return PLATE_FORMATS[plate_format]


def parse_well(well: str, plate_format: int = 96) -> tuple[int, int]:
    """Return the zero-based (row, column) of a well name such as "A01", "a1" or "P24"."""
    rows, columns = _plate_shape(plate_format)
    match = _WELL_PATTERN.match(well) if isinstance(well, str) else None
    if match is None:
        raise InputError(
            f"well {well!r} is not a well name; expected a row letter and a column number, "
            f"e.g. 'A01'"
        )
    row = ord(match.group(1).upper()) - ord("A")
    column = int(match.group(2)) - 1
    if not (0 <= row < rows and 0 <= column < columns):
        last = f"{chr(ord('A') + rows - 1)}{columns:02d}"
        raise InputError(
            f"well {well!r} is outside a {plate_format}-well plate; allowed A01 to {last}"
        )
    return row, column


def well_index(well: str, plate_format: int = 96) -> int:
    """Row-major zero-based index of a well: index = row · columns + column."""
    row, column = parse_well(well, plate_format)
    return row * _plate_shape(plate_format)[1] + column


def all_wells(plate_format: int = 96) -> tuple[str, ...]:
    """Every well of the plate in row-major order: A01, A02, … (A–H × 1–12 or A–P × 1–24)."""
    rows, columns = _plate_shape(plate_format)
    return tuple(
        f"{chr(ord('A') + row)}{column + 1:02d}" for row in range(rows) for column in range(columns)
    )


# --------------------------------------------------------------------------- settings and results


@dataclass(frozen=True)
class RateWindowSettings:
    """Method parameters of the linear-window search (defaults: common practice)."""

    min_points: int = 5
    min_r2: float = 0.98
    linear_limit_au: float = 2.0
    max_slope_change: float = 0.10
    curvature_alpha: float = 0.05
    max_start_fraction: float = 0.5

    def __post_init__(self) -> None:
        if isinstance(self.min_points, bool) or not isinstance(self.min_points, int):
            raise SpecificationError(
                f"min_points must be a whole number; received {self.min_points!r}"
            )
        if self.min_points < 4:
            raise SpecificationError(
                f"min_points must be at least 4 (a line plus a curvature test); "
                f"received {self.min_points}"
            )
        checks = (
            ("min_r2", self.min_r2, 0.0, 1.0, "between 0 and 1"),
            ("linear_limit_au", self.linear_limit_au, 0.0, np.inf, "a positive absorbance"),
            ("max_slope_change", self.max_slope_change, 0.0, np.inf, "a positive fraction"),
            ("curvature_alpha", self.curvature_alpha, 0.0, 1.0, "between 0 and 1"),
            ("max_start_fraction", self.max_start_fraction, 0.0, 1.0, "between 0 and 1"),
        )
        for name, value, low, high, allowed in checks:
            number = (
                value if isinstance(value, int | float) and not isinstance(value, bool) else None
            )
            if number is None or not (low < number <= high) or not np.isfinite(number):
                raise SpecificationError(f"{name} must be {allowed}; received {value!r}")

    @classmethod
    def from_mapping(cls, mapping: Mapping[str, Any]) -> RateWindowSettings:
        """Build settings from a method file section; unknown keys are an error."""
        known = {f.name for f in fields(cls)}
        unknown = sorted(set(mapping) - known)
        if unknown:
            raise SpecificationError(
                f"unknown rate-window setting(s) {unknown}; allowed: {sorted(known)}"
            )
        return cls(**dict(mapping))

    def to_dict(self) -> dict[str, Any]:
        return asdict(self)


def _json_float(value: float) -> float | None:
    return float(value) if np.isfinite(value) else None


@dataclass(frozen=True)
class WellRate:
    """Initial rate of one well; ``flag`` is None when the rate can be used."""

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

    @property
    def ok(self) -> bool:
        return self.flag is None

    def to_dict(self) -> dict[str, Any]:
        out: dict[str, Any] = dict(vars(self))  # flat fields: no deep copy needed (a night has ~10^5 wells)
        for key, value in out.items():
            if isinstance(value, float):
                out[key] = _json_float(value)
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
        return {
            "corrected_slopes_au_per_min": [
                _json_float(v) for v in self.corrected_slopes_au_per_min
            ],
            "blank_mean_au_per_min": _json_float(self.blank_mean_au_per_min),
            "blank_se_au_per_min": _json_float(self.blank_se_au_per_min),
            "n_blanks": self.n_blanks,
        }


# --------------------------------------------------------------------------- window search


@dataclass
class _Best:
    """Per-well running best window (mutable scratch space inside one search)."""

    start: npt.NDArray[np.int64]
    n: npt.NDArray[np.int64]
    slope: FloatArray
    se: FloatArray
    intercept: FloatArray
    r2: FloatArray
    max_r2: FloatArray

    @classmethod
    def empty(cls, wells: int, reads: int) -> _Best:
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
        return np.full(a.shape[0], _RESIDUAL_SD_FLOOR_AU), np.ones(a.shape[0])
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
    sd = np.full(a.shape[0], _RESIDUAL_SD_FLOOR_AU)
    has = count > 0
    if np.any(has):
        abs_d = np.where(valid[has], np.abs(d[has]), np.nan)
        rough = 1.4826 * np.nanmedian(abs_d, axis=1, keepdims=True)
        kept = abs_d <= 3.5 * rough
        rms = np.sqrt(
            np.nansum(np.where(kept, abs_d**2, 0.0), axis=1) / np.maximum(kept.sum(axis=1), 1)
        )
        sd[has] = np.fmax(rms, _RESIDUAL_SD_FLOOR_AU)
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


def _plate(
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


def _scan_length(plate: _Plate, n: int, settings: RateWindowSettings, best: _Best) -> None:
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


def _early_shape(t: FloatArray, a_well: FloatArray, start: int, slope: float) -> str:
    early = (a_well[start] - a_well[0]) / (t[start] - t[0])
    kind = "slower start (lag)" if abs(early) < abs(slope) else "faster start (burst)"
    return f"; reads before {t[start]:g} min excluded: {kind}"


def _describe(
    well: str,
    t: FloatArray,
    a_well: FloatArray,
    usable: int,
    cut_kind: str | None,
    best: _Best,
    i: int,
    settings: RateWindowSettings,
) -> tuple[str | None, str]:
    """Flag code and analyst wording for well ``i``."""
    rule = (
        f"allowed: ≥ {settings.min_points} consecutive reads below {settings.linear_limit_au:g} AU, "
        f"R² ≥ {settings.min_r2:g}, slope change ≤ {100 * settings.max_slope_change:g} %"
    )
    cut = ""
    if cut_kind is not None:
        cut = f"; reads from {t[usable]:g} min excluded ({cut_kind})"
    if best.n[i] > 0:
        start, n = int(best.start[i]), int(best.n[i])
        text = (
            f"well {well}: linear window {t[start]:g}–{t[start + n - 1]:g} min "
            f"({n} reads), R² {best.r2[i]:.4f}"
        )
        if start > 0:
            text += _early_shape(t, a_well, start, float(best.slope[i]))
        return None, text + cut
    if len(t) < settings.min_points:
        return "too-few-points", f"well {well}: only {len(t)} reads on the plate; {rule}"
    if usable < settings.min_points:
        code = {"saturated": "saturated", "not a number": "non-finite"}.get(cut_kind or "", "")
        seen = f"only {usable} reads before {t[usable]:g} min, where the well " + (
            "reaches the linear limit" if code == "saturated" else "has a non-numeric read"
        )
        return code or "too-few-points", f"well {well}: {seen}; {rule}"
    seen = (
        f"best R² {best.max_r2[i]:.4f}" if np.isfinite(best.max_r2[i]) else "no rise in absorbance"
    )
    return "no-linear-window", f"well {well}: no linear window ({seen}){cut}; {rule}"


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
        twice = sorted({w for w in names if names.count(w) > 1})
        raise InputError(f"well names must be unique; repeated: {twice}")
    if not np.all(np.isfinite(t)) or np.any(np.diff(t) <= 0):
        raise InputError(
            f"read times must be finite and strictly increasing; received {t.tolist()}"
        )
    return t, a, names


def initial_rates(
    time_min: npt.ArrayLike,
    absorbance: npt.ArrayLike,
    wells: Sequence[str],
    settings: RateWindowSettings | None = None,
    *,
    blank_wells: Sequence[str] = (),
) -> tuple[WellRate, ...]:
    """Initial rate (OLS slope of the chosen linear window) of every well of a plate.

    slope b = Σ(t − t̄)(A − Ā) / Σ(t − t̄)², SE(b) = √(SSR / (n − 2) / Σ(t − t̄)²),
    R² = 1 − SSR / SST, intercept = A at t = 0 on the fitted line.

    ``time_min`` has shape (T,), ``absorbance`` shape (W, T), ``wells`` W names. Wells named in
    ``blank_wells`` (no enzyme: a slope near zero makes R² meaningless) skip the R² test but
    not the saturation and curvature tests.
    """
    settings = settings or RateWindowSettings()
    t, a, names = _validated(time_min, absorbance, wells)
    unknown_blanks = sorted(set(blank_wells) - set(names))
    if unknown_blanks:
        raise InputError(f"blank well(s) {unknown_blanks} are not among the plate's wells")
    n_wells, n_reads = a.shape

    not_number = ~np.isfinite(a)
    saturated = ~not_number & (a >= settings.linear_limit_au)
    stop = not_number | saturated
    usable_n = np.where(stop.any(axis=1), stop.argmax(axis=1), n_reads).astype(np.int64)
    exempt = np.isin(np.asarray(names, dtype=object), np.asarray(tuple(blank_wells), dtype=object))

    best = _Best.empty(n_wells, n_reads)
    if n_reads >= settings.min_points:
        plate = _plate(t, a, usable_n, exempt, settings)
        for n in range(settings.min_points, n_reads + 1):
            _scan_length(plate, n, settings, best)

    results = []
    for i, name in enumerate(names):
        usable = int(usable_n[i])
        cut_kind = None
        if usable < n_reads:
            cut_kind = "saturated" if saturated[i, usable] else "not a number"
        flag, reason = _describe(name, t, a[i], usable, cut_kind, best, i, settings)
        fitted = flag is None
        start, n = int(best.start[i]), int(best.n[i])
        results.append(
            WellRate(
                well=name,
                slope_au_per_min=float(best.slope[i]) if fitted else float("nan"),
                slope_se_au_per_min=float(best.se[i]) if fitted else float("nan"),
                intercept_au=float(best.intercept[i]) if fitted else float("nan"),
                r2=float(best.r2[i]) if fitted else float("nan"),
                window_start_min=float(t[start]) if fitted else float("nan"),
                window_end_min=float(t[start + n - 1]) if fitted else float("nan"),
                n_points=n if fitted else 0,
                flag=flag,
                reason=reason,
            )
        )
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
