"""Per-lot cost of judging one new lot against its trend history: incremental state vs rescan.

Run: .venv/bin/python benchmarks/bench_trend.py
Not a test; prints a table. Data are invented (seeded normal values on a chart with centre 0,
sigma 1).
"""

from __future__ import annotations

import sys
import time
from collections.abc import Callable
from pathlib import Path

import numpy as np

sys.path.insert(0, str(Path(__file__).resolve().parents[1]))  # run from a checkout, not installed
from pipeline.science.control_charts import ChartState, ControlLimits, imr_limits, rule_signals  # noqa: E402

HISTORY_SIZES = (100, 10_000)
NEW_LOTS = 200


def per_call_seconds(func: Callable[[float], object], new_values: np.ndarray, repeats: int) -> float:
    """Best-of-``repeats`` mean time of one call over ``new_values``."""
    best = float("inf")
    for _ in range(repeats):
        start = time.perf_counter()
        for v in new_values:
            func(float(v))
        best = min(best, (time.perf_counter() - start) / new_values.size)
    return best


def main() -> None:
    rng = np.random.default_rng(7)
    rows = []
    for size in HISTORY_SIZES:
        history = rng.normal(0.0, 1.0, size)
        limits = imr_limits(history[: min(size, 25)])
        state = ChartState.from_history(history, limits)  # built once from the history
        new_values = rng.normal(0.0, 1.0, NEW_LOTS)

        def push(v: float, state: ChartState = state) -> object:
            return state.push(v)

        def rescan(
            v: float, history: np.ndarray = history, limits: ControlLimits = limits
        ) -> object:
            series = np.append(history, v)
            last = series.size - 1
            return [s for s in rule_signals(series, limits.center, limits.sigma) if s.index == last]

        for v in new_values[:20]:  # the two ways must agree before they are timed
            assert push(v)[1] == tuple(rescan(v))  # noqa: S101
        t_push = per_call_seconds(push, new_values, repeats=5)
        t_rescan = per_call_seconds(rescan, new_values, repeats=3 if size > 1000 else 5)
        rows.append((size, t_push, t_rescan))

    print("Judging one new lot (all eight Nelson rules)")
    print(f"{'history lots':>12} | {'ChartState.push':>16} | {'rescan rule_signals':>20} | {'rescan/push':>11}")
    print(f"{'-' * 12}-+-{'-' * 16}-+-{'-' * 20}-+-{'-' * 11}")
    for size, t_push, t_rescan in rows:
        print(f"{size:>12,} | {t_push * 1e6:>13.1f} us | {t_rescan * 1e6:>17.1f} us | {t_rescan / t_push:>10.1f}x")
    (s0, p0, r0), (s1, p1, r1) = rows
    print()
    print(f"history x{s1 // s0}: push cost x{p1 / p0:.2f}, rescan cost x{r1 / r0:.2f}")


if __name__ == "__main__":
    main()
