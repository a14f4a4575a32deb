"""Enzyme kinetic constants: Michaelis-Menten, substrate inhibition, kcat and kcat/Km.

Michaelis-Menten         v = Vmax * S / (Km + S)
Substrate inhibition     v = Vmax * S / (Km + S + S**2 / Ki)

Both are fitted to initial rates by non-linear least squares (never by a double-reciprocal
line); each parameter carries its standard error from cov = s^2 (J'WJ)^-1 and a 95 %
interval from Student's t with n - p degrees of freedom. Units follow the inputs: substrate
in mM gives Km (and Ki) in mM, rate in U/mg gives Vmax in U/mg.

``fit_michaelis_menten_batch`` fits many curves at once with a vectorised Levenberg-Marquardt
solver on stacked 2 x 2 normal equations; ``fit_michaelis_menten`` fits one curve through
``pipeline.nls`` (scipy). The two are independent implementations of the same fit.
"""

from __future__ import annotations

from dataclasses import asdict, dataclass
from typing import Any, Protocol

import numpy as np
from numpy.typing import ArrayLike, NDArray
from scipy import stats

from pipeline.errors import CalculationError
from pipeline.science.least_squares import NLSResult, fit_least_squares, jsonable

FloatArray = NDArray[np.float64]

MICHAELIS_MENTEN = "michaelis-menten"
SUBSTRATE_INHIBITION = "substrate-inhibition"

# Status codes of a batched curve.
BATCH_CONVERGED = "converged"
BATCH_NOT_CONVERGED = "not-converged"
BATCH_TOO_FEW_POINTS = "too-few-points"
BATCH_TOO_FEW_LEVELS = "too-few-levels"
BATCH_NOT_SEPARABLE = "not-separable"

_BATCH_MAX_ITERATIONS = 200
_BATCH_XTOL = 1e-13  # relative step size at which a batched curve counts as converged
_BATCH_GTOL = 1e-13  # cosine between residual and Jacobian columns counted as zero
_BATCH_SINGULAR = 1e-12  # 1 - correlation^2 of the Jacobian columns below which Km is lost


# ----------------------------------------------------------------------------------- results


@dataclass(frozen=True)
class MichaelisMentenFit:
    """One Michaelis-Menten fit. ``vmax`` in rate units, ``km`` in substrate units."""

    vmax: float
    km: float
    vmax_se: float
    km_se: float
    vmax_ci95: tuple[float, float]
    km_ci95: tuple[float, float]
    cov_vmax_km: float
    residual_se: float
    rss: float
    n: int
    dof: int
    converged: bool
    message: str

    def to_dict(self) -> dict[str, Any]:
        """A JSON-able mapping (NaN and infinities become None)."""
        return {"model": MICHAELIS_MENTEN, **jsonable(asdict(self))}


@dataclass(frozen=True, eq=False)
class MichaelisMentenBatch:
    """Michaelis-Menten fits of B curves; every array has B rows (``*_ci95`` are (B, 2))."""

    vmax: FloatArray
    km: FloatArray
    vmax_se: FloatArray
    km_se: FloatArray
    vmax_ci95: FloatArray
    km_ci95: FloatArray
    cov_vmax_km: FloatArray
    residual_se: FloatArray
    rss: FloatArray
    n: NDArray[np.int64]
    dof: NDArray[np.int64]
    converged: NDArray[np.bool_]
    status: NDArray[np.str_]
    iterations: NDArray[np.int64]

    def __len__(self) -> int:
        return int(self.vmax.shape[0])

    def message(self, i: int) -> str:
        """What happened to curve ``i``, in words."""
        status, n_used, iters = str(self.status[i]), int(self.n[i]), int(self.iterations[i])
        return {
            BATCH_TOO_FEW_POINTS: f"too few points: {n_used} in use, at least 3 are needed",
            BATCH_TOO_FEW_LEVELS: "too few substrate levels: at least 2 distinct levels above zero",
            BATCH_NOT_SEPARABLE: "the data cannot separate Vmax and Km (singular normal equations)",
            BATCH_CONVERGED: f"converged after {iters} Levenberg-Marquardt iterations",
            BATCH_NOT_CONVERGED: f"did not converge within {iters} iterations",
        }[status]

    def fit(self, i: int) -> MichaelisMentenFit:
        """Curve ``i`` as a one-curve result; raises CalculationError if it could not be fitted."""
        if not -len(self) <= i < len(self):
            raise CalculationError(f"curve {i} does not exist: the batch holds {len(self)} curves")
        if not np.isfinite(self.vmax[i]):
            raise CalculationError(f"curve {i} could not be fitted: {self.message(i)}")
        return MichaelisMentenFit(
            vmax=float(self.vmax[i]),
            km=float(self.km[i]),
            vmax_se=float(self.vmax_se[i]),
            km_se=float(self.km_se[i]),
            vmax_ci95=(float(self.vmax_ci95[i, 0]), float(self.vmax_ci95[i, 1])),
            km_ci95=(float(self.km_ci95[i, 0]), float(self.km_ci95[i, 1])),
            cov_vmax_km=float(self.cov_vmax_km[i]),
            residual_se=float(self.residual_se[i]),
            rss=float(self.rss[i]),
            n=int(self.n[i]),
            dof=int(self.dof[i]),
            converged=bool(self.converged[i]),
            message=self.message(i),
        )

    def to_dict(self) -> dict[str, Any]:
        """A JSON-able mapping of lists, one entry per curve (NaN becomes None)."""
        return {"model": MICHAELIS_MENTEN, **jsonable(asdict(self))}


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

    def to_dict(self) -> dict[str, Any]:
        """A JSON-able mapping (NaN and infinities become None)."""
        return {"model": SUBSTRATE_INHIBITION, **jsonable(asdict(self))}


