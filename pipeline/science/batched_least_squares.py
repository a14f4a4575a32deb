"""One Levenberg-Marquardt engine for many small least-squares fits at once.

M rows (curves, or curve-and-start pairs) of a model ``f(x, p)`` with p = 2 or 3 parameters are
fitted to observations ``y`` by minimising, per row,

    RSS(p) = sum_i w_i * (y_i - f(x_i, p))**2        (w_i = 1/sigma_i**2; w_i = 0 drops a point)

Every iteration solves the damped normal equations of every running row,

    (J'WJ + lambda diag J'WJ) delta = J'W r          (``damped_step``)

accepts delta where the RSS does not rise (and the model's own step rule allows it; lambda /= 10)
and rejects it elsewhere (lambda *= 10). A row has converged when every Jacobian column is
orthogonal to the residual to GTOL (cosine), or when the step is tiny: ||D delta|| <= XTOL ||D p||
with D = sqrt(diag J'WJ), or |delta_j| <= XTOL (|p_j| + XTOL) for every parameter. It stops
unconverged when lambda exceeds 1e20 or after MAX_ITERATIONS. At the optimum, as for one curve
(``least_squares``):

    s**2 = RSS / (n - p),   cov = s**2 (J'WJ)^-1 from the SVD of sqrt(W) J,
    CI95 = p -/+ t(0.975, n - p) * se

A row fails when the model is not finite at its start or at its optimum, or when the condition
number of sqrt(W) J exceeds 1e14 (the data cannot separate the parameters).
"""

from __future__ import annotations

from collections.abc import Callable
from dataclasses import dataclass

import numpy as np
from numpy.typing import NDArray
from scipy import stats

from pipeline.errors import CalculationError

FloatArray = NDArray[np.float64]
BoolArray = NDArray[np.bool_]

BatchedModelFn = Callable[[FloatArray, FloatArray], FloatArray]
"""``model(x, params) -> f``: x (M, n), params (M, p) -> predicted y (M, n); used for the RSS."""

LinearisedFn = Callable[[FloatArray, FloatArray], tuple[FloatArray, FloatArray]]
"""``linearised(x, params) -> (f, jacobian)``: f (M, n) and J (M, n, p) together, as the normal
equations need them (trial steps need only ``model``, without the Jacobian)."""

StepRule = Callable[[FloatArray, FloatArray, FloatArray, FloatArray], BoolArray]
"""``allowed(x, w, p, p_new) -> (M,)``: False where the model forbids the step (e.g. a pole)."""

MAX_ITERATIONS = 300
XTOL = 1e-13  # step relative to the parameters: scaled norms, or each parameter
GTOL = 1e-13  # cosine between residual and Jacobian columns counted as zero
CONDITION_LIMIT = 1e14  # as ``least_squares``: beyond it the parameters cannot be separated

FITTED, FAIL_START, FAIL_WANDERED, FAIL_SEPARATE = 0, 1, 2, 3
"""Row outcome codes of ``BatchedFit.failure``."""


@dataclass(frozen=True, eq=False)
class BatchedFit:
    """Fits of M rows: ``params`` (M, p), ``covariance`` (M, p, p), the rest (M,).

    ``failure`` is FITTED or the FAIL_* code of a row that could not be fitted (its numbers
    are then not to be used); ``dof`` = points in use - p.
    """

    params: FloatArray
    covariance: FloatArray
    rss: FloatArray
    n: NDArray[np.int64]
    dof: NDArray[np.int64]
    converged: BoolArray
    iterations: NDArray[np.int64]
    failure: NDArray[np.int64]

    @property
    def se(self) -> FloatArray:
        """Standard errors (M, p): se_j = sqrt(cov_jj)."""
        return np.sqrt(np.einsum("mii->mi", self.covariance))

    @property
    def t975(self) -> FloatArray:
        """Student's t(0.975, n - p) per row (dof below 1 counted as 1)."""
        return np.asarray(stats.t.ppf(0.975, np.where(self.dof > 0, self.dof, 1)), dtype=float)


