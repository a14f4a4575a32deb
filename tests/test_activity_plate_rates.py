"""An activity plate's rates as the night computes them (the demo plant's simulated plate)."""

from __future__ import annotations

import datetime as dt
import io

import numpy as np
import pandas as pd
import yaml

from pipeline.assay import plates
from pipeline.controlled.specs import parse_kinetic_method
from pipeline.demo import plant


def _plate(seed: int = 5) -> tuple[pd.DataFrame, pd.DataFrame]:
    rng = np.random.default_rng(seed)
    lots = [plant.LotPlan("LLC-T-1", plant.LIPASE, None, 246.0, 0.40, 6.0, "released")]
    files = plant._activity_plate("AK-TEST", plant.LIPASE, lots, rng, 1.0)
    read = {name.split("-")[0]: pd.read_csv(io.BytesIO(data)) for name, data in files.items()}
    return read["platemap"], read["kinread"]


def _method():
    with open("specs/methods/LIP-PNPB.yaml", encoding="utf-8") as handle:
        return parse_kinetic_method(yaml.safe_load(handle), "LIP-PNPB.yaml", "0" * 64)


def test_wells_get_conversion_limited_windows_and_blanks_their_whole_read() -> None:
    plate_map, reads = _plate()
    result = plates.evaluate_activity_plate("AK-TEST", plate_map, reads, _method(), dt.date(2026, 11, 20))
    assert result.valid, result.reasons
    wells = result.wells.values()
    blanks = [w for w in wells if w["role"] == "blank"]
    assert blanks and all(w["slope_kind"] == "blank-line" and w["n_points"] == 21 for w in blanks)
    kinetic = [w for w in wells if w["role"] == "kinetic" and w["ok"]]
    assert all(w["conversion_pct"] <= 10.0 and w["window_start_min"] == 0.0 for w in kinetic)
    # The lowest level (0.08 mM, 14 % converted over the 10-min read) stops early.
    lowest = [w for w in kinetic if w["substrate_mm"] == 0.08]
    assert lowest and all(w["window_end_min"] < 10.0 for w in lowest)
    activity = result.activity["LLC-T-1"]
    # Replicates (2 dof) with the shared mean blank (4 blanks, 3 dof): Welch–Satterthwaite dof ≥ 2.
    assert activity.ci95 is not None and activity.dof >= 2
    assert 0 < activity.detail["blank_se_u_per_ml"] and activity.se >= activity.detail["replicate_se"]
