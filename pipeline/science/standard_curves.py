"""Protein (mg/mL): standard curves, back-calculation inside the calibrated range, A280.

A dye-binding or copper assay reads absorbance against protein standards (commonly BSA,
0–1.5 mg/mL). The method chooses the model of absorbance y against concentration x:

* linear     y = p₀ + p₁·x
* quadratic  y = p₀ + p₁·x + p₂·x²
* 4PL        y = d + (a − d) / (1 + (x/c)^b)   (a: response at x = 0, d: at x → ∞, c: mid-point)

fitted by (weighted) least squares. Curve acceptance follows common practice after the FDA
Bioanalytical Method Validation guidance (2018): every non-zero standard back-calculates within
±15 % of nominal (±20 % at the lowest) and R² ≥ a method minimum. Samples are back-calculated
only inside the calibrated range (lowest to highest non-zero standard), never extrapolated.
"""

from __future__ import annotations

from collections.abc import Callable
from dataclasses import asdict, dataclass
from typing import Any

import numpy as np
import numpy.typing as npt
from scipy.optimize import least_squares

from pipeline.errors import CalculationError, SpecificationError
from pipeline.science.units import FloatOrArray, as_result, require_positive

FloatArray = npt.NDArray[np.float64]

PARAM_NAMES: dict[str, tuple[str, ...]] = {
    "linear": ("intercept_au", "slope_au_per_mg_per_ml"),
    "quadratic": ("c0_au", "c1_au_per_mg_per_ml", "c2_au_per_mg2_per_ml2"),
    "4pl": ("a_au", "b_hill", "c_mg_per_ml", "d_au"),
}
WEIGHTINGS: tuple[str | None, ...] = (None, "1/x", "1/x2", "1/y2")


def _json(value: float | None) -> float | None:
    return None if value is None or not np.isfinite(value) else float(value)


# --------------------------------------------------------------------------- model maths


def curve_response(model: str, params: FloatArray, x: FloatArray) -> FloatArray:
    """Absorbance at concentration x for the model (see the module docstring)."""
    if model == "linear":
        return params[0] + params[1] * x
    if model == "quadratic":
        return params[0] + params[1] * x + params[2] * x * x
    a, b, c, d = params
    return d + (a - d) / (1.0 + (np.maximum(x, 0.0) / c) ** b)


def _inverse(model: str, params: FloatArray, y: FloatArray, trend: float) -> FloatArray:
    """Concentration on the calibrated branch for absorbance y; NaN where there is none.

    linear:    x = (y − p₀) / p₁
    quadratic: root of p₂x² + p₁x + (p₀ − y) = 0 whose slope p₁ + 2p₂x has the sign of the
               curve over the calibrated range, x = −2q / (p₁ + s·√D) (or (−p₁ + s·√D) / 2p₂),
               q = p₀ − y, D = p₁² − 4p₂q, s = ±1 the trend
    4PL:       x = c · ((a − d)/(y − d) − 1)^(1/b), defined for y strictly between a and d
    """
    with np.errstate(invalid="ignore", divide="ignore"):
        if model == "linear":
            return (y - params[0]) / params[1]
        if model == "quadratic":
            p0, p1, p2 = params
            q = p0 - y
            root_d = np.sqrt(p1 * p1 - 4.0 * p2 * q)
            if trend * p1 > 0:
                return -2.0 * q / (p1 + trend * root_d)
            return (-p1 + trend * root_d) / (2.0 * p2)
        a, b, c, d = params
        ratio = (a - d) / (y - d) - 1.0
        return np.where(ratio > 0, c * np.abs(ratio) ** (1.0 / b), np.nan)


def _fit_linear_in_params(x: FloatArray, y: FloatArray, w: FloatArray, degree: int) -> FloatArray:
    """Weighted least squares: minimise Σ wᵢ·(yᵢ − Σₖ pₖ·xᵢᵏ)²."""
    design = np.vander(x, degree + 1, increasing=True)
    root_w = np.sqrt(w)
    params, *_ = np.linalg.lstsq(design * root_w[:, None], y * root_w, rcond=None)
    return params


