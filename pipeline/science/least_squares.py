"""General non-linear least squares with standard errors and Student-t intervals.

A model ``f(x, p)`` is fitted to observations ``y`` by minimising the (weighted) residual sum
of squares

    RSS(p) = sum_i w_i * (y_i - f(x_i, p))**2          (w_i = 1 / sigma_i**2, default 1)

with an analytic Jacobian ``J_ij = d f(x_i, p) / d p_j``. At the optimum

    s**2  = RSS / (n - p)                               (residual variance, dof = n - p)
    cov   = s**2 * (J' W J)**-1                         (W = diag(w))
    se_j  = sqrt(cov_jj)
    CI95  = p_j -/+ t(0.975, n - p) * se_j

The solver is ``scipy.optimize.least_squares`` with tight tolerances (1e-15).
"""

from __future__ import annotations

from collections.abc import Callable, Sequence
from dataclasses import dataclass
from typing import Any

import numpy as np
from numpy.typing import ArrayLike, NDArray
from scipy import optimize, stats

from pipeline.errors import CalculationError
from pipeline.plain_data import to_plain

ModelFn = Callable[[NDArray[np.float64], NDArray[np.float64]], ArrayLike]
"""``model(x, params) -> predicted y``, shape (n,)."""

JacobianFn = Callable[[NDArray[np.float64], NDArray[np.float64]], ArrayLike]
"""``jacobian(x, params) -> d model / d params``, shape (n, p)."""

TOLERANCE = 1e-15
"""ftol, xtol and gtol handed to the solver."""

_CONDITION_LIMIT = 1e14
"""Above this condition number of the weighted Jacobian the parameters cannot be separated."""


@dataclass(frozen=True)
class NLSResult:
    """Outcome of one least-squares fit; parameter order follows ``param_names``."""

    param_names: tuple[str, ...]
    params: tuple[float, ...]
    se: tuple[float, ...]
    ci95: tuple[tuple[float, float], ...]
    covariance: tuple[tuple[float, ...], ...]
    rss: float
    dof: int
    residual_se: float
    n: int
    converged: bool
    message: str
    nfev: int

    def param(self, name: str) -> float:
        """The fitted value of the parameter called ``name``."""
        return self.params[self.param_names.index(name)]

    def to_dict(self) -> dict[str, Any]:
        """A JSON-able mapping (NaN and infinities become None)."""
        return dict(to_plain(self))


def _as_vector(values: ArrayLike, what: str) -> NDArray[np.float64]:
    try:
        arr = np.asarray(values, dtype=np.float64)
    except (TypeError, ValueError) as exc:
        raise CalculationError(f"{what}: expected numbers, received {values!r}") from exc
    if arr.ndim != 1:
        raise CalculationError(
            f"{what}: expected a flat list of values, received shape {arr.shape}"
        )
    if not np.all(np.isfinite(arr)):
        bad = int(np.flatnonzero(~np.isfinite(arr))[0])
        raise CalculationError(
            f"{what}: value {bad + 1} of {arr.size} is {arr[bad]!r}; only finite numbers are allowed"
        )
    return arr


def _check_inputs(
    x: ArrayLike,
    y: ArrayLike,
    p0: ArrayLike,
    weights: ArrayLike | None,
    param_names: Sequence[str] | None,
) -> tuple[
    NDArray[np.float64],
    NDArray[np.float64],
    NDArray[np.float64],
    NDArray[np.float64],
    tuple[str, ...],
]:
    xv = _as_vector(x, "x values")
    yv = _as_vector(y, "y values")
    pv = _as_vector(p0, "start values")
    if xv.size != yv.size:
        raise CalculationError(
            f"x and y must pair up: received {xv.size} x values and {yv.size} y values"
        )
    if pv.size == 0:
        raise CalculationError("start values: at least one parameter is needed, received none")
    if yv.size <= pv.size:
        raise CalculationError(
            f"too few points: {yv.size} points cannot fit {pv.size} parameters "
            f"with any degrees of freedom left; at least {pv.size + 1} are needed"
        )
    if weights is None:
        wv = np.ones_like(yv)
    else:
        wv = _as_vector(weights, "weights")
        if wv.size != yv.size:
            raise CalculationError(
                f"weights must pair up with y: received {wv.size} weights for {yv.size} points"
            )
        if np.any(wv <= 0):
            raise CalculationError(
                "weights must be positive (w = 1/sigma^2); received "
                f"{float(wv.min())!r} as the smallest"
            )
    if param_names is None:
        names = tuple(f"p{j}" for j in range(pv.size))
    else:
        names = tuple(str(n) for n in param_names)
        if len(names) != pv.size:
            raise CalculationError(
                f"parameter names must pair up with start values: received {len(names)} names "
                f"for {pv.size} start values"
            )
    return xv, yv, pv, wv, names


