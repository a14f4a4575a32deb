"""Substrate inhibition and the kinetic model choice for many curves in one vectorised pass.

Substrate inhibition      v = Vmax * S / (Km + S + q * S**2),   q = 1/Ki

``fit_substrate_inhibition_batch`` fits B curves at once with a Levenberg-Marquardt solver on
stacked 3 x 3 normal equations, from the same start values as the one-curve
``kinetics.fit_substrate_inhibition`` (all starts of all curves solved together, the lowest
RSS kept per curve). ``choose_kinetic_models`` applies the extra-sum-of-squares F test of
``kinetics.choose_kinetic_model`` to every curve, with the same decision and wording. Units
follow the inputs, as in ``pipeline.kinetics``.
"""

from __future__ import annotations

from dataclasses import asdict, dataclass
from typing import Any

import numpy as np
from numpy.typing import ArrayLike, NDArray
from scipy import stats

from pipeline.errors import CalculationError
from pipeline.science.kinetics import (
    BATCH_CONVERGED,
    BATCH_NOT_CONVERGED,
    BATCH_TOO_FEW_LEVELS,
    BATCH_TOO_FEW_POINTS,
    MICHAELIS_MENTEN,
    SUBSTRATE_INHIBITION,
    KineticModelChoice,
    MichaelisMentenBatch,
    SubstrateInhibitionFit,
    batch_inputs,
    fit_michaelis_menten_batch,
    michaelis_menten_start,
    model_choice,
)
from pipeline.science.least_squares import jsonable

FloatArray = NDArray[np.float64]
BoolArray = NDArray[np.bool_]

BATCH_NOT_FITTED = "not-fitted"  # every start value failed; ``failure`` says why

START_VALUES = (
    "quadratic S/v = Km/Vmax + S/Vmax + S^2/(Vmax Ki)",
    "the Michaelis-Menten fit with 1/Ki = 0",
    "twice the Michaelis-Menten Vmax and Km with 1/Ki = 1/max S",
    "the Hanes-Woolf line with 1/Ki = 1/max S",
)
"""The start values tried for every curve, in the order the one-curve fit tries them."""

_MAX_ITERATIONS = 300
_XTOL = 1e-13  # scaled step norm relative to the scaled parameter norm
_FTOL = 1e-15  # actual and predicted relative reduction of the RSS
_GTOL = 1e-13  # cosine between residual and Jacobian columns counted as zero
_CONDITION_LIMIT = 1e14  # as pipeline.nls: beyond it the parameters cannot be separated

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
        )

    def to_dict(self) -> dict[str, Any]:
        """A JSON-able mapping of lists, one entry per curve (NaN and infinities become None)."""
        return {"model": SUBSTRATE_INHIBITION, **jsonable(asdict(self))}


# ------------------------------------------------------------------------ model, 3 x 3 solve


def _model_and_jacobian(
    s: FloatArray, w: FloatArray, p: FloatArray
) -> tuple[FloatArray, FloatArray, FloatArray, FloatArray]:
    """f = Vmax S/D and its Jacobian [S/D, -Vmax S/D^2, -Vmax S^3/D^2], D = Km + S + q S^2.

    Rows of (M, n); points with w == 0 give 0.
    """
    vmax, km, q = p[:, 0:1], p[:, 1:2], p[:, 2:3]
    with np.errstate(divide="ignore", invalid="ignore", over="ignore"):
        d = km + s + q * s**2
        j0 = s / d
        j1 = -vmax * s / d**2
        j2 = j1 * s**2
        f = vmax * j0
    used = w > 0
    return (
        np.where(used, f, 0.0),
        np.where(used, j0, 0.0),
        np.where(used, j1, 0.0),
        np.where(used, j2, 0.0),
    )


def _rss(s: FloatArray, v: FloatArray, w: FloatArray, p: FloatArray) -> FloatArray:
    """RSS = sum w (v - Vmax S/D)^2 per row; inf where the model is not finite at a point in use."""
    with np.errstate(divide="ignore", invalid="ignore", over="ignore"):
        f = p[:, 0:1] * s / (p[:, 1:2] + s + p[:, 2:3] * s**2)
        rss = np.where(w > 0, w * (v - f) ** 2, 0.0).sum(axis=1)
    return np.where(np.isfinite(rss), rss, np.inf)


