"""Substrate inhibition: v = Vmax * S / (Km + S + S**2 / Ki), fitted in q = 1/Ki.

Fitting q keeps Ki -> infinity (no inhibition) regular. The fit starts from every value of
``START_VALUES`` and keeps the converged fit of lowest RSS; the one-curve fit uses the
one-curve engine (``least_squares``), the batched fit (``substrate_inhibition_batch``) the
batched engine, from the same start values (``substrate_inhibition_starts``). Units follow the
inputs, as for Michaelis-Menten.
"""

from __future__ import annotations

from dataclasses import dataclass
from typing import Any

import numpy as np
from numpy.typing import ArrayLike, NDArray

from pipeline.errors import CalculationError
from pipeline.plain_data import to_plain
from pipeline.science.batched_least_squares import solve_stacked
from pipeline.science.kinetic_data import FloatArray, checked_curve
from pipeline.science.least_squares import NLSResult, fit_least_squares
from pipeline.science.michaelis_menten import fit_michaelis_menten, michaelis_menten_start
from pipeline.science.rate_curves import RateCurve, curve_substrate, rate_curve

SUBSTRATE_INHIBITION = "substrate-inhibition"

BoolArray = NDArray[np.bool_]

START_VALUES = (
    "quadratic S/v = Km/Vmax + S/Vmax + S^2/(Vmax Ki)",
    "the Michaelis-Menten fit with 1/Ki = 0",
    "twice the Michaelis-Menten Vmax and Km with 1/Ki = 1/max S",
    "the Hanes-Woolf line with 1/Ki = 1/max S",
)
"""The start values tried for every curve, in this order."""

PARAM_NAMES = ("vmax", "km", "inverse_ki")


@dataclass(frozen=True)
class SubstrateInhibitionFit:
    """Substrate-inhibition fit; ``km`` and ``ki`` in substrate units, ``vmax`` in rate units.

    Fitted internally with 1/Ki so that Ki -> infinity (no inhibition) stays regular;
    ki_se = se(1/Ki) / (1/Ki)^2 and ki_ci95 is the inverted interval of 1/Ki (its upper end
    is infinite when that interval reaches zero).
    """

    vmax: float
    km: float
    ki: float
    vmax_se: float
    km_se: float
    ki_se: float
    vmax_ci95: tuple[float, float]
    km_ci95: tuple[float, float]
    ki_ci95: tuple[float, float]
    inverse_ki: float
    inverse_ki_se: float
    residual_se: float
    rss: float
    n: int
    dof: int
    converged: bool
    message: str
    cov_vmax_km: float = float("nan")  # covariance of Vmax and Km, rate units × substrate units

    def rate_at(self, substrate: ArrayLike) -> FloatArray:
        """v = Vmax S / (Km + S + S^2/Ki) at each substrate level."""
        s = np.asarray(substrate, dtype=float)
        return self.vmax * s / (self.km + s + s**2 / self.ki)

    def curve(self, tested_substrate: ArrayLike) -> RateCurve:
        """The fitted curve over the tested substrate range (for a chart); no band is computed."""
        s = curve_substrate(tested_substrate, self.km)
        return rate_curve(s, self.rate_at(s), None)

    def to_dict(self) -> dict[str, Any]:
        """A JSON-able mapping (NaN and infinities become None)."""
        return {"model": SUBSTRATE_INHIBITION, **to_plain(self)}


# ------------------------------------------------------------------------------------ model


def _model(s: FloatArray, p: FloatArray) -> FloatArray:
    """v = Vmax S / (Km + S + S^2 q), q = 1/Ki."""
    return p[0] * s / (p[1] + s + p[2] * s**2)


def _jacobian(s: FloatArray, p: FloatArray) -> FloatArray:
    """dv/dVmax = S/D; dv/dKm = -Vmax S/D^2; dv/dq = -Vmax S^3/D^2, D = Km + S + q S^2."""
    d = p[1] + s + p[2] * s**2
    return np.column_stack([s / d, -p[0] * s / d**2, -p[0] * s**3 / d**2])


def batched_model(s: FloatArray, p: FloatArray) -> FloatArray:
    """Rows of v = Vmax S / (Km + S + q S^2)."""
    return p[:, 0:1] * s / (p[:, 1:2] + s + p[:, 2:3] * s**2)