@dataclass(frozen=True)
class KineticModelChoice:
    """Which rate law the data support, by the extra-sum-of-squares F test."""

    model: str
    michaelis_menten: MichaelisMentenFit
    substrate_inhibition: SubstrateInhibitionFit | None
    f_statistic: float | None
    p_value: float | None
    alpha: float
    flagged: bool
    reason: str

    def to_dict(self) -> dict[str, Any]:
        """A JSON-able mapping with both fits nested."""
        si = self.substrate_inhibition
        return {
            **jsonable(asdict(self)),
            "michaelis_menten": self.michaelis_menten.to_dict(),
            "substrate_inhibition": None if si is None else si.to_dict(),
        }


@dataclass(frozen=True)
class KmQuality:
    """Whether a fitted Km may be reported as a result."""

    well_determined: bool
    reason: str
    km_relative_se: float
    substrate_min: float
    substrate_max: float

    def to_dict(self) -> dict[str, Any]:
        """A JSON-able mapping."""
        return dict(jsonable(asdict(self)))


@dataclass(frozen=True)
class Turnover:
    """Turnover number per active site and catalytic efficiency, with standard errors."""

    kcat_per_s: float
    kcat_se_per_s: float
    kcat_over_km_per_m_per_s: float
    kcat_over_km_se_per_m_per_s: float

    def to_dict(self) -> dict[str, Any]:
        """A JSON-able mapping."""
        return dict(jsonable(asdict(self)))


class _HasKm(Protocol):
    km: float
    km_se: float
    converged: bool


# ------------------------------------------------------------------------------- validation


def _vector(values: ArrayLike, what: str) -> FloatArray:
    try:
        arr = np.asarray(values, dtype=np.float64)
    except (TypeError, ValueError) as exc:
        raise CalculationError(f"{what}: expected numbers, received {values!r}") from exc
    if arr.ndim != 1:
        raise CalculationError(f"{what}: expected one value per well, received shape {arr.shape}")
    bad = np.flatnonzero(~np.isfinite(arr))
    if bad.size:
        raise CalculationError(
            f"{what}: point {int(bad[0]) + 1} of {arr.size} is {arr[bad[0]]!r}; "
            "every point needs a finite number (exclude the well instead)"
        )
    return arr


def _curve(
    substrate: ArrayLike, rate: ArrayLike, weights: ArrayLike | None, n_params: int
) -> tuple[FloatArray, FloatArray, FloatArray | None]:
    s = _vector(substrate, "substrate concentration")
    v = _vector(rate, "initial rate")
    if s.size != v.size:
        raise CalculationError(
            f"substrate and rate must pair up: received {s.size} substrate levels "
            f"and {v.size} rates"
        )
    if np.any(s < 0):
        raise CalculationError(
            f"substrate concentration must not be negative; received {float(s.min())!r}"
        )
    if s.size <= n_params:
        raise CalculationError(
            f"too few points: {s.size} rates cannot fit {n_params} kinetic parameters; "
            f"at least {n_params + 1} are needed (6-8 substrate levels are usual)"
        )
    levels = np.unique(s[s > 0]).size
    if levels < n_params:
        raise CalculationError(
            f"too few substrate levels: {levels} distinct level(s) above zero cannot separate "
            f"{n_params} kinetic parameters; at least {n_params} are needed"
        )
    w = None
    if weights is not None:
        w = _vector(weights, "weights")
        if w.size != v.size:
            raise CalculationError(
                f"weights must pair up with the rates: received {w.size} weights for {v.size} rates"
            )
        if np.any(w <= 0):
            raise CalculationError(
                f"weights (1/sigma^2) must be positive; received {float(w.min())!r}"
            )
    return s, v, w


