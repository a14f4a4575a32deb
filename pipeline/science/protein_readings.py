"""Protein of the lots' samples: read through an accepted standard curve, or from A280; replicates.

Samples are read back only inside the calibrated range (lowest to highest non-zero standard),
never extrapolated.
"""

from __future__ import annotations

from dataclasses import asdict, dataclass
from typing import Any

import numpy as np
import numpy.typing as npt

from pipeline.errors import CalculationError
from pipeline.plain_data import to_plain
from pipeline.science.standard_curves import StandardCurve
from pipeline.science.units import FloatOrArray, as_result, require_positive


@dataclass(frozen=True)
class ProteinReading:
    """A sample read through the curve; concentrations are None outside the calibrated range."""

    absorbance_au: float
    in_well_mg_per_ml: float | None
    dilution_factor: float
    concentration_mg_per_ml: float | None
    in_range: bool
    reason: str | None

    def to_dict(self) -> dict[str, Any]:
        out = asdict(self)
        out["absorbance_au"] = to_plain(self.absorbance_au)
        return out


@dataclass(frozen=True)
class ReplicateSummary:
    """Mean, SD (n − 1), CV % and SE of replicate values (NaN where n is too small)."""

    mean: float
    sd: float
    cv_pct: float
    n: int
    se: float

    def to_dict(self) -> dict[str, Any]:
        return {
            "mean": to_plain(self.mean),
            "sd": to_plain(self.sd),
            "cv_pct": to_plain(self.cv_pct),
            "n": self.n,
            "se": to_plain(self.se),
        }


def back_calculate(
    curve: StandardCurve, absorbance: npt.ArrayLike, dilution_factor: npt.ArrayLike = 1.0
) -> tuple[ProteinReading, ...]:
    """Protein of each sample: in-well concentration from the curve × dilution factor.

    protein [mg/mL] = f⁻¹(A) · DF, reported only when the in-well reading lies inside the
    calibrated range (lowest to highest non-zero standard); never extrapolated.
    """
    if not curve.accepted:
        raise CalculationError(
            "the standard curve is not accepted, so no sample can be read from it: "
            + "; ".join(curve.reasons)
        )
    y = np.atleast_1d(np.asarray(absorbance, dtype=float)).ravel()
    dilution = np.broadcast_to(
        require_positive("dilution factor", dilution_factor, ""), y.shape
    ).astype(float)
    low, high = curve.range_low_mg_per_ml, curve.range_high_mg_per_ml
    x = np.atleast_1d(np.asarray(curve.concentration_at(y), dtype=float))
    a_low, a_high = np.asarray(curve.absorbance_at(np.array([low, high])), dtype=float)
    scale = max(abs(a_low), abs(a_high), 1.0) * 1e-12
    trend = curve.trend
    readings = []
    for yi, xi, df in zip(y, x, dilution, strict=True):
        reason = None
        if not np.isfinite(yi):
            reason = "the reading is not a number"
        elif trend * (yi - a_high) > scale or xi > high * (1 + 1e-12):
            reason = _outside(low, high, "above the highest standard")
        elif trend * (a_low - yi) > scale or xi < low * (1 - 1e-12):
            reason = _outside(low, high, "below the lowest standard")
        elif not np.isfinite(xi):
            reason = "the reading cannot be read back through the curve"
        if reason is not None:
            readings.append(ProteinReading(float(yi), None, float(df), None, False, reason))
            continue
        in_well = float(min(max(xi, low), high))
        readings.append(
            ProteinReading(float(yi), in_well, float(df), float(in_well * df), True, None)
        )
    return tuple(readings)


def _outside(low: float, high: float, side: str) -> str:
    return (
        f"outside the calibrated range {low:g}–{high:g} mg/mL ({side}): "
        f"re-assay at another dilution"
    )


def protein_from_a280(
    a280: npt.ArrayLike,
    extinction_coefficient_ml_per_mg_per_cm: npt.ArrayLike,
    path_length_cm: npt.ArrayLike,
    dilution_factor: npt.ArrayLike,
) -> FloatOrArray:
    """Protein from absorbance at 280 nm: c [mg/mL] = A280 / (ε [mL·mg⁻¹·cm⁻¹] · l [cm]) · DF."""
    epsilon = require_positive(
        "extinction coefficient at 280 nm",
        extinction_coefficient_ml_per_mg_per_cm,
        " (mL per mg per cm)",
    )
    path = require_positive("path length", path_length_cm, " (cm)")
    dilution = require_positive("dilution factor", dilution_factor, "")
    return as_result(np.asarray(a280, dtype=float) / (epsilon * path) * dilution)


def replicate_summary(values: npt.ArrayLike) -> ReplicateSummary:
    """Replicate statistics: mean, sd = √(Σ(v − v̄)² / (n − 1)), CV % = 100·sd/|mean|, se = sd/√n.

    sd, CV and se are NaN for a single value; CV is NaN when the mean is 0.
    """
    v = np.atleast_1d(np.asarray(values, dtype=float)).ravel()
    if v.size == 0:
        raise CalculationError("no replicate values given; at least one is needed")
    if not np.all(np.isfinite(v)):
        raise CalculationError(
            f"replicate values must all be numbers; received {v.tolist()} "
            f"(no replicate is dropped automatically)"
        )
    mean = float(v.mean())
    sd = float(v.std(ddof=1)) if v.size > 1 else float("nan")
    cv = 100.0 * sd / abs(mean) if mean != 0 else float("nan")
    return ReplicateSummary(
        mean=mean, sd=sd, cv_pct=float(cv), n=int(v.size), se=float(sd / np.sqrt(v.size))
    )
