"""The inputs of a protein standard curve, checked: the method's model, weighting and limits,
the standards' concentrations and absorbances, and the fit weights they give."""

from __future__ import annotations

import numpy as np
import numpy.typing as npt

from pipeline.errors import CalculationError, SpecificationError

FloatArray = npt.NDArray[np.float64]

PARAM_NAMES: dict[str, tuple[str, ...]] = {
    "linear": ("intercept_au", "slope_au_per_mg_per_ml"),
    "quadratic": ("c0_au", "c1_au_per_mg_per_ml", "c2_au_per_mg2_per_ml2"),
    "4pl": ("a_au", "b_hill", "c_mg_per_ml", "d_au"),
}
WEIGHTINGS: tuple[str | None, ...] = (None, "1/x", "1/x2", "1/y2")


def fit_weights(weighting: str | None, x: FloatArray, y: FloatArray) -> FloatArray:
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


def check_method(model: str, weighting: str | None, limits: dict[str, float]) -> None:
    """The model and weighting are known and each limit lies in its allowed range."""
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


def check_data(model: str, nominal: FloatArray, absorbance: FloatArray) -> None:
    """One finite, non-negative concentration per absorbance, enough levels for the model."""
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
