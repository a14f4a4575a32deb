"""Integrated Michaelis–Menten fit to whole progress curves: a cross-check of the initial-rate Km.

The integrated rate law, Vmax·t = P + Km·ln(S₀/(S₀ − P)), has the closed form
P(t) = S₀ − Km·W((S₀/Km)·exp((S₀ − Vmax·t)/Km)) with W the Lambert W function (Schnell & Mendoza
1997, J. Theor. Biol. 187:207). A lot's substrate-series wells share one enzyme dilution, so one
Vmax (mM/min in the well) and one Km are fitted to all of them, each well with its own starting
absorbance a₀ᵢ and its substrate blank's rate bᵢ (known, subtracted):

A_i(t) = a₀ᵢ + ε·l·P(t; S₀ᵢ, Vmax, Km) + bᵢ·t.

Derivatives by implicit differentiation of the integrated law (S = S₀ − P):
∂P/∂Vmax = t·S/(S + Km), ∂P/∂Km = −ln(S₀/S)·S/(S + Km). Least squares by scipy's
trust-region solver. Every read below the reader's limit is used (not only the initial window),
so the Km here rests on the whole curve's shape as well as on the substrate series. Its SE from
the Jacobian treats reads as independent; replicate-to-replicate scatter (pipetting) is not in
it, so it is reported as a cross-check beside the initial-rate Km, not as a result.
"""

from __future__ import annotations

from dataclasses import dataclass
from typing import Any

import numpy as np
import numpy.typing as npt
from scipy import optimize
from scipy.special import lambertw

from pipeline.errors import CalculationError
from pipeline.plain_data import to_plain

FloatArray = npt.NDArray[np.float64]


def product_formed_mm(t_min: FloatArray, s0_mm: FloatArray, vmax_mm_per_min: float, km_mm: float) -> FloatArray:
    """P(t) = S₀ − Km·W((S₀/Km)·exp((S₀ − Vmax·t)/Km)) (arrays broadcast)."""
    with np.errstate(over="ignore"):
        exponent = (s0_mm - vmax_mm_per_min * t_min) / km_mm + np.log(s0_mm / km_mm)
        # W(exp(x)) for large x: use the asymptote x − ln x to stay finite.
        big = exponent > 500
        w = np.where(big, exponent - np.log(np.maximum(exponent, 1.0)),
                     np.real(lambertw(np.exp(np.minimum(exponent, 500)))))
    return s0_mm - km_mm * w


@dataclass(frozen=True)
class IntegratedFit:
    """Shared Vmax (mM/min in the well) and Km (mM) of a lot's progress curves."""

    km_mm: float
    km_se_read_noise_mm: float  # from read noise alone: pipetting scatter between wells is not in it
    vmax_mm_per_min: float
    wells: int
    reads: int
    residual_sd_au: float
    converged: bool

    def to_dict(self) -> dict[str, Any]:
        return dict(to_plain(self))


def fit_integrated(time_min: npt.ArrayLike, absorbance: npt.ArrayLike, s0_mm: npt.ArrayLike, au_per_mm: float,
                   blank_au_per_min: npt.ArrayLike, usable_n: npt.ArrayLike, start: tuple[float, float]) -> IntegratedFit:
    """Fit the integrated law to W wells (rows of ``absorbance``, reads before ``usable_n`` each)."""
    t = np.asarray(time_min, dtype=float)
    a = np.atleast_2d(np.asarray(absorbance, dtype=float))
    s0 = np.asarray(s0_mm, dtype=float)
    blank = np.asarray(blank_au_per_min, dtype=float)
    n_use = np.asarray(usable_n, dtype=int)
    wells = a.shape[0]
    if wells < 2 or np.any(s0 <= 0) or not np.isfinite(au_per_mm) or au_per_mm <= 0:
        raise CalculationError("an integrated fit needs at least two wells with a positive substrate and ε·l")
    keep = np.arange(t.size)[None, :] < n_use[:, None]
    row, col = np.nonzero(keep)
    if row.size < wells + 3:
        raise CalculationError(f"only {row.size} usable reads for {wells + 2} parameters")
    tt, ss, yy = t[col], s0[row], a[row, col] - blank[row] * t[col]
    scale = np.array([max(start[0], 1e-12), max(start[1], 1e-12)])

    def parts(theta: FloatArray) -> tuple[FloatArray, FloatArray, FloatArray]:
        vmax, km = theta[0] * scale[0], theta[1] * scale[1]
        p = product_formed_mm(tt, ss, vmax, km)
        s = np.maximum(ss - p, 1e-300)
        return p, s, np.array([vmax, km])

    def residual(theta: FloatArray) -> FloatArray:
        p, _, _ = parts(theta)
        return yy - (theta[2:][row] + au_per_mm * p)

    def jacobian(theta: FloatArray) -> FloatArray:
        _, s, (_, km) = parts(theta)
        share = s / (s + km)
        jac = np.zeros((row.size, theta.size))
        jac[:, 0] = -au_per_mm * tt * share * scale[0]
        jac[:, 1] = au_per_mm * np.log(ss / s) * share * scale[1]
        jac[np.arange(row.size), 2 + row] = -1.0
        return jac

    a0 = np.array([a[i, :max(n_use[i], 1)][:1].mean() for i in range(wells)])
    theta0 = np.concatenate([[1.0, 1.0], a0])
    lower = np.concatenate([[1e-6, 1e-6], np.full(wells, -np.inf)])
    result = optimize.least_squares(residual, theta0, jac=jacobian, bounds=(lower, np.inf), method="trf",
                                    x_scale="jac", max_nfev=200)
    dof = row.size - theta0.size
    s2 = float(np.sum(result.fun**2) / dof)
    try:
        cov = s2 * np.linalg.inv(result.jac.T @ result.jac)
        se = np.sqrt(np.clip(np.diag(cov)[:2], 0.0, None)) * scale
    except np.linalg.LinAlgError:
        se = np.array([np.nan, np.nan])
    return IntegratedFit(km_mm=float(result.x[1] * scale[1]), km_se_read_noise_mm=float(se[1]),
                         vmax_mm_per_min=float(result.x[0] * scale[0]),
                         wells=wells, reads=int(row.size), residual_sd_au=float(np.sqrt(s2)),
                         converged=bool(result.success))