def batched_linearised(s: FloatArray, p: FloatArray) -> tuple[FloatArray, FloatArray]:
    """Rows of f = Vmax S/D and its Jacobian [S/D, -Vmax S/D^2, -Vmax S^3/D^2], D = Km + S + q S^2."""
    vmax, km, q = p[:, 0:1], p[:, 1:2], p[:, 2:3]
    d = km + s + q * s**2
    j0 = s / d
    j1 = -vmax * s / d**2
    return vmax * j0, np.stack([j0, j1, j1 * s**2], axis=2)


def same_branch(s: FloatArray, w: FloatArray, p: FloatArray, p_new: FloatArray) -> BoolArray:
    """True where D = Km + S + q S^2 keeps its sign at every point in use from p to p_new.

    D is affine in (Km, q), so a sign change means the step passes a pole of the rate law.
    """
    d_old = p[:, 1:2] + s + p[:, 2:3] * s**2
    d_new = p_new[:, 1:2] + s + p_new[:, 2:3] * s**2
    with np.errstate(invalid="ignore"):
        return np.all((w == 0) | (d_old * d_new > 0), axis=1)


def inverse_to_ki(q: FloatArray, q_se: FloatArray, q_lo: FloatArray,
                  q_hi: FloatArray) -> tuple[FloatArray, ...]:
    """Ki = 1/q, se(Ki) = se(q)/q^2 and CI95(Ki) = (1/q_hi, 1/q_lo) from the CI95 of q.

    The upper end is infinite where q's interval reaches zero; q = 0 gives an infinite Ki.
    Returns (ki, ki_se, ki_low, ki_high).
    """
    with np.errstate(divide="ignore", invalid="ignore"):
        ki = np.where(q != 0, 1 / q, np.inf)
        ki_se = np.where(q != 0, q_se / q**2, np.inf)
        ki_lo = np.where((q_lo > 0) | (q_hi > 0), 1 / q_hi, np.nan)
        ki_hi = np.where(q_lo > 0, 1 / q_lo, np.where(q_hi > 0, np.inf, np.nan))
    return ki, ki_se, ki_lo, ki_hi


# ------------------------------------------------------------------------------ start values


def distinct_levels(s: FloatArray, use: BoolArray) -> NDArray[np.int64]:
    """Number of distinct substrate levels among the points ``use`` of each row."""
    ordered = np.sort(np.where(use, s, np.inf), axis=1)
    first = np.isfinite(ordered[:, :1])
    with np.errstate(invalid="ignore"):
        steps = (np.diff(ordered, axis=1) > 0) & np.isfinite(ordered[:, 1:])
    return (first[:, 0] + steps.sum(axis=1)).astype(np.int64)


def _quadratic_start(s: FloatArray, v: FloatArray, w: FloatArray) -> tuple[FloatArray, BoolArray]:
    """Least-squares parabola S/v = c0 + c1 S + c2 S^2 over points in use with S > 0, v > 0.

    Unweighted. Start (1/c1, c0/c1, max(c2/c1, 0)); valid where at least 3 distinct levels
    enter the fit and c1 > 0, c0 > 0.
    """
    use = (w > 0) & (s > 0) & (v > 0)
    scale = np.where(use, s, 0.0).max(axis=1)
    scale = np.where(scale > 0, scale, 1.0)[:, None]
    with np.errstate(divide="ignore", invalid="ignore"):
        x = np.where(use, s / scale, 0.0)
        y = np.where(use, s / np.where(use, v, 1.0), 0.0)
    basis = np.stack([use * 1.0, x, x**2], axis=2)
    gram = np.einsum("mni,mnj->mij", basis, basis)
    coef = solve_stacked(gram, np.einsum("mni,mn->mi", basis, y))
    c0, c1, c2 = coef[:, 0], coef[:, 1] / scale[:, 0], coef[:, 2] / scale[:, 0] ** 2
    with np.errstate(divide="ignore", invalid="ignore"):
        start = np.column_stack([1 / c1, c0 / c1, np.maximum(c2 / c1, 0.0)])
    valid = (distinct_levels(s, use) >= 3) & (c1 > 0) & (c0 > 0) & np.all(np.isfinite(start), axis=1)
    return start, valid


