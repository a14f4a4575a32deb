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

from collections.abc import Mapping, Sequence
from dataclasses import asdict, dataclass, fields
from typing import Any

import numpy as np
import numpy.typing as npt

from pipeline.errors import CalculationError, InputError, SpecificationError
from pipeline.plain_data import to_plain
from pipeline.science.rate_window_search import Best, plate_quantities, scan_length

FloatArray = npt.NDArray[np.float64]


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
    best: Best,
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

    best = Best.empty(n_wells, n_reads)
    if n_reads >= settings.min_points:
        plate = plate_quantities(t, a, usable_n, exempt, settings)
        for n in range(settings.min_points, n_reads + 1):
            scan_length(plate, n, settings, best)

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