def _normal_equations(
    s: FloatArray, v: FloatArray, w: FloatArray, p: FloatArray
) -> tuple[FloatArray, FloatArray]:
    """Per row J'WJ (M, 3, 3) and J'W r (M, 3), r = v - f."""
    f, j0, j1, j2 = _model_and_jacobian(s, w, p)
    w0, w1, w2 = w * j0, w * j1, w * j2
    with np.errstate(invalid="ignore", over="ignore"):
        a01, a02, a12 = (w0 * j1).sum(axis=1), (w0 * j2).sum(axis=1), (w1 * j2).sum(axis=1)
        a = np.stack(
            [
                np.column_stack([(w0 * j0).sum(axis=1), a01, a02]),
                np.column_stack([a01, (w1 * j1).sum(axis=1), a12]),
                np.column_stack([a02, a12, (w2 * j2).sum(axis=1)]),
            ],
            axis=1,
        )
        r = v - f
        g = np.column_stack([(w0 * r).sum(axis=1), (w1 * r).sum(axis=1), (w2 * r).sum(axis=1)])
    return a, g


def _same_branch(s: FloatArray, w: FloatArray, p: FloatArray, p_new: FloatArray) -> BoolArray:
    """True where D = Km + S + q S^2 keeps its sign at every point in use from p to p_new.

    D is affine in (Km, q), so a sign change means the step passes a pole of the rate law.
    """
    d_old = p[:, 1:2] + s + p[:, 2:3] * s**2
    d_new = p_new[:, 1:2] + s + p_new[:, 2:3] * s**2
    with np.errstate(invalid="ignore"):
        return np.all((w == 0) | (d_old * d_new > 0), axis=1)


def _solve3(m: FloatArray, g: FloatArray) -> FloatArray:
    """x = M^-1 g for stacked symmetric 3 x 3 M, by cofactors (NaN or inf where M is singular)."""
    m00, m01, m02 = m[:, 0, 0], m[:, 0, 1], m[:, 0, 2]
    m11, m12, m22 = m[:, 1, 1], m[:, 1, 2], m[:, 2, 2]
    c00 = m11 * m22 - m12 * m12
    c01 = m02 * m12 - m01 * m22
    c02 = m01 * m12 - m02 * m11
    c11 = m00 * m22 - m02 * m02
    c12 = m01 * m02 - m00 * m12
    c22 = m00 * m11 - m01 * m01
    with np.errstate(divide="ignore", invalid="ignore", over="ignore"):
        det = m00 * c00 + m01 * c01 + m02 * c02
        g0, g1, g2 = g[:, 0], g[:, 1], g[:, 2]
        return np.column_stack(
            [
                (c00 * g0 + c01 * g1 + c02 * g2) / det,
                (c01 * g0 + c11 * g1 + c12 * g2) / det,
                (c02 * g0 + c12 * g1 + c22 * g2) / det,
            ]
        )