# ---------------------------------------------------------------------- Michaelis-Menten, one


def _mm_model(s: FloatArray, p: FloatArray) -> FloatArray:
    """v = Vmax S / (Km + S)."""
    return p[0] * s / (p[1] + s)


def _mm_jacobian(s: FloatArray, p: FloatArray) -> FloatArray:
    """dv/dVmax = S/(Km+S); dv/dKm = -Vmax S/(Km+S)^2."""
    d = p[1] + s
    return np.column_stack([s / d, -p[0] * s / d**2])


def michaelis_menten_start(
    s: FloatArray, v: FloatArray, w: FloatArray
) -> tuple[FloatArray, FloatArray]:
    """Start values per row of (B, n) arrays; points with w == 0 are ignored.

    Hanes-Woolf line S/v = Km/Vmax + S/Vmax (slope 1/Vmax, intercept Km/Vmax) over points
    with S > 0 and v > 0; where it gives no positive Vmax and Km, fall back to Vmax = the
    largest rate and Km = the substrate level whose rate is nearest half of it.
    """
    use = (w > 0) & (s > 0) & (v > 0)
    m = use.sum(axis=1)
    with np.errstate(divide="ignore", invalid="ignore"):
        h = np.where(use, s / np.where(use, v, 1.0), 0.0)
        s_bar = np.where(use, s, 0.0).sum(axis=1) / m
        h_bar = h.sum(axis=1) / m
        ds = np.where(use, s - s_bar[:, None], 0.0)
        slope = (ds * (h - h_bar[:, None])).sum(axis=1) / (ds**2).sum(axis=1)
        vmax_hw = 1.0 / slope
        km_hw = h_bar / slope - s_bar
    good = (m >= 2) & np.isfinite(vmax_hw) & np.isfinite(km_hw) & (vmax_hw > 0) & (km_hw > 0)

    live = (w > 0) & (s > 0)
    v_live = np.where(live, v, -np.inf)
    vmax_fb = v_live.max(axis=1)
    vmax_fb = np.where(np.isfinite(vmax_fb) & (vmax_fb > 0), vmax_fb, 1.0)
    gap = np.where(live, np.abs(v - 0.5 * vmax_fb[:, None]), np.inf)
    km_fb = np.take_along_axis(s, gap.argmin(axis=1)[:, None], axis=1)[:, 0]
    km_fb = np.where(km_fb > 0, km_fb, 1.0)
    return np.where(good, vmax_hw, vmax_fb), np.where(good, km_hw, km_fb)


def _mm_from_nls(res: NLSResult) -> MichaelisMentenFit:
    return MichaelisMentenFit(
        vmax=res.params[0],
        km=res.params[1],
        vmax_se=res.se[0],
        km_se=res.se[1],
        vmax_ci95=res.ci95[0],
        km_ci95=res.ci95[1],
        cov_vmax_km=res.covariance[0][1],
        residual_se=res.residual_se,
        rss=res.rss,
        n=res.n,
        dof=res.dof,
        converged=res.converged,
        message=res.message,
    )


def fit_michaelis_menten(
    substrate: ArrayLike, rate: ArrayLike, weights: ArrayLike | None = None
) -> MichaelisMentenFit:
    """Fit v = Vmax S / (Km + S) to one curve of initial rates by non-linear least squares.

    Minimises sum w_i (v_i - Vmax S_i/(Km + S_i))^2 (w = 1/sigma^2, default 1) from
    Hanes-Woolf start values; se from s^2 (J'WJ)^-1 with s^2 = RSS/(n-2), CI95 with
    t(0.975, n-2). Km has the substrate's unit, Vmax the rate's.
    """
    s, v, w = _curve(substrate, rate, weights, n_params=2)
    w_start = np.ones_like(v) if w is None else w
    vmax0, km0 = michaelis_menten_start(s[None, :], v[None, :], w_start[None, :])
    res = fit_least_squares(
        _mm_model, _mm_jacobian, s, v, [vmax0[0], km0[0]], weights=w, param_names=("vmax", "km")
    )
    return _mm_from_nls(res)