def _evaluate(
    fn: Callable[..., ArrayLike],
    x: NDArray[np.float64],
    p: NDArray[np.float64],
    shape: tuple[int, ...],
    what: str,
) -> NDArray[np.float64]:
    with np.errstate(all="ignore"):  # non-finite output is reported below, not warned about
        out = np.asarray(fn(x, p), dtype=np.float64)
    if out.shape != shape:
        raise CalculationError(f"the {what} returned shape {out.shape}; expected {shape}")
    return out


def fit_least_squares(
    model: ModelFn,
    jacobian: JacobianFn,
    x: ArrayLike,
    y: ArrayLike,
    p0: ArrayLike,
    weights: ArrayLike | None = None,
    param_names: Sequence[str] | None = None,
    method: str = "lm",
    max_nfev: int | None = None,
    bounds: tuple[Sequence[float], Sequence[float]] | None = None,
) -> NLSResult:
    """Fit ``model`` to ``(x, y)`` by (weighted) non-linear least squares.

    Minimises RSS(p) = sum w_i (y_i - f(x_i, p))^2 from ``p0``; reports
    cov = s^2 (J'WJ)^-1 with s^2 = RSS/(n - p), se = sqrt(diag cov) and
    CI95 = p -/+ t(0.975, n - p) se. ``weights`` are 1/sigma^2 (positive).
    ``method`` is "lm" (Levenberg-Marquardt, MINPACK) or "trf"; ``bounds`` (lower, upper per
    parameter) need "trf", which then scales the parameters by the Jacobian's columns.

    Raises CalculationError for non-finite or mismatched inputs, n <= p, a model that
    cannot be evaluated at the start values, or a Jacobian of deficient rank at the optimum
    (the data cannot separate the parameters).
    """
    if method not in ("lm", "trf"):
        raise CalculationError(f"solver method must be 'lm' or 'trf', received {method!r}")
    if bounds is not None and method != "trf":
        raise CalculationError("bounds on the parameters need the solver method 'trf'")
    xv, yv, pv, wv, names = _check_inputs(x, y, p0, weights, param_names)
    n, p = yv.size, pv.size
    sqrt_w = np.sqrt(wv)

    def residuals(params: NDArray[np.float64]) -> NDArray[np.float64]:
        return sqrt_w * (_evaluate(model, xv, params, (n,), "model") - yv)

    def jac(params: NDArray[np.float64]) -> NDArray[np.float64]:
        return sqrt_w[:, None] * _evaluate(jacobian, xv, params, (n, p), "Jacobian")

    r0 = residuals(pv)
    if not np.all(np.isfinite(r0)) or not np.all(np.isfinite(jac(pv))):
        raise CalculationError(
            f"the model cannot be evaluated at the start values {pv.tolist()}: "
            "it gives non-finite numbers there"
        )
    solution = optimize.least_squares(
        residuals,
        pv,
        jac=jac,
        method=method,
        bounds=(-np.inf, np.inf) if bounds is None else bounds,
        x_scale=1.0 if bounds is None else "jac",
        xtol=TOLERANCE,
        ftol=TOLERANCE,
        gtol=TOLERANCE,
        max_nfev=max_nfev,
    )
    params = np.asarray(solution.x, dtype=np.float64)
    r = residuals(params)
    jw = jac(params)
    if not (np.all(np.isfinite(r)) and np.all(np.isfinite(jw))):
        raise CalculationError("the fit wandered to parameters where the model is not finite")
    rss = float(r @ r)
    dof = n - p
    s2 = rss / dof

    # (J'WJ)^-1 through the SVD of the weighted Jacobian: V diag(1/sv^2) V'.
    _, sv, vt = np.linalg.svd(jw, full_matrices=False)
    if sv[-1] <= 0 or sv[0] / sv[-1] > _CONDITION_LIMIT:
        raise CalculationError(
            "the data cannot separate the parameters "
            f"{', '.join(names)}: the Jacobian at the optimum is (nearly) rank deficient"
        )
    cov = s2 * (vt.T / sv**2) @ vt
    se = np.sqrt(np.diag(cov))
    t = float(stats.t.ppf(0.975, dof))
    ci = tuple((float(v - t * e), float(v + t * e)) for v, e in zip(params, se, strict=True))
    status = int(solution.status)
    return NLSResult(
        param_names=names,
        params=tuple(float(v) for v in params),
        se=tuple(float(v) for v in se),
        ci95=ci,
        covariance=tuple(tuple(float(v) for v in row) for row in cov),
        rss=rss,
        dof=dof,
        residual_se=float(np.sqrt(s2)),
        n=n,
        converged=status > 0,
        message=str(solution.message),
        nfev=int(solution.nfev),
    )
