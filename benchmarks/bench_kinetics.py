"""Printed micro-benchmark: batched vs one-curve kinetic fits on simulated curves.

Simulated data (invented): Vmax 5-20 U/mg, Km 1-3 mM, 8 substrate levels in duplicate,
normal noise 3 % of Vmax. The model choice uses 0.25-32 mM in duplicate, half the curves
plain Michaelis-Menten and half with substrate inhibition (Ki 2-6 x Km).
Run: .venv/bin/python benchmarks/bench_kinetics.py
"""

from __future__ import annotations

import time

import numpy as np

from pipeline.science.kinetic_model_choice import choose_kinetic_model, choose_kinetic_models
from pipeline.science.michaelis_menten import fit_michaelis_menten, fit_michaelis_menten_batch

SUBSTRATE_MM = np.repeat([0.4, 0.8, 1.5, 2.5, 4.0, 6.0, 8.0, 10.0], 2)
CHOICE_SUBSTRATE_MM = np.repeat([0.25, 0.5, 1.0, 2.0, 4.0, 8.0, 16.0, 32.0], 2)


def simulated_rates(n_curves: int, seed: int = 1) -> np.ndarray:
    """Rates v = Vmax S/(Km + S) + noise, one row per curve."""
    rng = np.random.default_rng(seed)
    vmax = rng.uniform(5, 20, (n_curves, 1))
    km = rng.uniform(1, 3, (n_curves, 1))
    return vmax * SUBSTRATE_MM / (km + SUBSTRATE_MM) + rng.normal(0, 0.03 * vmax, (n_curves, 16))


def simulated_night(n_curves: int, seed: int = 2) -> np.ndarray:
    """Rates v = Vmax S/(Km + S + S^2/Ki) + noise; 1/Ki = 0 in the first half of the rows."""
    rng = np.random.default_rng(seed)
    s = CHOICE_SUBSTRATE_MM
    vmax = rng.uniform(5, 20, (n_curves, 1))
    km = rng.uniform(0.5, 2, (n_curves, 1))
    inverse_ki = 1 / (rng.uniform(2, 6, (n_curves, 1)) * km)
    inverse_ki[: n_curves // 2] = 0.0
    mean = vmax * s / (km + s + inverse_ki * s**2)
    return mean + rng.normal(0, 0.03 * vmax, (n_curves, s.size))


def model_choice() -> None:
    """The night's model choice: one batched call against one call per curve."""
    for n_curves in (1_000, 10_000):
        rates = simulated_night(n_curves)
        start = time.perf_counter()
        choices = choose_kinetic_models(CHOICE_SUBSTRATE_MM, rates)
        elapsed = time.perf_counter() - start
        inhibited = sum(c.model == "substrate-inhibition" for c in choices)
        print(
            f"model choice batched  {n_curves:>6} curves: {elapsed * 1e3:8.1f} ms "
            f"({elapsed / n_curves * 1e6:6.1f} us/curve, {inhibited} substrate inhibition)"
        )
    rates = simulated_night(1_000)
    start = time.perf_counter()
    loop = [choose_kinetic_model(CHOICE_SUBSTRATE_MM, row) for row in rates]
    elapsed = time.perf_counter() - start
    pairs = list(zip(loop, choose_kinetic_models(CHOICE_SUBSTRATE_MM, rates), strict=True))
    decision = sum((a.model, a.flagged) == (b.model, b.flagged) for a, b in pairs)
    wording = sum(a.reason == b.reason for a, b in pairs)
    print(
        f"model choice one-curve {1_000:>5} curves: {elapsed * 1e3:8.1f} ms "
        f"({elapsed * 1e3:6.1f} us/curve); batched gives the same decision on {decision} "
        f"and the same reason text on {wording} of 1000"
    )


def main() -> None:
    for n_curves in (1_000, 10_000, 100_000):
        rates = simulated_rates(n_curves)
        start = time.perf_counter()
        batch = fit_michaelis_menten_batch(SUBSTRATE_MM, rates)
        elapsed = time.perf_counter() - start
        print(
            f"batched  {n_curves:>7} curves: {elapsed * 1e3:8.1f} ms "
            f"({elapsed / n_curves * 1e6:6.1f} us/curve, {batch.converged.mean():.1%} converged)"
        )
    rates = simulated_rates(1_000)
    start = time.perf_counter()
    for row in rates:
        fit_michaelis_menten(SUBSTRATE_MM, row)
    elapsed = time.perf_counter() - start
    print(f"one-curve {1_000:>6} curves: {elapsed * 1e3:8.1f} ms ({elapsed * 1e3:6.1f} us/curve)")
    model_choice()


if __name__ == "__main__":
    main()