# ------------------------------------------------------------------ Michaelis-Menten, batched


def batch_inputs(
    substrate: ArrayLike, rate: ArrayLike, weights: ArrayLike | None, mask: ArrayLike | None
) -> tuple[FloatArray, FloatArray, FloatArray]:
    """(B, n) substrate, rate and effective weights (0 where masked); NaN allowed there only."""
    v = np.asarray(rate, dtype=np.float64)
    if v.ndim != 2:
        raise CalculationError(
            f"batched rates must be a table of curves (B, n); received shape {v.shape}"
        )
    s = np.asarray(substrate, dtype=np.float64)
    try:
        s = np.broadcast_to(s, v.shape)
    except ValueError as exc:
        raise CalculationError(
            f"substrate of shape {s.shape} does not pair up with rates of shape {v.shape}"
        ) from exc
    w = np.ones(v.shape) if weights is None else np.asarray(weights, dtype=np.float64)
    if w.shape != v.shape:
        raise CalculationError(f"weights of shape {w.shape} do not match rates of shape {v.shape}")
    if mask is not None:
        m = np.asarray(mask, dtype=bool)
        if m.shape != v.shape:
            raise CalculationError(
                f"mask of shape {m.shape} does not match rates of shape {v.shape}"
            )
        w = np.where(m, w, 0.0)
    if np.any(np.isnan(w) | (w < 0) | np.isinf(w)):
        raise CalculationError(
            "weights (1/sigma^2) must be finite and not negative; 0 drops a point"
        )
    used = w > 0
    for what, arr in (("substrate concentration", s), ("initial rate", v)):
        bad = np.argwhere(used & ~np.isfinite(arr))
        if bad.size:
            i, j = (int(k) for k in bad[0])
            raise CalculationError(
                f"{what}: curve {i}, point {j + 1} is {arr[i, j]!r}; a point in use needs a "
                "finite number (mask it out instead)"
            )
    neg = np.argwhere(used & (s < 0))
    if neg.size:
        i, j = (int(k) for k in neg[0])
        raise CalculationError(
            f"substrate concentration must not be negative; curve {i}, point {j + 1} is {s[i, j]!r}"
        )
    return np.where(used, s, 0.0), np.where(used, v, 0.0), w


def _mm_rss(
    s: FloatArray, v: FloatArray, w: FloatArray, vmax: FloatArray, km: FloatArray
) -> FloatArray:
    """RSS = sum w (v - Vmax S/(Km + S))^2 per row; inf where the model is not finite."""
    with np.errstate(divide="ignore", invalid="ignore", over="ignore"):
        r = v - vmax[:, None] * s / (km[:, None] + s)
        rss = np.where(w > 0, w * r**2, 0.0).sum(axis=1)
    return np.where(np.isfinite(rss), rss, np.inf)


def _normal_equations(
    s: FloatArray, v: FloatArray, w: FloatArray, vmax: FloatArray, km: FloatArray
) -> tuple[FloatArray, FloatArray, FloatArray, FloatArray, FloatArray]:
    """Per row: J'WJ = [[a, b], [b, c]] and J'Wr = [g1, g2] for J = [S/(Km+S), -Vmax S/(Km+S)^2]."""
    with np.errstate(divide="ignore", invalid="ignore", over="ignore"):
        d = km[:, None] + s
        j1 = np.where(w > 0, s / d, 0.0)
        j2 = np.where(w > 0, -vmax[:, None] * s / d**2, 0.0)
        r = np.where(w > 0, v - vmax[:, None] * j1, 0.0)
    return (
        (w * j1 * j1).sum(axis=1),
        (w * j1 * j2).sum(axis=1),
        (w * j2 * j2).sum(axis=1),
        (w * j1 * r).sum(axis=1),
        (w * j2 * r).sum(axis=1),
    )