def _levenberg_marquardt(
    s: FloatArray, v: FloatArray, w: FloatArray, p0: FloatArray
) -> tuple[FloatArray, BoolArray, NDArray[np.int64]]:
    """Levenberg-Marquardt on every row at once; only rows still running are computed.

    Each iteration solves (J'WJ + lambda diag J'WJ) delta = J'W r per row, accepts delta where
    the RSS does not rise and D = Km + S + q S^2 keeps its sign at every point (lambda /= 10)
    and rejects it elsewhere (lambda *= 10). A row has
    converged when ||D delta|| <= 1e-13 ||D p|| (D = sqrt diag J'WJ), when the actual and
    predicted relative RSS reductions are both <= 1e-15, or when every Jacobian column is
    orthogonal to the residual to 1e-13; it stops unconverged when lambda exceeds 1e20.
    """
    p = p0.copy()
    rss = _rss(s, v, w, p)
    lam = np.full(p.shape[0], 1e-3)
    converged = np.zeros(p.shape[0], dtype=bool)
    iterations = np.zeros(p.shape[0], dtype=np.int64)
    run = np.isfinite(rss)
    for _ in range(_MAX_ITERATIONS):
        idx = np.flatnonzero(run)
        if idx.size == 0:
            break
        iterations[idx] += 1
        si, vi, wi, pi, ri, li = s[idx], v[idx], w[idx], p[idx], rss[idx], lam[idx]
        a, g = _normal_equations(si, vi, wi, pi)
        diag = np.sqrt(np.einsum("mii->mi", a))
        with np.errstate(divide="ignore", invalid="ignore"):
            cosine = np.max(np.abs(g) / (diag * np.sqrt(ri)[:, None]), axis=1)
            flat = (ri == 0) | (cosine <= _GTOL)
            scaled = a / (diag[:, :, None] * diag[:, None, :])
            scaled[:, [0, 1, 2], [0, 1, 2]] = 1.0 + li[:, None]
            delta = _solve3(scaled, g / diag) / diag
            p_new = pi + delta
        r_new = _rss(si, vi, wi, p_new)
        step_ok = np.all(np.isfinite(delta), axis=1)
        accept = ~flat & step_ok & (r_new <= ri) & _same_branch(si, wi, pi, p_new)
        with np.errstate(invalid="ignore", over="ignore"):
            predicted = 2 * np.einsum("mi,mi->m", delta, g) - np.einsum(
                "mi,mij,mj->m", delta, a, delta
            )
            small_gain = accept & (ri - r_new <= _FTOL * ri) & (predicted <= _FTOL * ri)
            tiny = np.linalg.norm(diag * delta, axis=1) <= _XTOL * np.linalg.norm(diag * pi, axis=1)
        p[idx] = np.where(accept[:, None], p_new, pi)
        rss[idx] = np.where(accept, r_new, ri)
        lam[idx] = np.where(accept, np.maximum(li / 10, 1e-15), li * 10)
        finished = flat | small_gain | (step_ok & tiny)
        converged[idx] = finished
        run[idx] = ~finished & step_ok & (lam[idx] <= 1e20)
    return p, converged, iterations


# ---------------------------------------------------------------------------- start values


def _quadratic_start(s: FloatArray, v: FloatArray, w: FloatArray) -> tuple[FloatArray, BoolArray]:
    """Least-squares parabola S/v = c0 + c1 S + c2 S^2 over points in use with S > 0, v > 0.

    Unweighted, as the one-curve fit. Start (1/c1, c0/c1, max(c2/c1, 0)); valid where at
    least 3 distinct levels enter the fit and c1 > 0, c0 > 0.
    """
    use = (w > 0) & (s > 0) & (v > 0)
    scale = np.where(use, s, 0.0).max(axis=1)
    scale = np.where(scale > 0, scale, 1.0)[:, None]
    with np.errstate(divide="ignore", invalid="ignore"):
        x = np.where(use, s / scale, 0.0)
        y = np.where(use, s / np.where(use, v, 1.0), 0.0)
    basis = np.stack([use * 1.0, x, x**2], axis=2)
    gram = np.einsum("mni,mnj->mij", basis, basis)
    coef = _solve3(gram, np.einsum("mni,mn->mi", basis, y))
    c0, c1, c2 = coef[:, 0], coef[:, 1] / scale[:, 0], coef[:, 2] / scale[:, 0] ** 2
    with np.errstate(divide="ignore", invalid="ignore"):
        start = np.column_stack([1 / c1, c0 / c1, np.maximum(c2 / c1, 0.0)])
    valid = (_levels(s, use) >= 3) & (c1 > 0) & (c0 > 0) & np.all(np.isfinite(start), axis=1)
    return start, valid


def _levels(s: FloatArray, use: BoolArray) -> NDArray[np.int64]:
    """Number of distinct substrate levels among the points ``use`` of each row."""
    ordered = np.sort(np.where(use, s, np.inf), axis=1)
    first = np.isfinite(ordered[:, :1])
    with np.errstate(invalid="ignore"):
        steps = (np.diff(ordered, axis=1) > 0) & np.isfinite(ordered[:, 1:])
    return (first[:, 0] + steps.sum(axis=1)).astype(np.int64)


def _starts(
    s: FloatArray, v: FloatArray, w: FloatArray, mm: MichaelisMentenBatch
) -> tuple[FloatArray, BoolArray]:
    """(K, B, 3) start values in the order of ``START_VALUES`` and where each is defined."""
    s_max = np.where(w > 0, s, 0.0).max(axis=1)
    with np.errstate(divide="ignore"):
        q_top = 1 / s_max
    quad, quad_ok = _quadratic_start(s, v, w)
    mm_ok = np.isfinite(mm.vmax) & (mm.km > 0)
    vmax0, km0 = michaelis_menten_start(s, v, w)
    starts = np.stack(
        [
            quad,
            np.column_stack([mm.vmax, mm.km, np.zeros_like(q_top)]),
            np.column_stack([2 * mm.vmax, 2 * mm.km, q_top]),
            np.column_stack([vmax0, km0, q_top]),
        ]
    )
    return starts, np.stack([quad_ok, mm_ok, mm_ok, np.ones_like(mm_ok)])


