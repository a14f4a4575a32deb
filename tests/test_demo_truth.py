"""The demo's reported Km against the Km its simulator put into each lot (the known truth).

The demo plant simulates every lot's progress curves from a true Km (``pipeline.demo.plant``);
the golden copy holds what the nights reported (``tests/golden/demo``, refreshed only on purpose).
Target: the reported Km recovers the simulated one within 1 % on average, per product.
"""

from __future__ import annotations

import json

import numpy as np
import pytest

from pipeline.demo import plant
from tests.golden import GOLDEN


def _truth() -> dict[str, float]:
    return {lot.lot_id: lot.km_mm for night in plant.build_scenario() for lot in night.lots}


@pytest.mark.parametrize("prefix", ["LLC", "PGR"])
def test_the_demos_km_is_recovered_within_one_percent_on_average(prefix: str) -> None:
    truth = _truth()
    rows = [json.loads(line) for line in (GOLDEN / "store" / "lot_results.jsonl").read_text().splitlines()]
    errors = np.array([row["value"] / truth[row["lot_id"]] - 1 for row in rows
                       if row["attribute"] == "km" and row["replaces"] is None and row["value"] is not None
                       and row["lot_id"].startswith(prefix)])
    print(f"{prefix}: {errors.size} Km results, mean bias {100 * errors.mean():+.2f} %, "
          f"median {100 * np.median(errors):+.2f} %")
    assert errors.size >= 20
    assert abs(errors.mean()) <= 0.01