def _lm_batch(
    s: FloatArray,
    v: FloatArray,
    w: FloatArray,
    vmax: FloatArray,
    km: FloatArray,
    live: NDArray[np.bool_],
) -> tuple[FloatArray, FloatArray, NDArray[np.bool_], NDArray[np.int64]]:
    """Levenberg-Marquardt on all rows at once, a fixed maximum of iterations.

    Each iteration solves (J'WJ + lambda diag J'WJ) delta = J'W r per row (2 x 2, by
    Cramer's rule), accepts delta where the RSS does not rise (lambda /= 10) and rejects it
    elsewhere (lambda *= 10). A row stops when its relative step is below 1e-13 or its
    gradient is orthogonal to the residual to 1e-13.
    """
    lam = np.full(vmax.shape, 1e-3)
    rss = _mm_rss(s, v, w, vmax, km)
    done = ~live
    stopped = np.zeros(vmax.shape, dtype=bool)
    iterations = np.zeros(vmax.shape, dtype=np.int64)
    for _ in range(_BATCH_MAX_ITERATIONS):
        run = ~done
        if not run.any():
            break
        iterations += run
        a, b, c, g1, g2 = _normal_equations(s, v, w, vmax, km)
        with np.errstate(divide="ignore", invalid="ignore"):
            cosine = np.maximum(np.abs(g1) / np.sqrt(a * rss), np.abs(g2) / np.sqrt(c * rss))
            flat = run & ((rss == 0) | (cosine <= _BATCH_GTOL))
            a_d, c_d = a * (1 + lam), c * (1 + lam)
            det = a_d * c_d - b * b
            d_vmax = (c_d * g1 - b * g2) / det
            d_km = (a_d * g2 - b * g1) / det
        vmax_new, km_new = vmax + d_vmax, km + d_km
        rss_new = _mm_rss(s, v, w, vmax_new, km_new)
        step_ok = np.isfinite(d_vmax) & np.isfinite(d_km)
        accept = run & ~flat & step_ok & (rss_new <= rss)
        vmax = np.where(accept, vmax_new, vmax)
        km = np.where(accept, km_new, km)
        rss = np.where(accept, rss_new, rss)
        lam = np.where(accept, np.maximum(lam / 10, 1e-15), lam * 10)
        tiny = (np.abs(d_vmax) <= _BATCH_XTOL * (np.abs(vmax) + _BATCH_XTOL)) & (
            np.abs(d_km) <= _BATCH_XTOL * (np.abs(km) + _BATCH_XTOL)
        )
        finished = flat | (run & step_ok & tiny)
        stopped |= finished
        done |= finished | (run & ((lam > 1e20) | ~step_ok))
    return vmax, km, stopped & live, iterations


def fit_michaelis_menten_batch(
    substrate: ArrayLike,
    rate: ArrayLike,
    weights: ArrayLike | None = None,
    mask: ArrayLike | None = None,
) -> MichaelisMentenBatch:
    """Fit v = Vmax S / (Km + S) to B curves in one vectorised solve.

    ``rate`` is (B, n); ``substrate`` is (B, n) or (n,) shared by all curves; ``weights``
    (1/sigma^2) and ``mask`` (True = use) are (B, n) and a weight 0 or mask False drops a
    point, so ragged curves are padded rows. Per curve: RSS = sum w (v - f)^2,
    s^2 = RSS/(n_i - 2), cov = s^2 (J'WJ)^-1, CI95 = p -/+ t(0.975, n_i - 2) se.
    Curves with fewer than 3 points or fewer than 2 substrate levels above zero get NaN
    and a status code (``message(i)`` words it); the rest of the batch is still fitted.
    """
    s, v, w = batch_inputs(substrate, rate, weights, mask)
    n_pts = (w > 0).sum(axis=1).astype(np.int64)
    positive = (w > 0) & (s > 0)
    spread = np.where(positive, s, -np.inf).max(axis=1) > np.where(positive, s, np.inf).min(axis=1)
    live = (n_pts >= 3) & spread

    vmax0, km0 = michaelis_menten_start(s, v, w)
    vmax, km, stopped, iterations = _lm_batch(s, v, w, vmax0, km0, live)

    rss = _mm_rss(s, v, w, vmax, km)
    a, b, c, _, _ = _normal_equations(s, v, w, vmax, km)
    dof = n_pts - 2
    with np.errstate(divide="ignore", invalid="ignore"):
        s2 = rss / dof
        det = a * c - b * b
        separable = live & (det > _BATCH_SINGULAR * a * c) & np.isfinite(det)
        vmax_var = s2 * c / det
        km_var = s2 * a / det
        cov = -s2 * b / det
        t = stats.t.ppf(0.975, np.where(dof > 0, dof, 1))
    converged = stopped & separable & np.isfinite(rss)
    nan = np.full(vmax.shape, np.nan)
    vmax = np.where(separable, vmax, nan)
    km = np.where(separable, km, nan)
    vmax_se = np.where(separable, np.sqrt(vmax_var), nan)
    km_se = np.where(separable, np.sqrt(km_var), nan)

    status = np.select(
        [n_pts < 3, ~live, ~separable, converged],
        [BATCH_TOO_FEW_POINTS, BATCH_TOO_FEW_LEVELS, BATCH_NOT_SEPARABLE, BATCH_CONVERGED],
        default=BATCH_NOT_CONVERGED,
    )

    def frozen(arr: NDArray[Any]) -> NDArray[Any]:
        arr = np.ascontiguousarray(arr)
        arr.setflags(write=False)
        return arr

    return MichaelisMentenBatch(
        vmax=frozen(vmax),
        km=frozen(km),
        vmax_se=frozen(vmax_se),
        km_se=frozen(km_se),
        vmax_ci95=frozen(np.column_stack([vmax - t * vmax_se, vmax + t * vmax_se])),
        km_ci95=frozen(np.column_stack([km - t * km_se, km + t * km_se])),
        cov_vmax_km=frozen(np.where(separable, cov, nan)),
        residual_se=frozen(np.where(separable, np.sqrt(s2), nan)),
        rss=frozen(np.where(live, rss, nan)),
        n=frozen(n_pts),
        dof=frozen(dof),
        converged=frozen(converged),
        status=frozen(status),
        iterations=frozen(iterations),
    )


