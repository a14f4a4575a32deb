"""Kinetic data checked before a fit: one curve of initial rates, or a padded table of curves.

Units follow the inputs: substrate in mM gives Km (and Ki) in mM, rate in U/mg gives Vmax in
U/mg. A batched curve that cannot be fitted is not an error: it gets NaN and one of the status
codes below, and the rest of the batch is still fitted.
"""

from __future__ import annotations

from typing import Any

import numpy as np
from numpy.typing import ArrayLike, NDArray

from pipeline.errors import CalculationError

FloatArray = NDArray[np.float64]

# Status codes of a batched curve.
BATCH_CONVERGED = "converged"
BATCH_NOT_CONVERGED = "not-converged"
BATCH_TOO_FEW_POINTS = "too-few-points"
BATCH_TOO_FEW_LEVELS = "too-few-levels"
BATCH_NOT_SEPARABLE = "not-separable"
BATCH_NOT_FITTED = "not-fitted"  # every start value failed; the result says why


def frozen(arr: NDArray[Any]) -> NDArray[Any]:
    """A contiguous read-only copy, for the arrays of a frozen batch result."""
    arr = np.ascontiguousarray(arr)
    arr.setflags(write=False)
    return arr


def checked_vector(values: ArrayLike, what: str) -> FloatArray:
    """A flat array of finite numbers, or CalculationError naming the first bad point."""
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


def checked_curve(
    substrate: ArrayLike, rate: ArrayLike, weights: ArrayLike | None, n_params: int
) -> tuple[FloatArray, FloatArray, FloatArray | None]:
    """One curve's substrate, rate and weights, checked for a fit of ``n_params`` parameters."""
    s = checked_vector(substrate, "substrate concentration")
    v = checked_vector(rate, "initial rate")
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
        w = checked_vector(weights, "weights")
        if w.size != v.size:
            raise CalculationError(
                f"weights must pair up with the rates: received {w.size} weights for {v.size} rates"
            )
        if np.any(w <= 0):
            raise CalculationError(
                f"weights (1/sigma^2) must be positive; received {float(w.min())!r}"
            )
    return s, v, w


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
