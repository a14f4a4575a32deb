"""The error model a kinetic method declares, as fit weights, and a check of the residuals.

``constant``: every rate has the same SD, weights 1 (ordinary least squares).
``proportional``: the SD grows with the rate (a constant CV, e.g. pipetting), weights 1/v̂², with
v̂ the fitted rate, found by iteratively reweighted least squares (two reweightings from the
unweighted fit; weights from fitted, not observed, rates so that a low reading does not get a
large weight — Carroll & Ruppert, Transformation and Weighting in Regression, 1988, ch. 2).

Residual check: under the declared model the weighted residuals rᵢ·√wᵢ have one SD whatever the
rate, so their absolute values should not trend with the fitted rate. Spearman's rank correlation
between |rᵢ·√wᵢ| and v̂ᵢ is tested at ``alpha`` (one-sided in either direction counted as two-sided);
a significant trend says the declared error model may not hold, and the result says so.
"""

from __future__ import annotations

from dataclasses import dataclass
from enum import StrEnum

import numpy as np
import numpy.typing as npt
from scipy import stats

from pipeline.science.kinetic_data import batch_inputs
from pipeline.science.michaelis_menten import fit_michaelis_menten_batch

FloatArray = npt.NDArray[np.float64]
REWEIGHTINGS = 2


class ErrorModel(StrEnum):
    CONSTANT = "constant"
    PROPORTIONAL = "proportional"


def error_model_weights(substrate: npt.ArrayLike, rate: npt.ArrayLike, mask: npt.ArrayLike | None,
                        model: ErrorModel | str) -> FloatArray | None:
    """Fit weights (B, n) for the declared error model (None: unweighted); 0 where masked."""
    model = ErrorModel(model)
    if model is ErrorModel.CONSTANT:
        return None
    s, v, w = batch_inputs(substrate, rate, None, mask)
    weights = w.copy()
    for _ in range(REWEIGHTINGS):
        fit = fit_michaelis_menten_batch(s, v, weights)
        vmax, km = np.asarray(fit.vmax)[:, None], np.asarray(fit.km)[:, None]
        with np.errstate(invalid="ignore", divide="ignore"):
            fitted = vmax * s / (km + s)
            new = np.where((w > 0) & np.isfinite(fitted) & (fitted > 0), 1.0 / fitted**2, 0.0)
        usable = np.isfinite(vmax[:, 0]) & ((new > 0).sum(axis=1) >= 3)
        # Scale each curve's weights to a mean of 1 (the fit's s² absorbs the scale).
        scale = np.where(usable, new.sum(axis=1) / np.maximum((new > 0).sum(axis=1), 1), 1.0)
        weights = np.where(usable[:, None], new / scale[:, None], weights)
    return weights


@dataclass(frozen=True)
class ResidualCheck:
    """Spearman ρ of |weighted residual| against the fitted rate, its p-value, and the verdict."""

    rho: float
    p_value: float
    alpha: float
    holds: bool
    text: str


def residual_check(substrate: npt.ArrayLike, rate: npt.ArrayLike, vmax: float, km: float,
                   weights: npt.ArrayLike | None, model: ErrorModel | str, alpha: float = 0.05) -> ResidualCheck:
    """Does the spread of the weighted residuals trend with the rate? (module text)."""
    s = np.asarray(substrate, dtype=float)
    v = np.asarray(rate, dtype=float)
    w = np.ones_like(v) if weights is None else np.asarray(weights, dtype=float)
    fitted = vmax * s / (km + s)
    keep = (w > 0) & np.isfinite(fitted) & np.isfinite(v)
    if keep.sum() < 5 or np.ptp(fitted[keep]) == 0:
        return ResidualCheck(float("nan"), float("nan"), alpha, True, "too few rates to check the error model")
    spread = np.abs((v - fitted)[keep] * np.sqrt(w[keep]))
    rho, p = stats.spearmanr(spread, fitted[keep])
    holds = not (p < alpha)
    trend = "grows" if rho > 0 else "shrinks"
    text = (f"residual spread does not trend with the rate (Spearman ρ {rho:+.2f}, p {p:.2g}); the declared "
            f"{ErrorModel(model).value} error model holds" if holds else
            f"the residual spread {trend} with the rate (Spearman ρ {rho:+.2f}, p {p:.2g} < {alpha:g}): the "
            f"declared {ErrorModel(model).value} error model may not hold; review the fit")
    return ResidualCheck(float(rho), float(p), alpha, holds, text)
