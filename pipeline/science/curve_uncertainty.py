"""What the standard curve itself adds to a protein result's uncertainty (inverse prediction).

A sample's in-well concentration is x̂ = f⁻¹(A). The curve's parameters are uncertain (covariance
C from the fit, with its n − p degrees of freedom), and that error is shared by every replicate
read through the same curve, so it does not shrink with replicates. By the delta method
(JCGM 100:2008 "GUM" 5.1.2; Draper & Smith, Applied Regression Analysis, 3rd ed., 3.2 on inverse
prediction), u_curve(x̂) = √(gᵀ C g) / |f′(x̂)| with g = ∂f/∂θ at x̂. The protein result combines
it with the replicates' SE (n − 1 dof) by Welch–Satterthwaite
(``pipeline.science.combined_uncertainty``).
"""

from __future__ import annotations

import math

import numpy as np

from pipeline.science.standard_curves import StandardCurve, parameter_gradient


def inverse_prediction_se(curve: StandardCurve, in_well_mg_per_ml: float) -> float:
    """SE of x̂ from the curve's parameters alone, in mg/mL in the well (NaN when unknown)."""
    if not curve.covariance or curve.dof <= 0 or not math.isfinite(in_well_mg_per_ml):
        return float("nan")
    x = float(in_well_mg_per_ml)
    g = parameter_gradient(curve.model, np.asarray(curve.params), np.array([x]))[0]
    variance = float(g @ np.asarray(curve.covariance) @ g)
    step = 1e-6 * max(abs(x), curve.range_high_mg_per_ml)
    ends = np.asarray(curve.absorbance_at(np.array([x - step, x + step])), dtype=float)
    slope = (ends[1] - ends[0]) / (2.0 * step)
    if not slope or not math.isfinite(slope) or variance < 0:
        return float("nan")
    return math.sqrt(variance) / abs(slope)


def parameter_ses(curve: StandardCurve) -> tuple[float, ...]:
    """Standard errors of the curve's parameters, √diag C (NaN when the covariance is unknown)."""
    if not curve.covariance:
        return tuple(float("nan") for _ in curve.params)
    return tuple(float(math.sqrt(max(v, 0.0))) for v in np.diag(np.asarray(curve.covariance)))
