"""Michaelis-Menten constants from initial rates: v = Vmax * S / (Km + S).

Fitted by non-linear least squares (never by a double-reciprocal line); each parameter carries
its standard error from cov = s^2 (J'WJ)^-1 and a 95 % interval from Student's t with n - 2
degrees of freedom. Units follow the inputs: substrate in mM gives Km in mM, rate in U/mg gives
Vmax in U/mg. ``fit_michaelis_menten`` fits one curve with the one-curve engine
(``least_squares``); ``fit_michaelis_menten_batch`` fits many with the batched engine
(``batched_least_squares``), from the same start values.
"""

from __future__ import annotations

from dataclasses import dataclass
from typing import Any

import numpy as np
from numpy.typing import ArrayLike, NDArray
from scipy import stats

from pipeline.errors import CalculationError
from pipeline.plain_data import to_plain
from pipeline.science.batched_least_squares import FITTED, fit_batched_least_squares
from pipeline.science.kinetic_data import (
    BATCH_CONVERGED,
    BATCH_NOT_CONVERGED,
    BATCH_NOT_SEPARABLE,
    BATCH_TOO_FEW_LEVELS,
    BATCH_TOO_FEW_POINTS,
    FloatArray,
    batch_inputs,
    checked_curve,
    frozen,
)
from pipeline.science.least_squares import fit_least_squares
from pipeline.science.rate_curves import RateCurve, curve_substrate, rate_curve

MICHAELIS_MENTEN = "michaelis-menten"


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

    def rate_at(self, substrate: ArrayLike) -> FloatArray:
        """v = Vmax S / (Km + S) at each substrate level."""
        s = np.asarray(substrate, dtype=float)
        return self.vmax * s / (self.km + s)

    def eval_uncertainty(self, substrate: ArrayLike, level: float = 0.95) -> FloatArray:
        """Half-width of the pointwise confidence band of the fitted rate (delta method).

        var f(S) = g' C g with g = [S/(Km+S), -Vmax S/(Km+S)^2] and
        C = [[se_v^2, cov], [cov, se_k^2]]; half-width = t(1 - (1 - level)/2, dof) sqrt(var).
        """
        s = np.asarray(substrate, dtype=float)
        g_v = s / (self.km + s)
        g_k = -self.vmax * s / (self.km + s) ** 2
        var = g_v**2 * self.vmax_se**2 + 2.0 * g_v * g_k * self.cov_vmax_km + g_k**2 * self.km_se**2
        t = float(stats.t.ppf(1.0 - (1.0 - level) / 2.0, self.dof))
        return t * np.sqrt(np.clip(var, 0.0, None))

    def curve(self, tested_substrate: ArrayLike) -> RateCurve:
        """The fitted curve and its 95 % band over the tested substrate range (for a chart)."""
        s = curve_substrate(tested_substrate, self.km)
        band = self.eval_uncertainty(s) if self.dof > 0 and np.isfinite(self.vmax_se) else None
        return rate_curve(s, self.rate_at(s), band)

    def to_dict(self) -> dict[str, Any]:
        """A JSON-able mapping (NaN and infinities become None)."""
        return {"model": MICHAELIS_MENTEN, **to_plain(self)}


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
        return {"model": MICHAELIS_MENTEN, **to_plain(self)}


# ------------------------------------------------------------------------- model, start values


def _model(s: FloatArray, p: FloatArray) -> FloatArray:
    """v = Vmax S / (Km + S)."""
    return p[0] * s / (p[1] + s)


def _jacobian(s: FloatArray, p: FloatArray) -> FloatArray:
    """dv/dVmax = S/(Km+S); dv/dKm = -Vmax S/(Km+S)^2."""
    d = p[1] + s
    return np.column_stack([s / d, -p[0] * s / d**2])


def batched_model(s: FloatArray, p: FloatArray) -> FloatArray:
    """Rows of v = Vmax S / (Km + S)."""
    return p[:, 0:1] * s / (p[:, 1:2] + s)


def batched_linearised(s: FloatArray, p: FloatArray) -> tuple[FloatArray, FloatArray]:
    """Rows of v = Vmax S/(Km + S) and its Jacobian [S/(Km+S), -Vmax S/(Km+S)^2]."""
    vmax, km = p[:, 0:1], p[:, 1:2]
    d = km + s
    j0 = s / d
    return vmax * j0, np.stack([j0, -vmax * s / d**2], axis=2)


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


# ------------------------------------------------------------------------------------ fits


def fit_michaelis_menten(
    substrate: ArrayLike, rate: ArrayLike, weights: ArrayLike | None = None
) -> MichaelisMentenFit:
    """Fit v = Vmax S / (Km + S) to one curve of initial rates by non-linear least squares.

    Minimises sum w_i (v_i - Vmax S_i/(Km + S_i))^2 (w = 1/sigma^2, default 1) from
    Hanes-Woolf start values; se from s^2 (J'WJ)^-1 with s^2 = RSS/(n-2), CI95 with
    t(0.975, n-2). Km has the substrate's unit, Vmax the rate's.
    """
    s, v, w = checked_curve(substrate, rate, weights, n_params=2)
    w_start = np.ones_like(v) if w is None else w
    vmax0, km0 = michaelis_menten_start(s[None, :], v[None, :], w_start[None, :])
    res = fit_least_squares(
        _model, _jacobian, s, v, [vmax0[0], km0[0]], weights=w, param_names=("vmax", "km")
    )
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
    p0 = np.column_stack([vmax0, km0])
    fits = fit_batched_least_squares(batched_model, batched_linearised, s, v, np.where(live[:, None], w, 0.0), p0)
    separable = live & (fits.failure == FITTED)
    converged = separable & fits.converged
    nan = np.full(n_pts.shape, np.nan)
    vmax, km = (np.where(separable, fits.params[:, j], nan) for j in range(2))
    vmax_se, km_se = (np.where(separable, fits.se[:, j], nan) for j in range(2))
    t = fits.t975
    status = np.select(
        [n_pts < 3, ~live, ~separable, converged],
        [BATCH_TOO_FEW_POINTS, BATCH_TOO_FEW_LEVELS, BATCH_NOT_SEPARABLE, BATCH_CONVERGED],
        default=BATCH_NOT_CONVERGED,
    )
    with np.errstate(invalid="ignore", divide="ignore"):
        residual_se = np.sqrt(fits.rss / (n_pts - 2))
    return MichaelisMentenBatch(
        vmax=frozen(vmax),
        km=frozen(km),
        vmax_se=frozen(vmax_se),
        km_se=frozen(km_se),
        vmax_ci95=frozen(np.column_stack([vmax - t * vmax_se, vmax + t * vmax_se])),
        km_ci95=frozen(np.column_stack([km - t * km_se, km + t * km_se])),
        cov_vmax_km=frozen(np.where(separable, fits.covariance[:, 0, 1], nan)),
        residual_se=frozen(np.where(separable, residual_se, nan)),
        rss=frozen(np.where(live, fits.rss, nan)),
        n=frozen(n_pts),
        dof=frozen(n_pts - 2),
        converged=frozen(converged),
        status=frozen(status),
        iterations=frozen(np.where(live, fits.iterations, 0)),
    )
