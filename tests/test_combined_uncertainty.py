"""Welch–Satterthwaite combination (JCGM 100:2008 G.4.1) against an outside reference."""

from __future__ import annotations

import math

import numpy as np
import pytest
from scipy import stats

from pipeline.errors import CalculationError
from pipeline.release.lot_evaluation import _with_uncertainty
from pipeline.science.combined_uncertainty import (
    RelativeTerm,
    combined,
    fit_ratio_term,
    welch_satterthwaite,
)


def test_effective_dof_equals_welchs_t_test_dof() -> None:
    # For two independent means the Welch–Satterthwaite ν_eff is Welch's t-test df; scipy's
    # ttest_ind(equal_var=False) reports it (an independent implementation).
    rng = np.random.default_rng(2)
    a, b = rng.normal(10, 1, 4), rng.normal(10, 3, 7)
    u_a, u_b = a.std(ddof=1) / math.sqrt(a.size), b.std(ddof=1) / math.sqrt(b.size)
    _, dof = welch_satterthwaite([RelativeTerm(u_a, a.size - 1), RelativeTerm(u_b, b.size - 1)])
    assert dof == pytest.approx(stats.ttest_ind(a, b, equal_var=False).df, rel=1e-12)


def test_one_term_keeps_its_dof_and_an_exact_term_adds_none() -> None:
    relative, dof = welch_satterthwaite([RelativeTerm(0.05, 2), RelativeTerm(0.0, math.inf)])
    assert (relative, dof) == (pytest.approx(0.05), pytest.approx(2.0))
    result = combined(100.0, [RelativeTerm(0.05, 2)])
    # 95 % interval with t(0.975, 2) = 4.303 (statistical tables).
    assert result.ci95 == pytest.approx((100 - 4.303 * 5, 100 + 4.303 * 5), rel=1e-4)


def test_covariance_of_one_fit_enters_the_quotient() -> None:
    # Correlation +0.9 between Vmax and Km (typical of a Michaelis–Menten fit) shrinks u(Vmax/Km).
    independent = fit_ratio_term(0.03, 0.08, 0.0, 12).relative_u
    correlated = fit_ratio_term(0.03, 0.08, 0.9 * 0.03 * 0.08, 12).relative_u
    assert correlated == pytest.approx(math.sqrt(0.03**2 + 0.08**2 - 2 * 0.9 * 0.03 * 0.08))
    assert correlated < independent
    with pytest.raises(CalculationError, match="correlation"):
        fit_ratio_term(0.05, 0.05, 1.5 * 0.05 * 0.05, 12)  # |ρ| = 1.5 makes the variance negative


def test_a_fit_without_a_usable_se_gives_the_value_and_says_why() -> None:
    m = _with_uncertainty("vmax", "U/mg", 246.0, 14, lambda: [RelativeTerm(float("nan"), 12)])
    assert m.value == 246.0 and m.se is None and m.ci95 is None
    assert "no uncertainty could be combined" in m.reasons[0]
