"""Printed benchmark: the initial-rate window search at 250, 500 and 1000 reads per well.

Simulated plate (invented): 96 wells, integrated Michaelis–Menten curves (Lambert W form), read
noise 0.0025 AU. Prints seconds per plate; nothing is asserted.
Run: .venv/bin/python benchmarks/bench_rates.py
"""

from __future__ import annotations

import time

import numpy as np
from scipy.special import lambertw

from pipeline.science.rates import initial_rates


def main() -> None:
    rng = np.random.default_rng(5)
    s0 = np.repeat([0.08, 0.15, 0.3, 0.5, 0.8, 1.2, 2.0, 4.0], 12)
    for reads in (250, 500, 1000):
        t = np.linspace(0.0, 20.0, reads)
        s = 0.4 * np.real(lambertw((s0[:, None] / 0.4) * np.exp((s0[:, None] - 0.01 * t) / 0.4)))
        plate = 0.06 + 9.9 * (s0[:, None] - s) + rng.normal(0, 0.0025, (s0.size, reads))
        start = time.perf_counter()
        rates = initial_rates(t, plate, [f"W{i}" for i in range(s0.size)], substrate_mm=s0, au_per_mm=9.9)
        elapsed = time.perf_counter() - start
        print(f"window search {reads:>5} reads/well, 96 wells: {elapsed * 1e3:8.1f} ms per plate "
              f"({sum(r.ok for r in rates)} wells with a rate)")


if __name__ == "__main__":
    main()
