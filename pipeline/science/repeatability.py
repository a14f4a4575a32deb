"""The protein method's repeatability on one plate: replicate scatter pooled over the plate's lots.

Each lot's protein is read in a few replicates (usually three), so its own SD has only n − 1 = 2
degrees of freedom. An SE with 2 dof gives a wide t (4.30) and, once combined with better-known
terms by Welch–Satterthwaite, an interval that falls short of its 95 %: ν_eff is largest exactly
when the replicates' SD happens to be small. The replicates of every lot on one plate are read by
the same analyst, reader and curve in one run, so their scatter estimates one repeatability
(within-run precision); pooling it is the usual estimate (ISO 5725-2:1994, 7.4.5: s_r² is the
mean of the cells' variances weighted by their dof — from memory):

    CV_pooled² = Σ νᵢ·CVᵢ² / Σ νᵢ,   νᵢ = nᵢ − 1,   dof = Σ νᵢ.

The scatter is pooled as a relative SD (CV) because the lots differ in concentration and the
method's replicate limit is a CV. A lot whose scatter is larger than the others' is not given the
pooled CV: before pooling, the largest variance is tested against the pool of the others,
F = CVᵢ² / CV²_others with (νᵢ, Σ_{j≠i} νⱼ) dof, against the upper α/k point of F (k lots). For
equal n this is Cochran's C test (ISO 5725-2, 7.3.3 and Table 4: C_crit = 1 / (1 + (k − 1)/F)), so
the 5 % "straggler" level keeps its published critical values. A lot found so keeps its own SD and
its own n − 1 dof, and the test is repeated on the rest; fewer than two lots leave nothing to pool.
"""

from __future__ import annotations

import math
from collections.abc import Mapping
from dataclasses import dataclass

import numpy as np
import numpy.typing as npt
from scipy import stats

STRAGGLER_ALPHA = 0.05  # ISO 5725-2's straggler level for Cochran's test


@dataclass(frozen=True)
class PooledRepeatability:
    """The plate's pooled relative repeatability, and the lots that keep their own scatter."""

    relative_sd: float  # pooled CV as a fraction (0.05 = 5 %)
    dof: int  # Σ (nᵢ − 1) over the pooled lots
    pooled_lots: tuple[str, ...]
    own_scatter_lots: tuple[str, ...]  # larger scatter than the others (Cochran's test at α)

    def relative_se(self, n: int) -> float:
        """The pooled relative SE of a mean of n replicates, CV_pooled / √n."""
        return self.relative_sd / math.sqrt(n)


def cochran_critical_value(lots: int, replicates: int, alpha: float = STRAGGLER_ALPHA) -> float:
    """Cochran's C critical value for k lots of n replicates: 1 / (1 + (k − 1)/F₁₋α/k(n − 1, (k − 1)(n − 1)))."""
    f = float(stats.f.ppf(1.0 - alpha / lots, replicates - 1, (lots - 1) * (replicates - 1)))
    return 1.0 / (1.0 + (lots - 1) / f)


def pool_relative_repeatability(
    values_by_lot: Mapping[str, npt.ArrayLike], alpha: float = STRAGGLER_ALPHA
) -> PooledRepeatability | None:
    """Pool the lots' replicate CVs (lots with at least two finite replicates and a non-zero mean).

    None when fewer than two lots can be pooled (each lot then keeps its own SD).
    """
    cv2: dict[str, float] = {}
    dof: dict[str, int] = {}
    for lot, raw in values_by_lot.items():
        v = np.asarray(raw, dtype=float).ravel()
        if v.size < 2 or not np.all(np.isfinite(v)) or v.mean() == 0:
            continue
        cv2[lot] = float((v.std(ddof=1) / abs(v.mean())) ** 2)
        dof[lot] = int(v.size - 1)
    own: list[str] = []
    pooled = sorted(cv2)
    while len(pooled) >= 2:
        worst = max(pooled, key=lambda lot: cv2[lot])
        others = [lot for lot in pooled if lot != worst]
        others_dof = sum(dof[lot] for lot in others)
        others_cv2 = sum(dof[lot] * cv2[lot] for lot in others) / others_dof
        critical = float(stats.f.ppf(1.0 - alpha / len(pooled), dof[worst], others_dof))
        if others_cv2 > 0 and cv2[worst] / others_cv2 <= critical:
            break
        own.append(worst)
        pooled = others
    if len(pooled) < 2:
        return None
    total_dof = sum(dof[lot] for lot in pooled)
    relative_sd = math.sqrt(sum(dof[lot] * cv2[lot] for lot in pooled) / total_dof)
    return PooledRepeatability(relative_sd, total_dof, tuple(pooled), tuple(sorted(own)))
