"""Printed micro-benchmark: batched vs one-curve Michaelis-Menten fits on simulated curves.

Simulated data (invented): Vmax 5-20 U/mg, Km 1-3 mM, 8 substrate levels in duplicate,
normal noise 3 % of Vmax. Run: .venv/bin/python benchmarks/bench_kinetics.py
"""

from __future__ import annotations

import time

import numpy as np

from pipeline.kinetics import fit_michaelis_menten, fit_michaelis_menten_batch

SUBSTRATE_MM = np.repeat([0.4, 0.8, 1.5, 2.5, 4.0, 6.0, 8.0, 10.0], 2)


def simulated_rates(n_curves: int, seed: int = 1) -> np.ndarray:
    """Rates v = Vmax S/(Km + S) + noise, one row per curve."""
    rng = np.random.default_rng(seed)
    vmax = rng.uniform(5, 20, (n_curves, 1))
    km = rng.uniform(1, 3, (n_curves, 1))
    return vmax * SUBSTRATE_MM / (km + SUBSTRATE_MM) + rng.normal(0, 0.03 * vmax, (n_curves, 16))


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


if __name__ == "__main__":
    main()
