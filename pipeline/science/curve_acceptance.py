"""Standard-curve acceptance as bioanalytical labs apply it: exclude, refit, count.

Rules (FDA, Bioanalytical Method Validation, Guidance for Industry, May 2018, and ICH M10,
Bioanalytical Method Validation and Study Sample Analysis, 2022 — both from memory, to be checked
against the documents): each non-zero calibrator back-calculated through the curve is within
±15 % of its nominal concentration, ±20 % at the lower limit of quantification (the lowest
level); "at least 75 % of the calibration standards, with a minimum of six calibration curve
levels" meet this; calibrators outside it are excluded and the curve is fitted again without
them (excluding one does not change the model); where a level is run in replicate, the level
counts when at least 50 % of its replicates meet the criterion; if the lowest or highest level
is lost, the next accepted level bounds the calibrated range. Blanks (0) are not judged.

Here: fit all calibrators; exclude the non-zero calibrator farthest outside its limit (relative to
the limit), refit, and repeat until none of the kept ones fails — one at a time, so that an outlier
dragging the curve does not take good standards with it; each exclusion is named with the bias
that excluded it. Then
accept when kept ≥ ``min_fraction`` of the non-zero calibrators and ≥ ``min_levels`` levels keep at
least half their replicates, and the final curve passes its own checks (R², shape).
"""

from __future__ import annotations

from dataclasses import dataclass
from typing import Any

import numpy as np
import numpy.typing as npt

from pipeline.errors import CalculationError
from pipeline.science.standard_curves import (
    BackCalculatedStandard,
    StandardCurve,
    fit_standard_curve,
)


@dataclass(frozen=True)
class CurveAcceptance:
    """The curve refitted on the kept calibrators, what was excluded, and the verdict."""

    curve: StandardCurve
    excluded: tuple[BackCalculatedStandard, ...]
    calibrators: int  # non-zero calibrators on the plate
    kept: int
    levels: int  # distinct non-zero levels on the plate
    levels_kept: int  # levels with at least half their replicates kept
    min_fraction: float
    min_levels: int
    accepted: bool
    reasons: tuple[str, ...]

    @property
    def exclusions(self) -> tuple[str, ...]:
        """Each excluded standard, named, with the bias that excluded it."""
        return tuple(_excluded_text(row) for row in self.excluded)

    def to_dict(self) -> dict[str, Any]:
        return {"excluded_standards": [row.to_dict() for row in self.excluded], "exclusions": list(self.exclusions),
                "calibrators": self.calibrators, "calibrators_kept": self.kept, "levels": self.levels,
                "levels_kept": self.levels_kept, "min_calibrator_fraction": self.min_fraction,
                "min_levels": self.min_levels}


def _excluded_text(row: BackCalculatedStandard) -> str:
    bias = "cannot be read back" if row.bias_pct is None or not np.isfinite(row.bias_pct) else \
        f"bias {row.bias_pct:+.1f} %, allowed ±{row.limit_pct:g} %"
    return f"standard {row.nominal_mg_per_ml:g} mg/mL (signal {row.absorbance_au:.4g}) excluded: {bias}"


def _severity(row: BackCalculatedStandard) -> float:
    """How far a failing standard is outside its limit (one that cannot be read back: the worst)."""
    if row.bias_pct is None or not np.isfinite(row.bias_pct) or not row.limit_pct:
        return np.inf
    return abs(row.bias_pct) / row.limit_pct


def accept_standard_curve(
    nominal_mg_per_ml: npt.ArrayLike,
    signal: npt.ArrayLike,
    model: str,
    weighting: str | None = None,
    min_r2: float = 0.99,
    bias_limit_pct: float = 15.0,
    lowest_bias_limit_pct: float = 20.0,
    min_fraction: float = 0.75,
    min_levels: int = 6,
) -> CurveAcceptance:
    """Fit, exclude calibrators outside their limits, refit, and judge the curve (module text)."""
    if not (0 < min_fraction <= 1) or min_levels < 1:
        raise CalculationError(
            f"curve acceptance needs a calibrator fraction in (0, 1] and at least one level; "
            f"received {min_fraction!r} and {min_levels!r}")
    x = np.asarray(nominal_mg_per_ml, dtype=float).ravel()
    y = np.asarray(signal, dtype=float).ravel()
    keep = np.ones(x.size, dtype=bool)
    excluded: list[BackCalculatedStandard] = []
    curve = fit_standard_curve(x, y, model, weighting, min_r2, bias_limit_pct, lowest_bias_limit_pct)
    for _ in range(x.size):
        kept_index = np.flatnonzero(keep)
        failing = [(_severity(row), k, row) for k, row in zip(kept_index, curve.back_calculated, strict=True)
                   if row.within_limit is False]
        if not failing:
            break
        _, worst, row = max(failing, key=lambda item: item[0])
        excluded.append(row)
        keep[worst] = False
        try:
            curve = fit_standard_curve(x[keep], y[keep], model, weighting, min_r2, bias_limit_pct,
                                       lowest_bias_limit_pct)
        except CalculationError as exc:
            raise CalculationError(
                f"after excluding {len(excluded)} standard(s) the curve cannot be fitted: {exc}") from exc

    nonzero = x > 0
    levels = np.unique(x[nonzero])
    level_kept = [np.mean(keep[x == level]) >= 0.5 for level in levels]
    calibrators, kept = int(nonzero.sum()), int((keep & nonzero).sum())
    failures = []
    if kept < min_fraction * calibrators:
        failures.append(f"only {kept} of {calibrators} standards ({100 * kept / calibrators:.0f} %) are within "
                        f"their limits; at least {100 * min_fraction:g} % are needed")
    if sum(level_kept) < min_levels:
        failures.append(f"only {sum(level_kept)} concentration levels keep at least half their standards; "
                        f"at least {min_levels} are needed")
    own = [r for r in curve.reasons if not r.startswith("standard ")]
    failures.extend(own)
    return CurveAcceptance(curve, tuple(excluded), calibrators, kept, int(levels.size), int(sum(level_kept)),
                           float(min_fraction), int(min_levels), not failures, tuple(failures))
