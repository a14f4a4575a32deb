"""Printed benchmark: the initial-rate window search at 250, 500 and 1000 reads per well.

Simulated plates (invented): 96 wells, integrated Michaelis–Menten curves (Lambert W form), read
noise 0.0025 AU; then 96 wells with a hysteretic lag (τ 1–3 min) under ``steady-state``, whose
steady-state rate is a fit of the lag's curve (``pipeline.science.lag_fits``). Prints
milliseconds per plate; nothing is asserted.
Run: .venv/bin/python benchmarks/bench_rates.py
"""

from __future__ import annotations

import time

import numpy as np
from scipy.special import lambertw

from pipeline.science.rates import RateWindowSettings, initial_rates


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
    tau = np.repeat([1.0, 2.0, 3.0], 32)
    settings = RateWindowSettings(shape_action="steady-state")
    for reads in (250, 500, 1000):
        t = np.linspace(0.0, 20.0, reads)
        plate = 0.06 + 0.05 * (t[None, :] - tau[:, None] * (1 - np.exp(-t[None, :] / tau[:, None])))
        plate = plate + rng.normal(0, 0.0025, plate.shape)
        start = time.perf_counter()
        rates = initial_rates(t, plate, [f"W{i}" for i in range(tau.size)], settings)
        elapsed = time.perf_counter() - start
        print(f"lag plate    {reads:>5} reads/well, 96 wells: {elapsed * 1e3:8.1f} ms per plate "
              f"({sum(r.slope_kind == 'steady-state' for r in rates)} steady-state rates)")


if __name__ == "__main__":
    main()