# ---------------------------------------------------------------------- substrate inhibition


def _si_model(s: FloatArray, p: FloatArray) -> FloatArray:
    """v = Vmax S / (Km + S + S^2 q), q = 1/Ki."""
    return p[0] * s / (p[1] + s + p[2] * s**2)


def _si_jacobian(s: FloatArray, p: FloatArray) -> FloatArray:
    """dv/dVmax = S/D; dv/dKm = -Vmax S/D^2; dv/dq = -Vmax S^3/D^2, D = Km + S + q S^2."""
    d = p[1] + s + p[2] * s**2
    return np.column_stack([s / d, -p[0] * s / d**2, -p[0] * s**3 / d**2])


def fit_substrate_inhibition(
    substrate: ArrayLike, rate: ArrayLike, weights: ArrayLike | None = None
) -> SubstrateInhibitionFit:
    """Fit v = Vmax S / (Km + S + S^2/Ki) by non-linear least squares.

    The fit runs in q = 1/Ki (regular as Ki -> infinity) from several start values (the
    quadratic S/v = Km/Vmax + S/Vmax + S^2/(Vmax Ki), the Michaelis-Menten fit with q = 0 and
    with q = 1/max S) and keeps the lowest RSS. se from s^2 (J'WJ)^-1, s^2 = RSS/(n-3);
    Ki = 1/q, se(Ki) = se(q)/q^2, CI95(Ki) from the inverted CI95 of q.
    """
    s, v, w = _curve(substrate, rate, weights, n_params=3)
    starts: list[list[float]] = []
    pos = (s > 0) & (v > 0)
    if np.unique(s[pos]).size >= 3:
        c2, c1, c0 = np.polyfit(s[pos], s[pos] / v[pos], 2)
        if c1 > 0 and c0 > 0:
            starts.append([1 / c1, c0 / c1, max(c2 / c1, 0.0)])
    try:
        mm = fit_michaelis_menten(s, v, w)
        if np.isfinite(mm.vmax) and mm.km > 0:
            starts += [[mm.vmax, mm.km, 0.0], [2 * mm.vmax, 2 * mm.km, 1 / float(s.max())]]
    except CalculationError:
        pass
    w_start = np.ones_like(v) if w is None else w
    vmax0, km0 = michaelis_menten_start(s[None, :], v[None, :], w_start[None, :])
    starts.append([float(vmax0[0]), float(km0[0]), 1 / float(s.max())])

    best: NLSResult | None = None
    failures: list[str] = []
    for p0 in starts:
        try:
            res = fit_least_squares(
                _si_model,
                _si_jacobian,
                s,
                v,
                p0,
                weights=w,
                param_names=("vmax", "km", "inverse_ki"),
            )
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
    q, q_se = best.params[2], best.se[2]
    q_lo, q_hi = best.ci95[2]
    with np.errstate(divide="ignore"):
        ki = float(np.float64(1.0) / q) if q != 0 else float("inf")
        ki_se = float(q_se / q**2) if q != 0 else float("inf")
    if q_lo > 0:
        ki_ci = (1 / q_hi, 1 / q_lo)
    elif q_hi > 0:
        ki_ci = (1 / q_hi, float("inf"))
    else:
        ki_ci = (float("nan"), float("nan"))
    return SubstrateInhibitionFit(
        vmax=best.params[0],
        km=best.params[1],
        ki=ki,
        vmax_se=best.se[0],
        km_se=best.se[1],
        ki_se=ki_se,
        vmax_ci95=best.ci95[0],
        km_ci95=best.ci95[1],
        ki_ci95=ki_ci,
        inverse_ki=q,
        inverse_ki_se=q_se,
        residual_se=best.residual_se,
        rss=best.rss,
        n=best.n,
        dof=best.dof,
        converged=best.converged,
        message=best.message,
    )


