"""Substrate inhibition for many curves in one pass of the batched engine.

v = Vmax * S / (Km + S + q * S**2),  q = 1/Ki.  All start values (``START_VALUES``) of all
curves are fitted together by ``batched_least_squares``; per curve the converged fit of lowest
RSS is kept, as the one-curve ``fit_substrate_inhibition`` keeps it.
"""

from __future__ import annotations

from dataclasses import dataclass
from typing import Any

import numpy as np
from numpy.typing import ArrayLike, NDArray

from pipeline.errors import CalculationError
from pipeline.plain_data import to_plain
from pipeline.science.batched_least_squares import (
    FAIL_START,
    FAIL_WANDERED,
    FITTED,
    BatchedFit,
    fit_batched_least_squares,
)
from pipeline.science.kinetic_data import (
    BATCH_CONVERGED,
    BATCH_NOT_CONVERGED,
    BATCH_NOT_FITTED,
    BATCH_TOO_FEW_LEVELS,
    BATCH_TOO_FEW_POINTS,
    FloatArray,
    batch_inputs,
    frozen,
)
from pipeline.science.michaelis_menten import MichaelisMentenBatch, fit_michaelis_menten_batch
from pipeline.science.substrate_inhibition import (
    START_VALUES,
    SUBSTRATE_INHIBITION,
    SubstrateInhibitionFit,
    batched_linearised,
    batched_model,
    distinct_levels,
    inverse_to_ki,
    same_branch,
    substrate_inhibition_starts,
)

BoolArray = NDArray[np.bool_]

_NOT_EVALUATED = (
    "the model cannot be evaluated at the start values {}: it gives non-finite numbers there"
)
_WANDERED = "the fit wandered to parameters where the model is not finite"
_NOT_SEPARABLE = (
    "the data cannot separate the parameters vmax, km, inverse_ki: "
    "the Jacobian at the optimum is (nearly) rank deficient"
)


@dataclass(frozen=True, eq=False)
class SubstrateInhibitionBatch:
    """Substrate-inhibition fits of B curves; every array has B rows (``*_ci95`` are (B, 2)).

    ``start`` is the index into ``START_VALUES`` of the start whose fit was kept (-1: none),
    ``failure`` the reason a curve could not be fitted ("" where it was).
    """

    vmax: FloatArray
    km: FloatArray
    ki: FloatArray
    vmax_se: FloatArray
    km_se: FloatArray
    ki_se: FloatArray
    vmax_ci95: FloatArray
    km_ci95: FloatArray
    ki_ci95: FloatArray
    inverse_ki: FloatArray
    inverse_ki_se: FloatArray
    residual_se: FloatArray
    rss: FloatArray
    n: NDArray[np.int64]
    dof: NDArray[np.int64]
    converged: BoolArray
    status: NDArray[np.str_]
    iterations: NDArray[np.int64]
    start: NDArray[np.int64]
    failure: NDArray[np.str_]
    cov_vmax_km: FloatArray | None = None

    def __len__(self) -> int:
        return int(self.vmax.shape[0])

    def message(self, i: int) -> str:
        """What happened to curve ``i``, in words."""
        status = str(self.status[i])
        if status in (BATCH_CONVERGED, BATCH_NOT_CONVERGED):
            done = "converged after" if status == BATCH_CONVERGED else "did not converge within"
            return (
                f"{done} {int(self.iterations[i])} Levenberg-Marquardt iterations "
                f"from {START_VALUES[int(self.start[i])]}"
            )
        return str(self.failure[i])

    def fit(self, i: int) -> SubstrateInhibitionFit:
        """Curve ``i`` as a one-curve result; raises CalculationError if it could not be fitted."""
        if not -len(self) <= i < len(self):
            raise CalculationError(f"curve {i} does not exist: the batch holds {len(self)} curves")
        if self.start[i] < 0:
            raise CalculationError(f"curve {i} could not be fitted: {self.failure[i]}")

        def pair(arr: FloatArray) -> tuple[float, float]:
            return float(arr[i, 0]), float(arr[i, 1])

        return SubstrateInhibitionFit(
            vmax=float(self.vmax[i]),
            km=float(self.km[i]),
            ki=float(self.ki[i]),
            vmax_se=float(self.vmax_se[i]),
            km_se=float(self.km_se[i]),
            ki_se=float(self.ki_se[i]),
            vmax_ci95=pair(self.vmax_ci95),
            km_ci95=pair(self.km_ci95),
            ki_ci95=pair(self.ki_ci95),
            inverse_ki=float(self.inverse_ki[i]),
            inverse_ki_se=float(self.inverse_ki_se[i]),
            residual_se=float(self.residual_se[i]),
            rss=float(self.rss[i]),
            n=int(self.n[i]),
            dof=int(self.dof[i]),
            converged=bool(self.converged[i]),
            message=self.message(i),
            cov_vmax_km=float(self.cov_vmax_km[i]) if self.cov_vmax_km is not None else float("nan"),
        )

    def to_dict(self) -> dict[str, Any]:
        """A JSON-able mapping of lists, one entry per curve (NaN and infinities become None)."""
        return {"model": SUBSTRATE_INHIBITION, **to_plain(self)}


