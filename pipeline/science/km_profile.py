"""Profile-likelihood 95 % interval of Km (Michaelis–Menten), cheap because Vmax is conditionally linear.

For a fixed Km = K the best Vmax is linear least squares on x = S/(K + S), so the profile is closed
form: RSS(K) = Σw·v² − (Σw·v·x)² / Σw·x². The interval is every K with
RSS(K) ≤ RSS_min·(1 + F₁,ν(0.95)/ν), ν = n − 2 (the likelihood-ratio / F interval of a nonlinear
parameter: Bates & Watts, Nonlinear Regression Analysis and Its Applications, 1988, 6.1;
Draper & Smith, 3rd ed., 24.5). Unlike the Wald interval Km ± t·SE it follows the curvature of
the model, so it is asymmetric where the data determine Km only on one side; its upper end is
infinite when no finite Km is rejected. Two root searches per curve (Brent's method).
"""

from __future__ import annotations

import math

import numpy as np
import numpy.typing as npt
from scipy import optimize, stats


def profile_rss(k_mm: float, s: npt.NDArray[np.float64], v: npt.NDArray[np.float64],
                w: npt.NDArray[np.float64]) -> float:
    """RSS of the best Vmax at Km = k: Σw·v² − (Σw·v·x)²/Σw·x², x = S/(k + S)."""
    x = s / (k_mm + s)
    sxx = float(np.sum(w * x * x))
    return float(np.sum(w * v * v) - (float(np.sum(w * v * x)) ** 2 / sxx if sxx > 0 else 0.0))


def km_profile_interval(substrate: npt.ArrayLike, rate: npt.ArrayLike, km_hat: float,
                        weights: npt.ArrayLike | None = None, level: float = 0.95) -> tuple[float, float]:
    """(low, high) of Km by the profile F test; high is inf when the data reject no large Km."""
    s = np.asarray(substrate, dtype=float)
    v = np.asarray(rate, dtype=float)
    w = np.ones_like(v) if weights is None else np.asarray(weights, dtype=float)
    keep = (w > 0) & np.isfinite(s) & np.isfinite(v)
    s, v, w = s[keep], v[keep], w[keep]
    dof = s.size - 2
    if dof < 1 or not (math.isfinite(km_hat) and km_hat > 0):
        return float("nan"), float("nan")
    rss_min = profile_rss(km_hat, s, v, w)
    threshold = rss_min * (1.0 + float(stats.f.ppf(level, 1, dof)) / dof)

    def excess(k: float) -> float:
        return profile_rss(k, s, v, w) - threshold

    if excess(km_hat) > 0 or not math.isfinite(threshold):
        return float("nan"), float("nan")  # km_hat is not this profile's minimum (another weighting)
    low_end = km_hat * 1e-6
    low = 0.0 if excess(low_end) <= 0 else optimize.brentq(excess, low_end, km_hat, xtol=1e-12 * km_hat)
    high = math.inf
    k = km_hat
    for _ in range(40):
        k_next = k * 2.0
        if excess(k_next) > 0:
            high = optimize.brentq(excess, k, k_next, xtol=1e-12 * km_hat)
            break
        k = k_next
    return float(low), float(high)