def choose_kinetic_model(
    substrate: ArrayLike, rate: ArrayLike, weights: ArrayLike | None = None, alpha: float = 0.05
) -> KineticModelChoice:
    """Michaelis-Menten or substrate inhibition, by the extra-sum-of-squares F test.

    F = ((RSS1 - RSS2)/(df1 - df2)) / (RSS2/df2), df1 = n - 2, df2 = n - 3,
    p = P(F(df1 - df2, df2) > F). Substrate inhibition is chosen, and flagged, only when
    p < alpha and the fitted Ki is finite and positive. A significant departure that is not
    inhibition (1/Ki <= 0) keeps Michaelis-Menten but is flagged for review.
    """
    if not (isinstance(alpha, float | int) and 0 < alpha < 1):
        raise CalculationError(
            f"significance level alpha must lie between 0 and 1, received {alpha!r}"
        )
    mm = fit_michaelis_menten(substrate, rate, weights)
    if mm.n < 4:
        return KineticModelChoice(
            MICHAELIS_MENTEN,
            mm,
            None,
            None,
            None,
            float(alpha),
            False,
            f"only {mm.n} points: too few to test for substrate inhibition (at least 4 needed)",
        )
    try:
        si = fit_substrate_inhibition(substrate, rate, weights)
    except CalculationError as exc:
        return KineticModelChoice(
            MICHAELIS_MENTEN,
            mm,
            None,
            None,
            None,
            float(alpha),
            False,
            f"substrate inhibition could not be tested: {exc}",
        )
    df1, df2 = mm.dof, si.dof
    gain = max(mm.rss - si.rss, 0.0)
    if si.rss > 0:
        f_stat = (gain / (df1 - df2)) / (si.rss / df2)
        p_value = float(stats.f.sf(f_stat, df1 - df2, df2))
    else:
        f_stat, p_value = (float("inf"), 0.0) if gain > 0 else (0.0, 1.0)
    return model_choice(mm, si, float(f_stat), p_value, float(alpha))


def model_choice(mm: MichaelisMentenFit, si: SubstrateInhibitionFit, f_stat: float, p_value: float,
                 alpha: float) -> KineticModelChoice:
    """The decision and its wording once both fits and the F test are known (one-curve and batch)."""
    test = f"F = {f_stat:.4g} on {mm.dof - si.dof} and {si.dof} df, p = {p_value:.3g}"
    significant = p_value < alpha
    inhibits = si.converged and np.isfinite(si.ki) and si.ki > 0
    if significant and inhibits:
        model, flagged = SUBSTRATE_INHIBITION, True
        reason = f"substrate inhibition chosen ({test} < {alpha:g}; Ki = {si.ki:.4g})"
    elif significant:
        model, flagged = MICHAELIS_MENTEN, True
        reason = (
            f"the rates depart from Michaelis-Menten ({test} < {alpha:g}) but not as substrate "
            f"inhibition (1/Ki = {si.inverse_ki:.4g} is not positive): review the curve"
        )
    else:
        model, flagged = MICHAELIS_MENTEN, False
        reason = (
            f"Michaelis-Menten kept: substrate inhibition does not fit better ({test} >= {alpha:g})"
        )
    return KineticModelChoice(model, mm, si, f_stat, p_value, alpha, flagged, reason)


# --------------------------------------------------------------------------- quality, kcat


