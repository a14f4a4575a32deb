"""A well's read-to-read noise, whatever the smooth shape of its progress curve.

From third divided differences over four consecutive reads,
d_i = Σ_j w_j·A_j / √(Σ_j w_j²) with w_j = 1 / Π_{k≠j}(t_j − t_k), j, k = i … i+3:
any quadratic A(t) gives d = 0 and independent read noise of SD σ gives SD(d) = σ, so a robust
σ̂ comes from the d's (1.4826·median|d| to set aside sharp features, then the RMS of the d's
within 3.5 of those). Neighbouring d's share reads, so the degrees of freedom are counted as
one per four reads (conservative). Floored at a round-off level.
"""

from __future__ import annotations

import numpy as np
import numpy.typing as npt
from numpy.lib.stride_tricks import sliding_window_view

FloatArray = npt.NDArray[np.float64]

# Below any reader's resolution (0.0001 AU is common practice for plate readers).
RESIDUAL_SD_FLOOR_AU = 1e-9


def read_noise(t: FloatArray, a: FloatArray, usable_n: npt.NDArray[np.int64]) -> tuple[FloatArray, FloatArray]:
    """Noise SD of each well over its usable reads, and its degrees of freedom."""
    order = 4
    if a.shape[1] < order:
        return np.full(a.shape[0], RESIDUAL_SD_FLOOR_AU), np.ones(a.shape[0])
    tw = sliding_window_view(t, order)  # (m, 4)
    gaps = tw[:, :, None] - tw[:, None, :]
    gaps[:, np.arange(order), np.arange(order)] = 1.0
    weights = 1.0 / gaps.prod(axis=2)
    weights /= np.sqrt(np.sum(weights**2, axis=1, keepdims=True))
    with np.errstate(invalid="ignore"):
        d = np.einsum("wmk,mk->wm", sliding_window_view(a, order, axis=1), weights)
    last_read = np.arange(order - 1, a.shape[1])
    valid = (last_read[None, :] < usable_n[:, None]) & np.isfinite(d)
    count = valid.sum(axis=1)
    sd = np.full(a.shape[0], RESIDUAL_SD_FLOOR_AU)
    has = count > 0
    if np.any(has):
        abs_d = np.where(valid[has], np.abs(d[has]), np.nan)
        rough = 1.4826 * np.nanmedian(abs_d, axis=1, keepdims=True)
        kept = abs_d <= 3.5 * rough
        rms = np.sqrt(np.nansum(np.where(kept, abs_d**2, 0.0), axis=1) / np.maximum(kept.sum(axis=1), 1))
        sd[has] = np.fmax(rms, RESIDUAL_SD_FLOOR_AU)
    return sd, np.maximum(count // order, 1).astype(float)
