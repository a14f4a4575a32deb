"""Michaelis-Menten or substrate inhibition, by the extra-sum-of-squares F test.

F = ((RSS1 - RSS2)/(df1 - df2)) / (RSS2/df2), df1 = n - 2, df2 = n - 3, p = P(F(1, df2) > F).
``choose_kinetic_model`` decides for one curve, ``choose_kinetic_models`` for many with the
batched fits; both word the decision with ``model_choice``.
"""

from __future__ import annotations

from dataclasses import dataclass
from typing import Any

import numpy as np
from numpy.typing import ArrayLike
from scipy import stats

from pipeline.errors import CalculationError
from pipeline.plain_data import to_plain
from pipeline.science.kinetic_data import batch_inputs
from pipeline.science.michaelis_menten import (
    MICHAELIS_MENTEN,
    MichaelisMentenBatch,
    MichaelisMentenFit,
    fit_michaelis_menten,
    fit_michaelis_menten_batch,
)
from pipeline.science.substrate_inhibition import (
    SUBSTRATE_INHIBITION,
    SubstrateInhibitionFit,
    fit_substrate_inhibition,
)
from pipeline.science.substrate_inhibition_batch import SubstrateInhibitionBatch, fit_batch_from


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
            **to_plain(self),
            "michaelis_menten": self.michaelis_menten.to_dict(),
            "substrate_inhibition": None if si is None else si.to_dict(),
        }


# Default plausibility bound: Ki at most this multiple of the highest substrate tested (common
# practice: inhibition that halves the rate only far beyond the tested range is not measured).
KI_MAX_MULTIPLE = 10.0


def choose_kinetic_model(
    substrate: ArrayLike, rate: ArrayLike, weights: ArrayLike | None = None, alpha: float = 0.05,
    ki_max_multiple: float = KI_MAX_MULTIPLE,
) -> KineticModelChoice:
    """Michaelis-Menten or substrate inhibition, by the extra-sum-of-squares F test.

    F = ((RSS1 - RSS2)/(df1 - df2)) / (RSS2/df2), df1 = n - 2, df2 = n - 3,
    p = P(F(df1 - df2, df2) > F). Substrate inhibition is chosen, and flagged, only when
    p < alpha and the fitted Ki is finite, positive and plausible: Ki ≤ ``ki_max_multiple`` × the
    highest substrate tested. A significant departure that is not inhibition (1/Ki <= 0), or
    whose Ki lies beyond that bound, keeps Michaelis-Menten but is flagged for review.
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
    top = float(np.nanmax(np.asarray(substrate, dtype=float)))
    return model_choice(mm, si, float(f_stat), p_value, float(alpha), ki_max_multiple * top)


def model_choice(mm: MichaelisMentenFit, si: SubstrateInhibitionFit, f_stat: float, p_value: float,
                 alpha: float, ki_max_mm: float = np.inf) -> KineticModelChoice:
    """The decision and its wording once both fits and the F test are known (one-curve and batch)."""
    test = f"F = {f_stat:.4g} on {mm.dof - si.dof} and {si.dof} df, p = {p_value:.3g}"
    significant = p_value < alpha
    inhibits = si.converged and np.isfinite(si.ki) and si.ki > 0
    if significant and inhibits and si.ki > ki_max_mm:
        model, flagged = MICHAELIS_MENTEN, True
        reason = (
            f"Michaelis-Menten kept: substrate inhibition fits better ({test} < {alpha:g}) but its "
            f"Ki = {si.ki:.4g} lies beyond the plausible {ki_max_mm:.4g} (the method's multiple of the "
            f"highest substrate tested): review the curve"
        )
    elif significant and inhibits:
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


def choose_kinetic_models(
    substrate: ArrayLike,
    rate: ArrayLike,
    weights: ArrayLike | None = None,
    mask: ArrayLike | None = None,
    alpha: float = 0.05,
    ki_max_multiple: float = KI_MAX_MULTIPLE,
) -> tuple[KineticModelChoice, ...]:
    """Michaelis-Menten or substrate inhibition for every curve, by the extra-sum-of-squares F.

    F = ((RSS1 - RSS2)/(df1 - df2)) / (RSS2/df2), df1 = n - 2, df2 = n - 3,
    p = P(F(df1 - df2, df2) > F); the decision and its wording per curve are those of
    ``choose_kinetic_model``. Raises CalculationError when a curve cannot be fitted
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
    si = fit_batch_from(s, v, w, mm)
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
    top = np.max(np.where(w > 0, s, -np.inf), axis=1)  # highest substrate tested, per curve
    return tuple(
        _choice(mm, si, i, float(f_stat[i]), float(p_value[i]), float(alpha), float(ki_max_multiple * top[i]))
        for i in range(len(mm))
    )


def _choice(
    mm_batch: MichaelisMentenBatch,
    si_batch: SubstrateInhibitionBatch,
    i: int,
    f_stat: float,
    p_value: float,
    alpha: float,
    ki_max_mm: float,
) -> KineticModelChoice:
    """Curve ``i``'s decision, worded as ``choose_kinetic_model`` words it."""
    mm = mm_batch.fit(i)
    if mm.n < 4:
        reason = f"only {mm.n} points: too few to test for substrate inhibition (at least 4 needed)"
        return KineticModelChoice(MICHAELIS_MENTEN, mm, None, None, None, alpha, False, reason)
    if si_batch.start[i] < 0:
        reason = f"substrate inhibition could not be tested: {si_batch.failure[i]}"
        return KineticModelChoice(MICHAELIS_MENTEN, mm, None, None, None, alpha, False, reason)
    return model_choice(mm, si_batch.fit(i), f_stat, p_value, alpha, ki_max_mm)
