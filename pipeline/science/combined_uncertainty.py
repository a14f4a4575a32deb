"""Standard uncertainty of a product or quotient of measured quantities, with its effective dof.

For y = Π xᵢ^{±1} the relative variances add, with a covariance term where two inputs come from
one fit: (u_y/y)² = Σ (uᵢ/xᵢ)² + 2 Σ_{i<j} ± rᵢⱼ (uᵢ/xᵢ)(uⱼ/xⱼ) (JCGM 100:2008, "GUM", 5.1.6 and
5.2.2). Inputs from one fit share its degrees of freedom and are entered as one term (their
combined relative variance). The effective degrees of freedom follow the Welch–Satterthwaite
formula, ν_eff = (u_y/y)⁴ / Σ (term_i⁴ / νᵢ) (GUM G.4.1, eq. G.2b); the 95 % interval is
y ± t₀.₉₇₅(ν_eff)·u_y (GUM G.3 and G.6).
"""

from __future__ import annotations

import math
from collections.abc import Sequence
from dataclasses import dataclass

from scipy import stats

from pipeline.errors import CalculationError


@dataclass(frozen=True)
class RelativeTerm:
    """One independent source: its relative standard uncertainty and its degrees of freedom."""

    relative_u: float
    dof: float


@dataclass(frozen=True)
class CombinedUncertainty:
    value: float
    se: float
    dof: float
    ci95: tuple[float, float] | None


def welch_satterthwaite(terms: Sequence[RelativeTerm]) -> tuple[float, float]:
    """Combined relative uncertainty √Σuᵢ² and ν_eff = (Σuᵢ²)² / Σ(uᵢ⁴/νᵢ) (GUM eq. G.2b)."""
    for term in terms:
        if not (math.isfinite(term.relative_u) and term.relative_u >= 0) or not term.dof > 0:
            raise CalculationError(
                f"an uncertainty term needs a finite relative uncertainty and positive degrees of freedom; "
                f"received {term.relative_u!r} with {term.dof!r} dof"
            )
    variance = sum(t.relative_u**2 for t in terms)
    denominator = sum(t.relative_u**4 / t.dof for t in terms if math.isfinite(t.dof))
    dof = variance**2 / denominator if denominator > 0 else math.inf
    return math.sqrt(variance), dof


def combined(value: float, terms: Sequence[RelativeTerm]) -> CombinedUncertainty:
    """y's SE, effective dof and 95 % interval from independent relative terms."""
    relative, dof = welch_satterthwaite(terms)
    se = abs(value) * relative
    if not math.isfinite(value) or not dof >= 1:
        return CombinedUncertainty(value, se, dof, None)
    t = float(stats.t.ppf(0.975, dof)) if math.isfinite(dof) else float(stats.norm.ppf(0.975))
    return CombinedUncertainty(value, se, dof, (value - t * se, value + t * se))


def fit_ratio_term(rel_a: float, rel_b: float, correlation_term: float, dof: float) -> RelativeTerm:
    """Two parameters of one fit in a quotient a/b: (u/y)² = rel_a² + rel_b² − 2·cov(a, b)/(a·b)."""
    variance = rel_a**2 + rel_b**2 - 2.0 * correlation_term
    if variance < 0:
        raise CalculationError(
            "the covariance of the two fitted parameters is larger than their standard errors allow "
            "(|correlation| > 1)"
        )
    return RelativeTerm(math.sqrt(variance), dof)