def _fit_4pl(x: FloatArray, y: FloatArray, w: FloatArray) -> FloatArray:
    """Minimise Σ wᵢ·(yᵢ − 4PL(xᵢ))² with scipy.optimize.least_squares from several starts."""
    root_w = np.sqrt(w)
    low, high = y[x == x.min()].mean(), y[x == x.max()].mean()
    span = high - low
    positive = x[x > 0]

    def residuals(p: FloatArray) -> FloatArray:
        return root_w * (curve_response("4pl", p, x) - y)

    bounds = (
        [-np.inf, 1e-3, positive.min() * 1e-3, -np.inf],
        [np.inf, 20.0, positive.max() * 1e3, np.inf],
    )
    best = None
    for extra in (0.25, 1.0, 4.0):
        for c0 in (np.median(positive), positive.max()):
            for b0 in (1.0, 2.0):
                start = np.array([low, b0, c0, high + extra * span])
                fit = least_squares(
                    residuals,
                    start,
                    bounds=bounds,
                    x_scale="jac",
                    ftol=1e-15,
                    xtol=1e-15,
                    gtol=1e-15,
                    max_nfev=5000,
                )
                if fit.status > 0 and (best is None or fit.cost < best.cost):
                    best = fit
    if best is None:
        raise CalculationError("the 4PL standard curve fit did not converge from any start")
    return np.asarray(best.x, dtype=float)


# --------------------------------------------------------------------------- results


@dataclass(frozen=True)
class BackCalculatedStandard:
    """One standard read back through its own curve; blanks (0 mg/mL) are not judged."""

    nominal_mg_per_ml: float
    absorbance_au: float
    back_calculated_mg_per_ml: float
    bias_pct: float | None
    limit_pct: float | None
    within_limit: bool | None

    def to_dict(self) -> dict[str, Any]:
        out = asdict(self)
        for key in ("nominal_mg_per_ml", "absorbance_au", "back_calculated_mg_per_ml", "bias_pct"):
            out[key] = _json(out[key])
        return out


@dataclass(frozen=True)
class StandardCurve:
    """A fitted protein standard curve and its acceptance (reasons empty when accepted)."""

    model: str
    weighting: str | None
    param_names: tuple[str, ...]
    params: tuple[float, ...]
    r2: float
    range_low_mg_per_ml: float
    range_high_mg_per_ml: float
    back_calculated: tuple[BackCalculatedStandard, ...]
    accepted: bool
    reasons: tuple[str, ...]
    min_r2: float
    bias_limit_pct: float
    lowest_bias_limit_pct: float

    @property
    def trend(self) -> float:
        """+1 when absorbance rises with concentration over the calibrated range, else −1."""
        ends = self.absorbance_at(np.array([self.range_low_mg_per_ml, self.range_high_mg_per_ml]))
        return 1.0 if ends[1] >= ends[0] else -1.0

    def absorbance_at(self, conc_mg_per_ml: npt.ArrayLike) -> FloatOrArray:
        """Absorbance the curve predicts at a concentration (for plots and checks)."""
        x = np.asarray(conc_mg_per_ml, dtype=float)
        return as_result(curve_response(self.model, np.asarray(self.params), x))

    def concentration_at(self, absorbance_au: npt.ArrayLike) -> FloatOrArray:
        """In-well concentration on the calibrated branch, not limited to the range (NaN if none)."""
        y = np.asarray(absorbance_au, dtype=float)
        return as_result(_inverse(self.model, np.asarray(self.params), y, self.trend))

    def response_curve(self, points: int = 121) -> dict[str, list[float]]:
        """Absorbance the curve predicts from 0 to 1.5 × the highest standard (for a chart).

        ``points`` evenly spaced concentrations; returns {"mg_per_ml": [...], "absorbance_au": [...]}.
        """
        x = np.linspace(0.0, 1.5 * self.range_high_mg_per_ml, points)
        with np.errstate(all="ignore"):
            y = np.asarray(self.absorbance_at(x), dtype=float)
        return {"mg_per_ml": [float(v) for v in x], "absorbance_au": [_json(v) for v in y]}

    def to_dict(self) -> dict[str, Any]:
        return {
            "model": self.model,
            "weighting": self.weighting,
            "params": {n: _json(v) for n, v in zip(self.param_names, self.params, strict=True)},
            "r2": _json(self.r2),
            "range_low_mg_per_ml": self.range_low_mg_per_ml,
            "range_high_mg_per_ml": self.range_high_mg_per_ml,
            "back_calculated": [row.to_dict() for row in self.back_calculated],
            "accepted": self.accepted,
            "reasons": list(self.reasons),
            "min_r2": self.min_r2,
            "bias_limit_pct": self.bias_limit_pct,
            "lowest_bias_limit_pct": self.lowest_bias_limit_pct,
        }


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
        out["absorbance_au"] = _json(self.absorbance_au)
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
            "mean": _json(self.mean),
            "sd": _json(self.sd),
            "cv_pct": _json(self.cv_pct),
            "n": self.n,
            "se": _json(self.se),
        }


