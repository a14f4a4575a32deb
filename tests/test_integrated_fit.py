"""The integrated Michaelis–Menten cross-check (Schnell & Mendoza 1997, J. Theor. Biol. 187:207)."""

from __future__ import annotations

import numpy as np
import pytest

from pipeline.errors import CalculationError
from pipeline.science.integrated_michaelis_menten import fit_integrated, product_formed_mm

T_MIN = np.arange(0, 601, 30) / 60.0
LEVELS = np.repeat([0.08, 0.15, 0.3, 0.5, 0.8, 1.2, 2.0], 2)


def test_closed_form_satisfies_the_integrated_rate_law() -> None:
    # Vmax·t = P + Km·ln(S0/(S0 − P)) (the integrated Michaelis–Menten equation) at every time.
    for s0, vmax, km in ((0.08, 0.01, 0.4), (2.0, 0.05, 0.4), (10.0, 0.3, 0.05)):
        t = np.linspace(0.0, 0.9 * s0 / vmax, 50)  # up to well before the substrate runs out
        p = product_formed_mm(t, s0, vmax, km)
        lhs = vmax * t
        rhs = p + km * np.log(s0 / (s0 - p))
        np.testing.assert_allclose(lhs, rhs, rtol=1e-9, atol=1e-12)
        assert np.all(np.diff(p) >= 0) and p[-1] < s0


def test_whole_curve_fit_recovers_km_from_simulated_lots() -> None:
    # Simulated with known truth (invented): Km 0.4 mM, Vmax 0.01 mM/min in the well, 1.5 %
    # pipetting scatter between wells, read noise 0.0025 AU, ε·l = 9.9 AU/mM; 30 lots.
    rng = np.random.default_rng(3)
    estimates = []
    for _ in range(30):
        vmax = 0.01 * rng.normal(1.0, 0.015, LEVELS.size)
        a = np.array([0.06 + 9.9 * product_formed_mm(T_MIN, s, v, 0.4) for s, v in zip(LEVELS, vmax, strict=True)])
        a += rng.normal(0.0, 0.0025, a.shape)
        fit = fit_integrated(T_MIN, a, LEVELS, 9.9, np.zeros(LEVELS.size), np.full(LEVELS.size, T_MIN.size),
                             (0.008, 0.3))
        assert fit.converged and fit.wells == LEVELS.size and fit.reads == LEVELS.size * T_MIN.size
        estimates.append(fit.km_mm)
    assert np.median(estimates) == pytest.approx(0.4, rel=0.015)


def test_too_little_data_is_refused() -> None:
    with pytest.raises(CalculationError, match="at least two wells"):
        fit_integrated(T_MIN, np.zeros((1, T_MIN.size)), [0.1], 9.9, [0.0], [T_MIN.size], (0.01, 0.1))