# ------------------------------------------------------------------------------- the batch


def _frozen(arr: NDArray[Any]) -> NDArray[Any]:
    arr = np.ascontiguousarray(arr)
    arr.setflags(write=False)
    return arr


@dataclass(frozen=True, eq=False)
class _StartFits:
    """Fits from M (curve, start) pairs; ``failure`` 0 = fitted, else an index of _FAILURES."""

    params: FloatArray
    cov: FloatArray
    rss: FloatArray
    converged: BoolArray
    iterations: NDArray[np.int64]
    failure: NDArray[np.int64]


_FITTED, _FAIL_START, _FAIL_WANDERED, _FAIL_SEPARATE = 0, 1, 2, 3


def _fit_starts(s: FloatArray, v: FloatArray, w: FloatArray, p0: FloatArray) -> _StartFits:
    """Fit every row from its start; cov = s^2 V diag(1/sv^2) V' from the SVD of sqrt(W) J.

    s^2 = RSS/(n - 3). A row fails, as in ``pipeline.nls``, when the model is not finite at
    its start or its optimum, or when sv_max/sv_min of sqrt(W) J exceeds 1e14.
    """
    m = p0.shape[0]
    a0, _ = _normal_equations(s, v, w, p0)
    evaluable = np.isfinite(_rss(s, v, w, p0)) & np.all(np.isfinite(a0), axis=(1, 2))
    params = p0.copy()
    converged = np.zeros(m, dtype=bool)
    iterations = np.zeros(m, dtype=np.int64)
    rows = np.flatnonzero(evaluable)
    params[rows], converged[rows], iterations[rows] = _levenberg_marquardt(
        s[rows], v[rows], w[rows], p0[rows]
    )
    rss = _rss(s, v, w, params)
    _, j0, j1, j2 = _model_and_jacobian(s, w, params)
    wjac = np.sqrt(w)[:, :, None] * np.stack([j0, j1, j2], axis=2)
    finite = evaluable & np.isfinite(rss) & np.all(np.isfinite(wjac), axis=(1, 2))
    sv = np.ones((m, 3))
    vt = np.tile(np.eye(3), (m, 1, 1))
    if finite.any():
        _, sv[finite], vt[finite] = np.linalg.svd(wjac[finite], full_matrices=False)
    with np.errstate(divide="ignore", invalid="ignore"):
        separable = finite & (sv[:, -1] > 0) & (sv[:, 0] / sv[:, -1] <= _CONDITION_LIMIT)
        s2 = rss / ((w > 0).sum(axis=1) - 3)
        cov = s2[:, None, None] * np.einsum("mki,mk,mkj->mij", vt, 1 / sv**2, vt)
    failure = np.select(
        [~evaluable, ~finite, ~separable], [_FAIL_START, _FAIL_WANDERED, _FAIL_SEPARATE], _FITTED
    )
    return _StartFits(params, cov, rss, converged, iterations, failure)


def _failure_text(code: int, p0: FloatArray) -> str:
    if code == _FAIL_START:
        return _NOT_EVALUATED.format(p0.tolist())
    return _WANDERED if code == _FAIL_WANDERED else _NOT_SEPARABLE


def _failures(
    n_pts: NDArray[np.int64],
    levels: NDArray[np.int64],
    best: NDArray[np.int64],
    entry: NDArray[np.int64],
    codes: NDArray[np.int64],
    starts: FloatArray,
) -> NDArray[np.str_]:
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
        texts = {
            _failure_text(int(codes[e]), starts[k, i]) for k, e in enumerate(entry[:, i]) if e >= 0
        }
        failure[i] = (
            "the substrate-inhibition model could not be fitted from any start value: "
            + "; ".join(sorted(texts))
        )
    return failure.astype(str)