def substrate_inhibition_starts(
    s: FloatArray, v: FloatArray, w: FloatArray, mm_vmax: FloatArray, mm_km: FloatArray
) -> tuple[FloatArray, BoolArray]:
    """(K, B, 3) start values in the order of ``START_VALUES`` and where each is defined.

    Rows of (B, n) data; ``mm_vmax``, ``mm_km`` the Michaelis-Menten fit of each row (NaN
    where it failed).
    """
    s_max = np.where(w > 0, s, 0.0).max(axis=1)
    with np.errstate(divide="ignore"):
        q_top = 1 / s_max
    quad, quad_ok = _quadratic_start(s, v, w)
    mm_ok = np.isfinite(mm_vmax) & (mm_km > 0)
    vmax0, km0 = michaelis_menten_start(s, v, w)
    starts = np.stack(
        [
            quad,
            np.column_stack([mm_vmax, mm_km, np.zeros_like(q_top)]),
            np.column_stack([2 * mm_vmax, 2 * mm_km, q_top]),
            np.column_stack([vmax0, km0, q_top]),
        ]
    )
    return starts, np.stack([quad_ok, mm_ok, mm_ok, np.ones_like(mm_ok)])


# ---------------------------------------------------------------------------------- one curve


def _best_fit(s: FloatArray, v: FloatArray, w: FloatArray | None, starts: FloatArray) -> NLSResult:
    """The fit of lowest RSS among converged fits from ``starts`` (K, 3), tried in order."""
    best: NLSResult | None = None
    failures: list[str] = []
    for p0 in starts:
        try:
            res = fit_least_squares(_model, _jacobian, s, v, p0, weights=w, param_names=PARAM_NAMES)
        except CalculationError as exc:
            failures.append(str(exc))
            continue
        if best is None or (res.converged, -res.rss) > (best.converged, -best.rss):
            best = res
    if best is None:
        raise CalculationError(
            "the substrate-inhibition model could not be fitted from any start value: "
            + "; ".join(sorted(set(failures)))
        )
    return best


def fit_substrate_inhibition(
    substrate: ArrayLike, rate: ArrayLike, weights: ArrayLike | None = None
) -> SubstrateInhibitionFit:
    """Fit v = Vmax S / (Km + S + S^2/Ki) by non-linear least squares.

    The fit runs in q = 1/Ki (regular as Ki -> infinity) from the start values of
    ``START_VALUES`` and keeps the lowest RSS. se from s^2 (J'WJ)^-1, s^2 = RSS/(n-3);
    Ki = 1/q, se(Ki) = se(q)/q^2, CI95(Ki) from the inverted CI95 of q.
    """
    s, v, w = checked_curve(substrate, rate, weights, n_params=3)
    try:
        mm = fit_michaelis_menten(s, v, w)
        mm_vmax, mm_km = mm.vmax, mm.km
    except CalculationError:
        mm_vmax, mm_km = float("nan"), float("nan")
    w_start = np.ones_like(v) if w is None else w
    starts, defined = substrate_inhibition_starts(
        s[None, :], v[None, :], w_start[None, :], np.array([mm_vmax]), np.array([mm_km]))
    best = _best_fit(s, v, w, starts[defined[:, 0], 0])
    q, q_se = best.params[2], best.se[2]
    ki, ki_se, ki_lo, ki_hi = (float(x) for x in inverse_to_ki(*np.array([q, q_se, *best.ci95[2]])))
    return SubstrateInhibitionFit(
        vmax=best.params[0],
        km=best.params[1],
        ki=ki,
        vmax_se=best.se[0],
        km_se=best.se[1],
        ki_se=ki_se,
        vmax_ci95=best.ci95[0],
        km_ci95=best.ci95[1],
        ki_ci95=(ki_lo, ki_hi),
        inverse_ki=q,
        inverse_ki_se=q_se,
        residual_se=best.residual_se,
        rss=best.rss,
        n=best.n,
        dof=best.dof,
        converged=best.converged,
        message=best.message,
        cov_vmax_km=float(best.covariance[0][1]),
    )
