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
from scipy import stats

from pipeline.errors import CalculationError
from pipeline.plain_data import to_plain
from pipeline.science.least_squares import NLSResult, fit_least_squares
from pipeline.science.standard_curve_inputs import (
    PARAM_NAMES,
    check_data,
    check_method,
    fit_weights,
)
from pipeline.science.units import FloatOrArray, as_result

FloatArray = npt.NDArray[np.float64]


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


def parameter_gradient(model: str, params: FloatArray, x: FloatArray) -> FloatArray:
    """d absorbance / d params at each x, shape (n, p) (see ``_gradient``)."""
    return _gradient(model, params, x)


def _gradient(model: str, params: FloatArray, x: FloatArray) -> FloatArray:
    """d absorbance / d params at each x, shape (n, p).

    linear [1, x]; quadratic [1, x, x²]; 4PL with u = (x/c)^b and F = (a − d)/(1 + u)²:
    [1/(1 + u), −F·u·ln(x/c), F·b·u/c, u/(1 + u)] (the ln term is 0 at x = 0).
    """
    if model in ("linear", "quadratic"):
        return np.vander(x, len(params), increasing=True)
    a, b, c, d = params
    with np.errstate(divide="ignore", invalid="ignore", over="ignore"):
        xp = np.maximum(x, 0.0)
        u = (xp / c) ** b
        factor = (a - d) / (1.0 + u) ** 2
        log_term = np.where(xp > 0, u * np.log(np.where(xp > 0, xp, 1.0) / c), 0.0)
        return np.column_stack([1.0 / (1.0 + u), -factor * log_term, factor * b * u / c, u / (1.0 + u)])


def _covariance(model: str, params: FloatArray, x: FloatArray, residuals: FloatArray,
                w: FloatArray) -> tuple[tuple[tuple[float, ...], ...], int]:
    """Parameter covariance C = s²·(GᵀWG)⁻¹, s² = Σ wᵢ rᵢ² / (n − p), G = d A / d params.

    Returns (C, n − p); C is empty when GᵀWG cannot be inverted.
    """
    g = _gradient(model, params, x)
    dof = int(x.size - params.size)
    try:
        inverse = np.linalg.inv(g.T @ (w[:, None] * g))
    except np.linalg.LinAlgError:
        return (), dof
    cov = float(np.sum(w * residuals**2)) / dof * inverse
    return tuple(tuple(float(v) for v in row) for row in cov), dof


def _fit_4pl(x: FloatArray, y: FloatArray, w: FloatArray) -> NLSResult:
    """Minimise Σ wᵢ·(yᵢ − 4PL(xᵢ))² with the one-curve engine (bounded) from several starts.

    Bounds: 0.001 ≤ b ≤ 20 and c within 10⁻³–10³ × the standards' range; the converged fit of
    lowest RSS is kept.
    """
    low, high = y[x == x.min()].mean(), y[x == x.max()].mean()
    span = high - low
    positive = x[x > 0]
    bounds = (
        [-np.inf, 1e-3, positive.min() * 1e-3, -np.inf],
        [np.inf, 20.0, positive.max() * 1e3, np.inf],
    )
    best: NLSResult | None = None
    for extra in (0.25, 1.0, 4.0):
        for c0 in (np.median(positive), positive.max()):
            for b0 in (1.0, 2.0):
                try:
                    fit = fit_least_squares(
                        lambda xs, p: curve_response("4pl", p, xs),
                        lambda xs, p: _gradient("4pl", p, xs),
                        x, y, [low, b0, c0, high + extra * span], weights=w,
                        param_names=PARAM_NAMES["4pl"], method="trf", max_nfev=5000, bounds=bounds,
                    )
                except CalculationError:
                    continue
                if fit.converged and (best is None or fit.rss < best.rss):
                    best = fit
    if best is None:
        raise CalculationError("the 4PL standard curve fit did not converge from any start")
    return best


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
            out[key] = to_plain(out[key])
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
    covariance: tuple[tuple[float, ...], ...] = ()
    dof: int = 0

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

    def eval_uncertainty(self, conc_mg_per_ml: npt.ArrayLike, level: float = 0.95) -> FloatArray:
        """Half-width of the pointwise confidence band of the curve's absorbance (delta method).

        var A(x) = gᵀ C g with g = d A / d params at x and C the parameter covariance;
        half-width = t(1 − (1 − level)/2, dof) · √var (NaN when the covariance is not known).
        """
        x = np.atleast_1d(np.asarray(conc_mg_per_ml, dtype=float))
        if not self.covariance or self.dof <= 0:
            return np.full(x.shape, np.nan)
        g = _gradient(self.model, np.asarray(self.params), x)
        var = np.einsum("ni,ij,nj->n", g, np.asarray(self.covariance), g)
        t = float(stats.t.ppf(1.0 - (1.0 - level) / 2.0, self.dof))
        return t * np.sqrt(np.clip(var, 0.0, None))

    def response_curve(self, points: int = 121) -> dict[str, list[float]]:
        """Absorbance the curve predicts from 0 to 1.5 × the highest standard (for a chart).

        ``points`` evenly spaced concentrations; returns {"mg_per_ml": [...], "absorbance_au": [...]}.
        """
        x = np.linspace(0.0, 1.5 * self.range_high_mg_per_ml, points)
        with np.errstate(all="ignore"):
            y = np.asarray(self.absorbance_at(x), dtype=float)
        return {"mg_per_ml": [float(v) for v in x], "absorbance_au": [to_plain(v) for v in y]}

    def to_dict(self) -> dict[str, Any]:
        return {
            "model": self.model,
            "weighting": self.weighting,
            "params": {n: to_plain(v) for n, v in zip(self.param_names, self.params, strict=True)},
            "param_se": {n: to_plain(float(np.sqrt(max(self.covariance[i][i], 0.0))) if self.covariance else None)
                         for i, n in enumerate(self.param_names)},
            "dof": self.dof,
            "r2": to_plain(self.r2),
            "range_low_mg_per_ml": self.range_low_mg_per_ml,
            "range_high_mg_per_ml": self.range_high_mg_per_ml,
            "back_calculated": [row.to_dict() for row in self.back_calculated],
            "accepted": self.accepted,
            "reasons": list(self.reasons),
            "min_r2": self.min_r2,
            "bias_limit_pct": self.bias_limit_pct,
            "lowest_bias_limit_pct": self.lowest_bias_limit_pct,
        }


# --------------------------------------------------------------------------- fitting


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
    check_method(
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
    check_data(model, x, y)
    w = fit_weights(weighting, x, y)
    if model == "4pl":
        params = np.asarray(_fit_4pl(x, y, w).params)
    else:
        params = _fit_linear_in_params(x, y, w, 1 if model == "linear" else 2)

    fitted = curve_response(model, params, x)
    covariance, dof = _covariance(model, params, x, y - fitted, w)
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
        covariance=covariance,
        dof=dof,
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