def _fit_batch(
    s: FloatArray, v: FloatArray, w: FloatArray, mm: MichaelisMentenBatch
) -> SubstrateInhibitionBatch:
    """All starts of all curves in one solve; per curve the best by (converged, -RSS)."""
    n_curves = s.shape[0]
    n_pts = (w > 0).sum(axis=1).astype(np.int64)
    levels = _levels(s, (w > 0) & (s > 0))
    live = (n_pts >= 4) & (levels >= 3)

    starts, defined = _starts(s, v, w, mm)
    defined &= live[None, :]
    k_idx, b_idx = np.nonzero(defined)
    fits = _fit_starts(s[b_idx], v[b_idx], w[b_idx], starts[k_idx, b_idx])

    # Walk the starts in order, replacing the kept fit only by a strictly better one.
    entry = np.full(defined.shape, -1, dtype=np.int64)
    entry[k_idx, b_idx] = np.arange(k_idx.size)
    best = np.full(n_curves, -1, dtype=np.int64)
    best_conv = np.zeros(n_curves, dtype=bool)
    best_rss = np.full(n_curves, np.inf)
    for k in range(defined.shape[0] if k_idx.size else 0):
        e = entry[k]
        ok = (e >= 0) & (fits.failure[e] == _FITTED)
        conv, rss = fits.converged[e], fits.rss[e]
        better = ok & ((best < 0) | (conv & ~best_conv) | ((conv == best_conv) & (rss < best_rss)))
        best = np.where(better, e, best)
        best_conv = np.where(better, conv, best_conv)
        best_rss = np.where(better, rss, best_rss)

    failure = _failures(n_pts, levels, best, entry, fits.failure, starts)
    fitted = best >= 0
    pick = np.where(fitted, best, 0)
    nan = np.full(n_curves, np.nan)

    def chosen(values: FloatArray) -> FloatArray:
        return np.where(fitted, values[pick], nan) if values.size else nan

    vmax, km, q = (chosen(fits.params[:, j]) for j in range(3))
    vmax_se, km_se, q_se = (chosen(np.sqrt(fits.cov[:, j, j])) for j in range(3))
    rss = chosen(fits.rss)
    dof = n_pts - 3
    t = stats.t.ppf(0.975, np.where(dof > 0, dof, 1))
    q_lo, q_hi = q - t * q_se, q + t * q_se
    with np.errstate(divide="ignore", invalid="ignore"):
        ki = np.where(q != 0, 1 / q, np.inf)
        ki_se = np.where(q != 0, q_se / q**2, np.inf)
        ki_lo = np.where((q_lo > 0) | (q_hi > 0), 1 / q_hi, np.nan)
        ki_hi = np.where(q_lo > 0, 1 / q_lo, np.where(q_hi > 0, np.inf, np.nan))
        residual_se = np.sqrt(rss / dof)
    ki, ki_se = np.where(fitted, ki, nan), np.where(fitted, ki_se, nan)
    converged = fitted & (fits.converged[pick] if k_idx.size else fitted)
    iterations = np.where(fitted, fits.iterations[pick] if k_idx.size else 0, 0)
    status = np.select(
        [n_pts <= 3, ~live, ~fitted, converged],
        [BATCH_TOO_FEW_POINTS, BATCH_TOO_FEW_LEVELS, BATCH_NOT_FITTED, BATCH_CONVERGED],
        default=BATCH_NOT_CONVERGED,
    )
    return SubstrateInhibitionBatch(
        vmax=_frozen(vmax),
        km=_frozen(km),
        ki=_frozen(ki),
        vmax_se=_frozen(vmax_se),
        km_se=_frozen(km_se),
        ki_se=_frozen(ki_se),
        vmax_ci95=_frozen(np.column_stack([vmax - t * vmax_se, vmax + t * vmax_se])),
        km_ci95=_frozen(np.column_stack([km - t * km_se, km + t * km_se])),
        ki_ci95=_frozen(np.column_stack([ki_lo, ki_hi])),
        inverse_ki=_frozen(q),
        inverse_ki_se=_frozen(q_se),
        residual_se=_frozen(residual_se),
        rss=_frozen(rss),
        n=_frozen(n_pts),
        dof=_frozen(dof),
        converged=_frozen(converged),
        status=_frozen(status),
        iterations=_frozen(iterations.astype(np.int64)),
        start=_frozen(np.where(fitted, k_idx[pick] if k_idx.size else -1, -1).astype(np.int64)),
        failure=_frozen(failure),
    )


