"""The steady-state rate after a lag: the hysteretic progress curve fitted with its time constant.

A hysteretic enzyme starts inactive and turns active with a time constant τ; its progress curve
with substrate in excess is A(t) = A₀ + v_ss·(t − τ·(1 − e^(−t/τ))) (Frieden 1970, J. Biol. Chem.
245:5788; from memory). The enzyme's active fraction, 1 − e^(−t/τ), does not depend on the
substrate, so with depletion the curve is the Michaelis–Menten one run on the enzyme's active
time θ(t) = t − τ·(1 − e^(−t/τ)) (dθ/dt is the active fraction). Over a window that converts at
most the method's ``max_conversion`` the Michaelis–Menten curve is a quadratic in θ, so the
fitted model is

    A(t) = a₀ + v·θ(t) + c·θ(t)²,   θ(t) = (t − t₀) − τ·(1 − e^(−(t − t₀)/τ)),

over the window from the first read t₀, four parameters (a₀, v, c, τ). v = dA/dθ at θ = 0 is the
steady-state rate at the starting substrate: the depletion is counted from the true start, and
no part of the lag is left in it. It is fitted by variable projection: for τ on a geometric grid
(a quarter of the shortest read interval to twice the read's length) a, v, c are linear least
squares; the best grid point, refined by a parabola in ln τ, starts a damped Gauss–Newton fit of
all four parameters (ln τ as the fourth). At the optimum Cov = σ̂²(JᵀJ)⁻¹ with σ̂² = SSR/(n − 4),
and the 95 % interval is v ± t₀.₉₇₅,ₙ₋₄·SE(v) (the large-sample interval of non-linear least
squares; Seber & Wild, Nonlinear Regression, 1989, ch. 5, from memory).

The least-squares v is skewed upwards where τ is loosely fixed (a longer τ goes with a steeper
asymptote), so it is corrected by Box's bias, −½σ̂²·(JᵀJ)⁻¹Jᵀd with d_t = tr((JᵀJ)⁻¹H_t) and H_t the
model's second derivatives at read t (Box 1971, J. R. Stat. Soc. B 33:171; from memory). Measured
where the window lasts 5 τ or more (tests/test_rate_truth.py, docs/assay-rules.md): the mean of v
within ±0.1 % of the truth in substrate excess and within −0.8 … +0.1 % with depletion, its
interval covering 93–96 %.

The steady state counts as reached when the window lasts at least ``STEADY_STATE_TIME_CONSTANTS``
time constants: the lag's residual rate at the window's end, e^(−(t_end − t₀)/τ), is then at most
e⁻³ ≈ 5 % of the steady state. τ is judged twice, by the fit above and by the fit whose depletion
term may only slow the reaction (c ≤ 0: depletion never speeds one up), and the longer counts; so
a lag much longer than the read, which an accelerating c could pass off as a short one, stays
flagged with that reason, as does a τ at the grid's long end. A window between 3 and about 5 τ is
at the rule's edge: the wells that pass are those whose τ came out short, and their v reads low
(measured −12 % at τ = 3 min on a 10-min read); a method whose lags last that long reads longer.

Cost: two linear fits per grid point and a fixed number of Gauss–Newton steps, each O(reads), so a
well costs O(reads).
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np
import numpy.typing as npt

FloatArray = npt.NDArray[np.float64]
IntArray = npt.NDArray[np.int64]

STEADY_STATE_TIME_CONSTANTS = 3.0  # the window must last 3 τ: the residual lag rate ≤ e⁻³ ≈ 5 %
GRID_POINTS = 48
GAUSS_NEWTON_STEPS = 12
PARAMETERS = 4


@dataclass(frozen=True)
class LagFits:
    """One hysteretic-model fit per listed well over reads 0 … n − 1 (times in minutes).

    ``rate_au_per_min`` is v (the steady-state rate at the starting substrate), ``rate_var`` its
    variance; ``tau_min`` the lag's fitted time constant; ``intercept_au`` the steady-state line
    extrapolated back to the first read, A₀ − v·τ (relative to the well's first read);
    ``reached`` whether the window lasts ``STEADY_STATE_TIME_CONSTANTS``·τ.
    """

    rate_au_per_min: FloatArray
    rate_var: FloatArray
    tau_min: FloatArray
    intercept_au: FloatArray
    n: IntArray
    dof: IntArray
    ssr: FloatArray
    sst: FloatArray
    window_min: FloatArray
    reached: npt.NDArray[np.bool_]

    def r2(self) -> FloatArray:
        with np.errstate(invalid="ignore", divide="ignore"):
            return np.where(self.sst > 0, 1.0 - self.ssr / self.sst, np.nan)


def _model(x: FloatArray, p: FloatArray) -> tuple[FloatArray, FloatArray]:
    """Model values (R, T) and Jacobian (R, T, 4) in (a₀, v, c, ln τ)."""
    tau = np.exp(p[:, 3:4])
    decay = np.exp(-x[None, :] / tau)
    theta = x[None, :] - tau * (1.0 - decay)
    values = p[:, 0:1] + p[:, 1:2] * theta + p[:, 2:3] * theta**2
    d_theta = -tau * (1.0 - decay) + x[None, :] * decay  # ∂θ/∂ln τ
    jac = np.stack([np.ones_like(theta), theta, theta**2, (p[:, 1:2] + 2.0 * p[:, 2:3] * theta) * d_theta], axis=2)
    return values, jac


def _solved(a: FloatArray, b: FloatArray) -> FloatArray:
    """x = a⁻¹b for stacked systems; a singular one (a flat well, say) by the pseudo-inverse, never an error."""
    try:
        return np.asarray(np.linalg.solve(a, b[..., None])[..., 0])
    except np.linalg.LinAlgError:
        with np.errstate(all="ignore"):
            return np.asarray(np.einsum("rij,rj->ri", np.linalg.pinv(a), b))


def _fixing_c(xtx: FloatArray, xty: FloatArray, flat: npt.NDArray[np.bool_]) -> tuple[FloatArray, FloatArray]:
    """Normal equations with c held at 0 in the ``flat`` rows (its row and column replaced by the unit)."""
    xtx, xty = xtx.copy(), xty.copy()
    xtx[flat, 2, :] = 0.0
    xtx[flat, :, 2] = 0.0
    xtx[flat, 2, 2] = 1.0
    xty[flat, 2] = 0.0
    return xtx, xty


def _solve(xtx: FloatArray, xty: FloatArray, syy: FloatArray, slowing: bool) -> tuple[FloatArray, FloatArray]:
    """a₀, v, c from the normal equations, and the SSR; with ``slowing``, c ≤ 0.

    Where the unconstrained c comes out positive, the constrained optimum has c = 0 (one linear
    inequality on a convex problem), so that row is solved again without c.
    """
    beta = _solved(xtx, xty)
    positive = beta[:, 2] > 0
    if slowing and positive.any():
        a, b = _fixing_c(xtx, xty, positive)
        beta = np.where(positive[:, None], _solved(a, b), beta)
    return beta, syy - np.einsum("ri,ri->r", beta, xty)


def _linear_at(x: FloatArray, y: FloatArray, mask: FloatArray, tau: FloatArray) -> tuple[FloatArray, FloatArray]:
    """a₀, v, c by least squares at each row's own τ (R,), and the SSR."""
    theta = x[None, :] - tau[:, None] * (1.0 - np.exp(-x[None, :] / tau[:, None]))
    basis = np.stack([np.ones_like(theta), theta, theta**2], axis=2)
    xtx = np.einsum("rti,rtj,rt->rij", basis, basis, mask)
    xty = np.einsum("rti,rt->ri", basis, y * mask)
    return _solve(xtx, xty, np.einsum("rt,rt->r", mask, y * y), False)


def _profiles(x: FloatArray, y: FloatArray, n: IntArray, grid: FloatArray) -> tuple[FloatArray, FloatArray]:
    """SSR of every row at every grid τ, free and with c ≤ 0 (R, G) each.

    At one τ the basis is the same for every row, so XᵀX over reads 0 … n − 1 is a running sum
    indexed by n, and Xᵀy one product: O(reads) per row and grid point.
    """
    rows = y.shape[0]
    syy = np.einsum("rt,rt->r", y, y)
    free, slowing = np.empty((rows, grid.size)), np.empty((rows, grid.size))
    for g, log_tau in enumerate(grid):
        tau = np.exp(log_tau)
        theta = x - tau * (1.0 - np.exp(-x / tau))
        basis = np.stack([np.ones_like(theta), theta, theta**2], axis=1)  # (T, 3)
        running = np.concatenate([np.zeros((1, 3, 3)), np.cumsum(basis[:, :, None] * basis[:, None, :], axis=0)])
        xtx = running[n]
        xty = y @ basis
        free[:, g] = _solve(xtx, xty, syy, False)[1]
        slowing[:, g] = _solve(xtx, xty, syy, True)[1]
    return free, slowing


def _refine(x: FloatArray, y: FloatArray, mask: FloatArray, p: FloatArray, ssr: FloatArray) -> tuple[FloatArray, FloatArray]:
    """Damped Gauss–Newton on all four parameters from ``p``."""
    damping = np.full(p.shape[0], 1e-3)
    for _ in range(GAUSS_NEWTON_STEPS):
        values, jac = _model(x, p)
        jtj = np.einsum("rti,rtj,rt->rij", jac, jac, mask)
        grad = np.einsum("rti,rt->ri", jac, (y - values) * mask)
        damped = jtj + damping[:, None, None] * np.einsum("ri,ij->rij", np.einsum("rii->ri", jtj), np.eye(PARAMETERS))
        with np.errstate(all="ignore"):
            trial = p + _solved(damped, grad)
            trial_ssr = np.sum(((y - _model(x, trial)[0]) * mask) ** 2, axis=1)
        accept = np.isfinite(trial_ssr) & (trial_ssr <= ssr) & np.all(np.isfinite(trial), axis=1)
        p = np.where(accept[:, None], trial, p)
        ssr = np.where(accept, trial_ssr, ssr)
        damping = np.where(accept, np.maximum(damping / 10.0, 1e-12), damping * 10.0)
    return p, ssr


def _profile_minimum(grid: FloatArray, profile: FloatArray) -> FloatArray:
    """ln τ at the least SSR of each row's profile, refined by a parabola through its neighbours."""
    rows, points = profile.shape
    best = np.clip(profile.argmin(axis=1), 1, points - 2)
    below, at, above = (profile[np.arange(rows), best + k] for k in (-1, 0, 1))
    h = grid[1] - grid[0]
    bend = below - 2.0 * at + above
    with np.errstate(invalid="ignore", divide="ignore"):
        shift = np.where(bend > 0, 0.5 * (below - above) / bend, 0.0)
    return np.asarray(grid[best] + np.clip(np.nan_to_num(shift), -1.0, 1.0) * h)


def _box_bias(x: FloatArray, mask: FloatArray, p: FloatArray, jac: FloatArray, cov_unit: FloatArray,
              sigma2: FloatArray) -> FloatArray:
    """Box's bias of the least-squares parameters, −½σ²·(JᵀJ)⁻¹Jᵀd with d_t = tr((JᵀJ)⁻¹H_t).

    H_t is the model's second derivative at read t. Only ln τ enters non-linearly, so
    d_t = 2M_vs·θ' + 4M_cs·θ·θ' + M_ss·(2c·θ'² + (v + 2cθ)·θ''), θ' = ∂θ/∂ln τ, θ'' = ∂²θ/∂(ln τ)².
    """
    tau = np.exp(p[:, 3:4])
    decay = np.exp(-x[None, :] / tau)
    theta = x[None, :] - tau * (1.0 - decay)
    d1 = -tau * (1.0 - decay) + x[None, :] * decay
    d2 = d1 + (x[None, :] ** 2 / tau) * decay
    v, c = p[:, 1:2], p[:, 2:3]
    m = cov_unit
    trace = (2.0 * m[:, 1:2, 3] * d1 + 4.0 * m[:, 2:3, 3] * theta * d1
             + m[:, 3:4, 3] * (2.0 * c * d1**2 + (v + 2.0 * c * theta) * d2))
    with np.errstate(invalid="ignore"):
        bias = -0.5 * sigma2[:, None] * np.einsum("rij,rtj,rt->ri", m, jac, trace * mask)
    return np.where(np.isfinite(bias), bias, 0.0)


def fit_lags(t_min: FloatArray, y: FloatArray, n: IntArray) -> LagFits:
    """Fit the hysteretic model to reads 0 … n − 1 of each row of ``y`` (absorbance relative to the first read).

    ``t_min`` (T,), ``y`` (R, T), ``n`` (R,) with n ≥ 5; reads from n on are not used.
    """
    rows, reads = y.shape
    x = t_min - t_min[0]
    mask = (np.arange(reads)[None, :] < n[:, None]).astype(float)
    y = np.where(mask > 0, y, 0.0)
    step = float(np.min(np.diff(x))) if reads > 1 else 1.0
    grid = np.log(np.geomspace(step / 4.0, 2.0 * max(float(x[-1]), step), GRID_POINTS))
    free, slowing = _profiles(x, y, n, grid)
    log_tau = _profile_minimum(grid, free)
    beta, ssr = _linear_at(x, y, mask, np.exp(log_tau))
    p, ssr = _refine(x, y, mask, np.column_stack([beta, log_tau]), ssr)
    _, jac = _model(x, p)
    jtj = np.einsum("rti,rtj,rt->rij", jac, jac, mask)
    dof = n - PARAMETERS
    with np.errstate(invalid="ignore", divide="ignore"):
        sigma2 = np.maximum(ssr, 0.0) / np.maximum(dof, 1)
        cov_unit = np.linalg.pinv(jtj)
        y_mean = np.sum(y * mask, axis=1) / n
        sst = np.sum(((y - y_mean[:, None]) * mask) ** 2, axis=1)
    p = p - _box_bias(x, mask, p, jac, cov_unit, sigma2)
    tau = np.exp(p[:, 3])
    window = x[np.clip(n - 1, 0, reads - 1)]
    tau_slowing = np.exp(_profile_minimum(grid, slowing))
    reached = ((STEADY_STATE_TIME_CONSTANTS * np.maximum(tau, tau_slowing) <= window)
               & (slowing.argmin(axis=1) < GRID_POINTS - 1) & np.isfinite(p[:, 1]))
    return LagFits(p[:, 1], sigma2 * cov_unit[:, 1, 1], tau, p[:, 0] - p[:, 1] * tau, n.astype(np.int64),
                   dof.astype(np.int64), ssr, sst, window, reached)