# --------------------------------------------------------------------------- fitting


def _weights(weighting: str | None, x: FloatArray, y: FloatArray) -> FloatArray:
    """Fit weights wᵢ: 1, 1/x, 1/x² or 1/y²; blanks take the weight of the lowest standard."""
    if weighting is None:
        return np.ones_like(x)
    lowest = x == x[x > 0].min()
    if weighting == "1/y2":
        if np.any(y[x > 0] == 0):
            raise CalculationError("1/y² weighting needs non-zero absorbances at every standard")
        basis = np.abs(y)
        basis = np.where(x > 0, basis, np.abs(y[lowest]).mean())
        return 1.0 / basis**2
    basis = np.where(x > 0, x, x[lowest][0])
    return 1.0 / basis if weighting == "1/x" else 1.0 / basis**2


def _check_method(model: str, weighting: str | None, limits: dict[str, float]) -> None:
    if model not in PARAM_NAMES:
        raise SpecificationError(
            f"standard curve model {model!r} is not known; allowed: {', '.join(PARAM_NAMES)}"
        )
    if weighting not in WEIGHTINGS:
        raise SpecificationError(
            f"standard curve weighting {weighting!r} is not known; allowed: none, 1/x, 1/x2, 1/y2"
        )
    for name, value in limits.items():
        high = 1.0 if name == "min_r2" else np.inf
        if not isinstance(value, int | float) or not (0 < value <= high) or not np.isfinite(value):
            allowed = "between 0 and 1" if name == "min_r2" else "a positive percentage"
            raise SpecificationError(f"{name} must be {allowed}; received {value!r}")


def _check_data(model: str, nominal: FloatArray, absorbance: FloatArray) -> None:
    if nominal.ndim != 1 or nominal.shape != absorbance.shape:
        raise CalculationError(
            f"each standard needs one nominal concentration and one absorbance; received "
            f"{nominal.size} concentrations and {absorbance.size} absorbances"
        )
    if not (np.all(np.isfinite(nominal)) and np.all(np.isfinite(absorbance))):
        raise CalculationError("standard concentrations and absorbances must all be numbers")
    if np.any(nominal < 0):
        raise CalculationError(
            f"nominal standard concentrations must be ≥ 0 mg/mL; received {nominal.min():g}"
        )
    n_params = len(PARAM_NAMES[model])
    levels = np.unique(nominal)
    if levels[levels > 0].size < 2 or levels.size < n_params or nominal.size <= n_params:
        raise CalculationError(
            f"a {model} standard curve needs more than {n_params} standards at {n_params} or more "
            f"concentrations, two of them above zero; received {nominal.size} standards at "
            f"{levels.size} concentrations"
        )


def _back_calculated_rows(
    curve_inverse: Callable[[FloatArray], FloatArray],
    nominal: FloatArray,
    absorbance: FloatArray,
    bias_limit_pct: float,
    lowest_bias_limit_pct: float,
) -> tuple[BackCalculatedStandard, ...]:
    """bias % = 100 · (back-calculated − nominal) / nominal; ±lowest limit at the lowest level."""
    lowest = nominal[nominal > 0].min()
    back = curve_inverse(absorbance)
    rows = []
    for x, y, xb in zip(nominal, absorbance, back, strict=True):
        if x == 0:
            rows.append(BackCalculatedStandard(float(x), float(y), float(xb), None, None, None))
            continue
        limit = lowest_bias_limit_pct if x == lowest else bias_limit_pct
        bias = 100.0 * (xb - x) / x
        within = bool(np.isfinite(bias) and abs(bias) <= limit)
        rows.append(
            BackCalculatedStandard(float(x), float(y), float(xb), float(bias), limit, within)
        )
    return tuple(rows)


