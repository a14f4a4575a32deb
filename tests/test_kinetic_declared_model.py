"""One declared model per method for the reported Km, and a plausible Ki before inhibition can win.

Simulated curves with known truth (invented): Vmax 10 U/mL, Km 0.5 mM, substrate 0.1–8 mM in
duplicate, normal noise.
"""

from __future__ import annotations

import math
from types import SimpleNamespace

import numpy as np
import pytest

from pipeline.assay.plates import KineticSeries
from pipeline.release.lot_evaluation import _kinetic_measurements
from pipeline.science.kinetic_model_choice import choose_kinetic_model
from pipeline.science.measurement import Measurement

S = np.repeat([0.1, 0.25, 0.5, 1.0, 2.0, 4.0, 8.0], 2)
PROTEIN = Measurement("protein", "mg/mL", 6.0, se=0.06, n=3, dof=2)
SPEC = SimpleNamespace(molecular_weight_g_per_mol=33_000.0)


def _method(model: str) -> SimpleNamespace:
    return SimpleNamespace(km_model=model, km_max_relative_se=0.5, error_model="constant")


def _rates(ki: float, noise: float, seed: int) -> np.ndarray:
    return 10 * S / (0.5 + S + S**2 / ki) + np.random.default_rng(seed).normal(0, noise, S.size)


def test_ki_beyond_the_plausible_multiple_keeps_michaelis_menten() -> None:
    # Inhibition with Ki = 60 × the highest substrate, read so precisely that the F test notices it.
    v = _rates(ki=480.0, noise=0.002, seed=1)
    choice = choose_kinetic_model(S, v, ki_max_multiple=10.0)
    assert choice.model == "michaelis-menten" and choice.flagged
    assert "lies beyond the plausible 80" in choice.reason
    assert choose_kinetic_model(S, v, ki_max_multiple=100.0).model == "substrate-inhibition"


def test_declared_substrate_inhibition_reports_its_own_km_interval_and_covariance() -> None:
    v = _rates(ki=4.0, noise=0.05, seed=2)
    choice = choose_kinetic_model(S, v)
    si = choice.substrate_inhibition
    assert choice.model == "substrate-inhibition" and si is not None
    series = KineticSeries(tuple(S), tuple(v))
    out, detail = _kinetic_measurements("L1", series, choice, PROTEIN, _method("substrate-inhibition"), SPEC)
    km = out["km"]
    assert km.value == pytest.approx(si.km) and km.dof == S.size - 3
    assert km.ci95 == pytest.approx(si.km_ci95)  # t from n − 3, not n − 2
    assert detail is not None and detail["model"] == detail["chosen_model"] == "substrate-inhibition"
    # kcat/Km with the inhibition fit's Vmax–Km covariance (first-order propagation, GUM 5.2.2).
    rel = math.sqrt((si.vmax_se / si.vmax) ** 2 + (si.km_se / si.km) ** 2
                    - 2 * si.cov_vmax_km / (si.vmax * si.km) + (0.06 / 6.0) ** 2)
    assert out["kcat_over_km"].se == pytest.approx(out["kcat_over_km"].value * rel, rel=1e-9)
    assert math.isfinite(si.cov_vmax_km) and si.cov_vmax_km > 0


def test_declared_michaelis_menten_keeps_its_km_when_inhibition_is_chosen() -> None:
    v = _rates(ki=30.0, noise=0.01, seed=3)  # mild inhibition: Michaelis–Menten still fits fairly
    choice = choose_kinetic_model(S, v)
    assert choice.model == "substrate-inhibition"
    series = KineticSeries(tuple(S), tuple(v))
    out, detail = _kinetic_measurements("L1", series, choice, PROTEIN, _method("michaelis-menten"), SPEC)
    assert out["km"].value == pytest.approx(choice.michaelis_menten.km)
    assert detail is not None and detail["model"] == "michaelis-menten"
    assert detail["chosen_model"] == "substrate-inhibition"
    assert any("substrate inhibition chosen" in r for r in out["km"].reasons)