def _failure_text(code: int, p0: FloatArray) -> str:
    if code == FAIL_START:
        return _NOT_EVALUATED.format(p0.tolist())
    return _WANDERED if code == FAIL_WANDERED else _NOT_SEPARABLE


def _failures(n_pts: NDArray[np.int64], levels: NDArray[np.int64], best: NDArray[np.int64],
              entry: NDArray[np.int64], codes: NDArray[np.int64], starts: FloatArray) -> NDArray[np.str_]:
    """Per curve why it could not be fitted, in the words of the one-curve fit ("" if it was)."""
    failure = np.full(n_pts.shape, "", dtype=object)
    for i in np.flatnonzero(n_pts <= 3):
        failure[i] = (
            f"too few points: {n_pts[i]} rates cannot fit 3 kinetic parameters; "
            "at least 4 are needed (6-8 substrate levels are usual)"
        )
    for i in np.flatnonzero((n_pts > 3) & (levels < 3)):
        failure[i] = (
            f"too few substrate levels: {levels[i]} distinct level(s) above zero cannot "
            "separate 3 kinetic parameters; at least 3 are needed"
        )
    for i in np.flatnonzero((n_pts > 3) & (levels >= 3) & (best < 0)):
        texts = {_failure_text(int(codes[e]), starts[k, i]) for k, e in enumerate(entry[:, i]) if e >= 0}
        failure[i] = (
            "the substrate-inhibition model could not be fitted from any start value: "
            + "; ".join(sorted(texts))
        )
    return failure.astype(str)


def _best_entries(fits: BatchedFit, entry: NDArray[np.int64], n_curves: int) -> NDArray[np.int64]:
    """Per curve the row of ``fits`` kept: starts walked in order, replaced only by a strictly
    better fit, ranked by (converged, -RSS); -1 where no start gave a fit."""
    best = np.full(n_curves, -1, dtype=np.int64)
    best_conv = np.zeros(n_curves, dtype=bool)
    best_rss = np.full(n_curves, np.inf)
    for e in entry if fits.failure.size else ():
        ok = (e >= 0) & (fits.failure[e] == FITTED)
        conv, rss = fits.converged[e], fits.rss[e]
        better = ok & ((best < 0) | (conv & ~best_conv) | ((conv == best_conv) & (rss < best_rss)))
        best = np.where(better, e, best)
        best_conv = np.where(better, conv, best_conv)
        best_rss = np.where(better, rss, best_rss)
    return best