def fit_standard_curve(
    nominal_mg_per_ml: npt.ArrayLike,
    absorbance: npt.ArrayLike,
    model: str,
    weighting: str | None = None,
    min_r2: float = 0.99,
    bias_limit_pct: float = 15.0,
    lowest_bias_limit_pct: float = 20.0,
) -> StandardCurve:
    """Fit absorbance against standard concentration and judge the curve.

    Minimises Σ wᵢ·(yᵢ − f(xᵢ))² (model f and weights w in the module docstring);
    R² = 1 − Σw(y − ŷ)² / Σw(y − ȳ_w)² with ȳ_w the weighted mean; each non-zero standard is
    back-calculated through the curve, bias % = 100 · (x̂ − x) / x.
    """
    _check_method(
        model,
        weighting,
        {
            "min_r2": min_r2,
            "bias_limit_pct": bias_limit_pct,
            "lowest_bias_limit_pct": lowest_bias_limit_pct,
        },
    )
    x = np.asarray(nominal_mg_per_ml, dtype=float).ravel()
    y = np.asarray(absorbance, dtype=float).ravel()
    _check_data(model, x, y)
    w = _weights(weighting, x, y)
    if model == "4pl":
        params = _fit_4pl(x, y, w)
    else:
        params = _fit_linear_in_params(x, y, w, 1 if model == "linear" else 2)

    fitted = curve_response(model, params, x)
    mean_w = np.sum(w * y) / np.sum(w)
    ss_tot = np.sum(w * (y - mean_w) ** 2)
    r2 = float(1.0 - np.sum(w * (y - fitted) ** 2) / ss_tot) if ss_tot > 0 else float("nan")
    low, high = float(x[x > 0].min()), float(x.max())
    ends = curve_response(model, params, np.array([low, high]))
    trend = 1.0 if ends[1] >= ends[0] else -1.0
    rows = _back_calculated_rows(
        lambda a: _inverse(model, params, a, trend), x, y, bias_limit_pct, lowest_bias_limit_pct
    )

    reasons = []
    if not np.isfinite(r2) or r2 < min_r2:
        reasons.append(f"R² {r2:.4f} is below the method minimum {min_r2:g}")
    if ends[1] == ends[0]:
        reasons.append("the curve is flat: absorbance does not change with concentration")
    if model == "quadratic" and params[2] != 0:
        vertex = -params[1] / (2.0 * params[2])
        if low < vertex < high:
            reasons.append(
                f"the quadratic curve turns over at {vertex:.4g} mg/mL, inside the calibrated "
                f"range {low:g}–{high:g} mg/mL"
            )
    for row in rows:
        if row.within_limit is False:
            reasons.append(_standard_failure(row, low))
    return StandardCurve(
        model=model,
        weighting=weighting,
        param_names=PARAM_NAMES[model],
        params=tuple(float(p) for p in params),
        r2=r2,
        range_low_mg_per_ml=low,
        range_high_mg_per_ml=high,
        back_calculated=rows,
        accepted=not reasons,
        reasons=tuple(reasons),
        min_r2=float(min_r2),
        bias_limit_pct=float(bias_limit_pct),
        lowest_bias_limit_pct=float(lowest_bias_limit_pct),
    )


def _standard_failure(row: BackCalculatedStandard, lowest: float) -> str:
    where = " (lowest standard)" if row.nominal_mg_per_ml == lowest else ""
    if row.bias_pct is None or not np.isfinite(row.bias_pct):
        return (
            f"standard {row.nominal_mg_per_ml:g} mg/mL{where} (A {row.absorbance_au:.4g}) cannot "
            f"be read back through the curve"
        )
    return (
        f"standard {row.nominal_mg_per_ml:g} mg/mL{where} back-calculates to "
        f"{row.back_calculated_mg_per_ml:.4g} mg/mL, bias {row.bias_pct:+.1f} %; "
        f"allowed ±{row.limit_pct:g} %"
    )


# --------------------------------------------------------------------------- samples


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
            reason = "the absorbance is not a number"
        elif trend * (yi - a_high) > scale or xi > high * (1 + 1e-12):
            reason = _outside(low, high, "above the highest standard")
        elif trend * (a_low - yi) > scale or xi < low * (1 - 1e-12):
            reason = _outside(low, high, "below the lowest standard")
        elif not np.isfinite(xi):
            reason = "the absorbance cannot be read back through the curve"
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