def rss_of(model: BatchedModelFn, x: FloatArray, y: FloatArray, w: FloatArray,
           p: FloatArray) -> FloatArray:
    """RSS = sum w (y - f)^2 per row; inf where the model is not finite at a point in use."""
    with np.errstate(all="ignore"):
        rss = np.where(w > 0, w * (y - model(x, p)) ** 2, 0.0).sum(axis=1)
    return np.where(np.isfinite(rss), rss, np.inf)


def _normal_equations(linearised: LinearisedFn, x: FloatArray, y: FloatArray, w: FloatArray,
                      p: FloatArray) -> tuple[FloatArray, FloatArray]:
    """Per row J'WJ (M, p, p) and J'W r (M, p), r = y - f; points with w == 0 left out."""
    with np.errstate(all="ignore"):
        f, jac = linearised(x, p)
        used = w > 0
        cols = [np.where(used, jac[:, :, i], 0.0) for i in range(p.shape[1])]
        r = np.where(used, y - f, 0.0)
        k = len(cols)
        a = np.empty((p.shape[0], k, k))
        for i in range(k):
            for j in range(i, k):
                a[:, i, j] = a[:, j, i] = (w * cols[i] * cols[j]).sum(axis=1)
        g = np.column_stack([(w * col * r).sum(axis=1) for col in cols])
    return a, g


def damped_step(a: FloatArray, g: FloatArray, lam: FloatArray) -> FloatArray:
    """delta solving (J'WJ + lambda diag J'WJ) delta = J'W r for stacked rows of 2 or 3 parameters.

    Two parameters: Cramer's rule on the system as it stands. Three: the system scaled by
    D = sqrt(diag J'WJ) (unit diagonal, so parameters of very different size stay well
    conditioned), solved by cofactors, delta = D^-1 x. A singular row gives NaN or inf.
    """
    with np.errstate(all="ignore"):
        if a.shape[1] == 2:
            a00, a01, a11 = a[:, 0, 0] * (1 + lam), a[:, 0, 1], a[:, 1, 1] * (1 + lam)
            det = a00 * a11 - a01 * a01
            return np.column_stack([(a11 * g[:, 0] - a01 * g[:, 1]) / det,
                                    (a00 * g[:, 1] - a01 * g[:, 0]) / det])
        scale = np.sqrt(np.einsum("mii->mi", a))
        scaled = a / (scale[:, :, None] * scale[:, None, :])
        scaled[:, [0, 1, 2], [0, 1, 2]] = 1.0 + lam[:, None]
        return solve_stacked(scaled, g / scale) / scale


def solve_stacked(m: FloatArray, g: FloatArray) -> FloatArray:
    """x = M^-1 g for stacked symmetric 3 x 3 M by cofactors (NaN or inf where M is singular)."""
    m00, m01, m02 = m[:, 0, 0], m[:, 0, 1], m[:, 0, 2]
    m11, m12, m22 = m[:, 1, 1], m[:, 1, 2], m[:, 2, 2]
    c00 = m11 * m22 - m12 * m12
    c01 = m02 * m12 - m01 * m22
    c02 = m01 * m12 - m02 * m11
    c11 = m00 * m22 - m02 * m02
    c12 = m01 * m02 - m00 * m12
    c22 = m00 * m11 - m01 * m01
    with np.errstate(all="ignore"):
        det = m00 * c00 + m01 * c01 + m02 * c02
        g0, g1, g2 = g[:, 0], g[:, 1], g[:, 2]
        return np.column_stack([(c00 * g0 + c01 * g1 + c02 * g2) / det,
                                (c01 * g0 + c11 * g1 + c12 * g2) / det,
                                (c02 * g0 + c12 * g1 + c22 * g2) / det])