def km_determination(fit: _HasKm, substrate: ArrayLike, max_relative_se: float) -> KmQuality:
    """Judge whether Km may be reported.

    Well determined only when the fit converged, min S <= Km <= max S over the tested
    substrate levels, and se(Km)/Km <= ``max_relative_se``; otherwise "poorly determined"
    with every failing condition named.
    """
    s = _vector(substrate, "substrate concentration")
    if s.size == 0:
        raise CalculationError("substrate concentration: at least one tested level is needed")
    if not (np.isfinite(max_relative_se) and max_relative_se > 0):
        raise CalculationError(
            f"the limit on the relative SE of Km must be a positive number, received {max_relative_se!r}"
        )
    lo, hi = float(s.min()), float(s.max())
    km, km_se = float(fit.km), float(fit.km_se)
    rel = km_se / km if (np.isfinite(km) and km > 0 and np.isfinite(km_se)) else float("nan")
    problems = []
    if not fit.converged:
        problems.append("the fit did not converge")
    if not np.isfinite(km):
        problems.append("Km is not a finite number")
    elif km < lo:
        problems.append(f"Km {km:.4g} lies below the lowest tested substrate {lo:.4g}")
    elif km > hi:
        problems.append(f"Km {km:.4g} lies above the highest tested substrate {hi:.4g}")
    if not np.isfinite(rel):
        problems.append("the standard error of Km is not available")
    elif rel > max_relative_se:
        problems.append(f"its relative SE {100 * rel:.3g} % exceeds {100 * max_relative_se:.3g} %")
    if problems:
        return KmQuality(False, "poorly determined: " + "; ".join(problems), rel, lo, hi)
    reason = (
        f"well determined: Km {km:.4g} lies within the tested substrate {lo:.4g}-{hi:.4g} "
        f"and its relative SE {100 * rel:.3g} % is within {100 * max_relative_se:.3g} %"
    )
    return KmQuality(True, reason, rel, lo, hi)


def turnover(
    vmax_u_per_mg: float,
    vmax_se_u_per_mg: float,
    km_mm: float,
    km_se_mm: float,
    molecular_weight_g_per_mol: float,
    cov_vmax_km: float = 0.0,
) -> Turnover:
    """Turnover number and catalytic efficiency per active site.

    kcat [1/s] = Vmax [umol/min/mg] * MW [g/mol] / 60 / 1000;
    kcat/Km [1/(M s)] = kcat / (Km [mM] / 1000).
    First-order propagation (MW exact): se(kcat) = kcat * se(Vmax)/Vmax;
    (se(kcat/Km)/(kcat/Km))^2 = (se(Vmax)/Vmax)^2 + (se(Km)/Km)^2 - 2 cov(Vmax, Km)/(Vmax Km),
    with ``cov_vmax_km`` in U/mg * mM.
    """
    values = {
        "Vmax (U/mg)": vmax_u_per_mg,
        "SE of Vmax (U/mg)": vmax_se_u_per_mg,
        "Km (mM)": km_mm,
        "SE of Km (mM)": km_se_mm,
        "molecular weight (g/mol)": molecular_weight_g_per_mol,
        "covariance of Vmax and Km": cov_vmax_km,
    }
    for what, value in values.items():
        if not np.isfinite(value):
            raise CalculationError(f"{what} must be a finite number, received {value!r}")
    for what in ("Vmax (U/mg)", "Km (mM)", "molecular weight (g/mol)"):
        if values[what] <= 0:
            raise CalculationError(f"{what} must be positive, received {values[what]!r}")
    for what in ("SE of Vmax (U/mg)", "SE of Km (mM)"):
        if values[what] < 0:
            raise CalculationError(f"{what} must not be negative, received {values[what]!r}")
    kcat = vmax_u_per_mg * molecular_weight_g_per_mol / 60.0 / 1000.0
    rel_v = vmax_se_u_per_mg / vmax_u_per_mg
    rel_k = km_se_mm / km_mm
    rel2 = rel_v**2 + rel_k**2 - 2.0 * cov_vmax_km / (vmax_u_per_mg * km_mm)
    if rel2 < 0:
        raise CalculationError(
            f"the covariance of Vmax and Km ({cov_vmax_km!r}) is larger than their standard "
            "errors allow (|correlation| > 1)"
        )
    efficiency = kcat / (km_mm / 1000.0)
    return Turnover(
        kcat_per_s=float(kcat),
        kcat_se_per_s=float(kcat * rel_v),
        kcat_over_km_per_m_per_s=float(efficiency),
        kcat_over_km_se_per_m_per_s=float(efficiency * np.sqrt(rel2)),
    )