def fit_batch_from(s: FloatArray, v: FloatArray, w: FloatArray,
                   mm: MichaelisMentenBatch) -> SubstrateInhibitionBatch:
    """All starts of all (checked) curves in one solve; per curve the best by (converged, -RSS)."""
    n_curves = s.shape[0]
    n_pts = (w > 0).sum(axis=1).astype(np.int64)
    levels = distinct_levels(s, (w > 0) & (s > 0))
    live = (n_pts >= 4) & (levels >= 3)

    starts, defined = substrate_inhibition_starts(s, v, w, np.asarray(mm.vmax), np.asarray(mm.km))
    defined &= live[None, :]
    k_idx, b_idx = np.nonzero(defined)
    fits = fit_batched_least_squares(batched_model, batched_linearised, s[b_idx], v[b_idx], w[b_idx], starts[k_idx, b_idx],
                                     same_branch)
    entry = np.full(defined.shape, -1, dtype=np.int64)
    entry[k_idx, b_idx] = np.arange(k_idx.size)
    best = _best_entries(fits, entry, n_curves)

    failure = _failures(n_pts, levels, best, entry, fits.failure, starts)
    fitted = best >= 0
    pick = np.where(fitted, best, 0)
    nan = np.full(n_curves, np.nan)

    def chosen(values: NDArray[Any]) -> NDArray[Any]:
        return np.where(fitted, values[pick], nan) if values.size else nan

    se = fits.se
    vmax, km, q = (chosen(fits.params[:, j]) for j in range(3))
    vmax_se, km_se, q_se = (chosen(se[:, j]) for j in range(3))
    rss = chosen(fits.rss)
    dof = n_pts - 3
    t = np.where(dof > 0, chosen(fits.t975), nan) if k_idx.size else nan
    ki, ki_se, ki_lo, ki_hi = inverse_to_ki(q, q_se, q - t * q_se, q + t * q_se)
    with np.errstate(divide="ignore", invalid="ignore"):
        residual_se = np.sqrt(rss / dof)
    converged = fitted & (fits.converged[pick] if k_idx.size else fitted)
    status = np.select(
        [n_pts <= 3, ~live, ~fitted, converged],
        [BATCH_TOO_FEW_POINTS, BATCH_TOO_FEW_LEVELS, BATCH_NOT_FITTED, BATCH_CONVERGED],
        default=BATCH_NOT_CONVERGED,
    )
    return SubstrateInhibitionBatch(
        vmax=frozen(vmax),
        km=frozen(km),
        ki=frozen(np.where(fitted, ki, nan)),
        vmax_se=frozen(vmax_se),
        km_se=frozen(km_se),
        ki_se=frozen(np.where(fitted, ki_se, nan)),
        vmax_ci95=frozen(np.column_stack([vmax - t * vmax_se, vmax + t * vmax_se])),
        km_ci95=frozen(np.column_stack([km - t * km_se, km + t * km_se])),
        ki_ci95=frozen(np.column_stack([ki_lo, ki_hi])),
        inverse_ki=frozen(q),
        inverse_ki_se=frozen(q_se),
        residual_se=frozen(residual_se),
        rss=frozen(rss),
        n=frozen(n_pts),
        dof=frozen(dof),
        converged=frozen(converged),
        status=frozen(status),
        iterations=frozen(np.where(fitted, fits.iterations[pick] if k_idx.size else 0, 0).astype(np.int64)),
        start=frozen(np.where(fitted, k_idx[pick] if k_idx.size else -1, -1).astype(np.int64)),
        failure=frozen(failure),
        cov_vmax_km=frozen(chosen(fits.covariance[:, 0, 1]) if k_idx.size else nan),
    )


def fit_substrate_inhibition_batch(
    substrate: ArrayLike,
    rate: ArrayLike,
    weights: ArrayLike | None = None,
    mask: ArrayLike | None = None,
) -> SubstrateInhibitionBatch:
    """Fit v = Vmax S / (Km + S + S^2/Ki) to B curves in one vectorised solve.

    Inputs as ``fit_michaelis_menten_batch``: ``rate`` (B, n), ``substrate`` (B, n) or (n,),
    ``weights`` (1/sigma^2) and ``mask`` (True = use) (B, n). The fit runs in q = 1/Ki from
    the start values of ``START_VALUES`` and keeps, per curve, the converged fit of lowest
    RSS = sum w (v - f)^2. s^2 = RSS/(n_i - 3), cov = s^2 (J'WJ)^-1,
    CI95 = p -/+ t(0.975, n_i - 3) se; Ki = 1/q, se(Ki) = se(q)/q^2, CI95(Ki) the inverted
    CI95 of q. Curves with fewer than 4 points or 3 substrate levels above zero get NaN and
    a status; the rest of the batch is still fitted.
    """
    s, v, w = batch_inputs(substrate, rate, weights, mask)
    return fit_batch_from(s, v, w, fit_michaelis_menten_batch(s, v, w))