def _iterate(model: BatchedModelFn, linearised: LinearisedFn, step_allowed: StepRule | None, x: FloatArray,
             y: FloatArray, w: FloatArray, p0: FloatArray) -> tuple[FloatArray, BoolArray, NDArray[np.int64]]:
    """Levenberg-Marquardt on every row at once (module docstring); only running rows are computed."""
    p = p0.copy()
    m, k = p.shape
    rss = rss_of(model, x, y, w, p)
    lam = np.full(m, 1e-3)
    converged = np.zeros(m, dtype=bool)
    iterations = np.zeros(m, dtype=np.int64)
    run = np.isfinite(rss)
    for _ in range(MAX_ITERATIONS):
        idx = np.flatnonzero(run)
        if idx.size == 0:
            break
        iterations[idx] += 1
        xi, yi, wi, pi, ri, li = x[idx], y[idx], w[idx], p[idx], rss[idx], lam[idx]
        a, g = _normal_equations(linearised, xi, yi, wi, pi)
        scale = np.sqrt(np.einsum("mii->mi", a))
        with np.errstate(all="ignore"):
            cosine = np.max(np.abs(g) / (scale * np.sqrt(ri)[:, None]), axis=1)
            flat = (ri == 0) | (cosine <= GTOL)
            delta = damped_step(a, g, li)
            p_new = pi + delta
        r_new = rss_of(model, xi, yi, wi, p_new)
        step_ok = np.all(np.isfinite(delta), axis=1)
        accept = ~flat & step_ok & (r_new <= ri)
        if step_allowed is not None:
            accept &= step_allowed(xi, wi, pi, p_new)
        p_kept = np.where(accept[:, None], p_new, pi)
        with np.errstate(all="ignore"):
            tiny = (np.linalg.norm(scale * delta, axis=1) <= XTOL * np.linalg.norm(scale * pi, axis=1)) | np.all(
                np.abs(delta) <= XTOL * (np.abs(p_kept) + XTOL), axis=1)
        p[idx] = p_kept
        rss[idx] = np.where(accept, r_new, ri)
        lam[idx] = np.where(accept, np.maximum(li / 10, 1e-15), li * 10)
        finished = flat | (step_ok & tiny)
        converged[idx] = finished
        run[idx] = ~finished & step_ok & (lam[idx] <= 1e20)
    return p, converged, iterations


def fit_batched_least_squares(model: BatchedModelFn, linearised: LinearisedFn, x: FloatArray,
                              y: FloatArray, w: FloatArray, p0: FloatArray,
                              step_allowed: StepRule | None = None) -> BatchedFit:
    """Fit every row of (M, n) ``x``, ``y``, weights ``w`` from its start ``p0`` (M, p).

    Minimises RSS = sum w (y - f(x, p))^2 per row by Levenberg-Marquardt (module docstring);
    cov = s^2 V diag(1/sv^2) V' from the SVD of sqrt(W) J, s^2 = RSS/(n - p). Inputs are
    trusted (validated by the caller): finite where w > 0, w >= 0.
    """
    m, k = p0.shape
    if k not in (2, 3):
        raise CalculationError(f"the batched engine fits models of 2 or 3 parameters, received {k}")
    n_used = (w > 0).sum(axis=1).astype(np.int64)
    a0, _ = _normal_equations(linearised, x, y, w, p0)
    evaluable = np.isfinite(rss_of(model, x, y, w, p0)) & np.all(np.isfinite(a0), axis=(1, 2))
    params = p0.astype(float)
    converged = np.zeros(m, dtype=bool)
    iterations = np.zeros(m, dtype=np.int64)
    rows = np.flatnonzero(evaluable)
    params[rows], converged[rows], iterations[rows] = _iterate(
        model, linearised, step_allowed, x[rows], y[rows], w[rows], params[rows])
    rss = rss_of(model, x, y, w, params)
    with np.errstate(all="ignore"):
        _, jac = linearised(x, params)
        wjac = np.where((w > 0)[:, :, None], np.sqrt(w)[:, :, None] * jac, 0.0)
    finite = evaluable & np.isfinite(rss) & np.all(np.isfinite(wjac), axis=(1, 2))
    sv = np.ones((m, k))
    vt = np.tile(np.eye(k), (m, 1, 1))
    if finite.any():
        _, sv[finite], vt[finite] = np.linalg.svd(wjac[finite], full_matrices=False)
    dof = n_used - k
    with np.errstate(all="ignore"):
        separable = finite & (sv[:, -1] > 0) & (sv[:, 0] / sv[:, -1] <= CONDITION_LIMIT)
        s2 = rss / dof
        cov = s2[:, None, None] * np.einsum("mki,mk,mkj->mij", vt, 1 / sv**2, vt)
    failure = np.select([~evaluable, ~finite, ~separable], [FAIL_START, FAIL_WANDERED, FAIL_SEPARATE], FITTED)
    return BatchedFit(params, cov, rss, n_used, dof, converged, iterations, failure.astype(np.int64))