def fit_substrate_inhibition_batch(
    substrate: ArrayLike,
    rate: ArrayLike,
    weights: ArrayLike | None = None,
    mask: ArrayLike | None = None,
) -> SubstrateInhibitionBatch:
    """Fit v = Vmax S / (Km + S + S^2/Ki) to B curves in one vectorised solve.

    Inputs as ``kinetics.fit_michaelis_menten_batch``: ``rate`` (B, n), ``substrate`` (B, n)
    or (n,), ``weights`` (1/sigma^2) and ``mask`` (True = use) (B, n). The fit runs in
    q = 1/Ki from the start values of ``START_VALUES`` and keeps, per curve, the converged fit
    of lowest RSS = sum w (v - f)^2. s^2 = RSS/(n_i - 3), cov = s^2 (J'WJ)^-1,
    CI95 = p -/+ t(0.975, n_i - 3) se; Ki = 1/q, se(Ki) = se(q)/q^2, CI95(Ki) the inverted
    CI95 of q. Curves with fewer than 4 points or 3 substrate levels above zero get NaN and
    a status; the rest of the batch is still fitted.
    """
    s, v, w = batch_inputs(substrate, rate, weights, mask)
    return _fit_batch(s, v, w, fit_michaelis_menten_batch(s, v, w))


def choose_kinetic_models(
    substrate: ArrayLike,
    rate: ArrayLike,
    weights: ArrayLike | None = None,
    mask: ArrayLike | None = None,
    alpha: float = 0.05,
) -> tuple[KineticModelChoice, ...]:
    """Michaelis-Menten or substrate inhibition for every curve, by the extra-sum-of-squares F.

    F = ((RSS1 - RSS2)/(df1 - df2)) / (RSS2/df2), df1 = n - 2, df2 = n - 3,
    p = P(F(df1 - df2, df2) > F); the decision and its wording per curve are those of
    ``kinetics.choose_kinetic_model``. Raises CalculationError when a curve cannot be fitted
    by Michaelis-Menten at all (as the one-curve choice does).
    """
    if not (isinstance(alpha, float | int) and 0 < alpha < 1):
        raise CalculationError(
            f"significance level alpha must lie between 0 and 1, received {alpha!r}"
        )
    s, v, w = batch_inputs(substrate, rate, weights, mask)
    mm = fit_michaelis_menten_batch(s, v, w)
    unfitted = np.flatnonzero(~np.isfinite(mm.vmax))
    if unfitted.size:
        listed = "; ".join(f"curve {i}: {mm.message(int(i))}" for i in unfitted[:5])
        more = f" and {unfitted.size - 5} more" if unfitted.size > 5 else ""
        raise CalculationError(
            f"{unfitted.size} of {len(mm)} curves cannot be fitted by Michaelis-Menten, so no "
            f"model can be chosen for them ({listed}{more}); leave them out of the batch"
        )
    si = _fit_batch(s, v, w, mm)
    df_extra, df2 = mm.dof - si.dof, si.dof
    gain = np.maximum(mm.rss - si.rss, 0.0)
    with np.errstate(divide="ignore", invalid="ignore"):
        f_stat = np.where(
            si.rss > 0,
            (gain / df_extra) / (si.rss / df2),
            np.where(gain > 0, np.inf, 0.0),
        )
        p_value = np.where(si.rss > 0, stats.f.sf(f_stat, df_extra, np.maximum(df2, 1)), 0.0)
    p_value = np.where((si.rss == 0) & ~(gain > 0), 1.0, p_value)
    return tuple(
        _choice(mm, si, i, float(f_stat[i]), float(p_value[i]), float(alpha))
        for i in range(len(mm))
    )


def _choice(
    mm_batch: MichaelisMentenBatch,
    si_batch: SubstrateInhibitionBatch,
    i: int,
    f_stat: float,
    p_value: float,
    alpha: float,
) -> KineticModelChoice:
    """Curve ``i``'s decision, worded as ``kinetics.choose_kinetic_model`` words it."""
    mm = mm_batch.fit(i)
    if mm.n < 4:
        reason = f"only {mm.n} points: too few to test for substrate inhibition (at least 4 needed)"
        return KineticModelChoice(MICHAELIS_MENTEN, mm, None, None, None, alpha, False, reason)
    if si_batch.start[i] < 0:
        reason = f"substrate inhibition could not be tested: {si_batch.failure[i]}"
        return KineticModelChoice(MICHAELIS_MENTEN, mm, None, None, None, alpha, False, reason)
    return model_choice(mm, si_batch.fit(i), f_stat, p_value, alpha)
