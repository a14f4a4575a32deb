"""The plate's pooled protein repeatability (ISO 5725-2 pooling, Cochran's test for stragglers)."""

from __future__ import annotations

import math

import numpy as np
import pytest

from pipeline.assay.plates import replicate_measurement
from pipeline.assay.protein_plates import with_plate_scatter
from pipeline.science.repeatability import cochran_critical_value, pool_relative_repeatability
from pipeline.vocabulary import ReplicateScatter


@pytest.mark.parametrize(("lots", "replicates", "alpha", "table"), [
    (3, 3, 0.01, 0.942), (3, 3, 0.05, 0.871), (4, 3, 0.01, 0.864), (4, 3, 0.05, 0.768),
    (5, 2, 0.01, 0.928), (5, 2, 0.05, 0.841), (10, 3, 0.01, 0.536), (10, 3, 0.05, 0.445),
])
def test_cochran_critical_values_match_the_published_table(lots, replicates, alpha, table):
    # ISO 5725-2:1994, Table 4 (critical values of Cochran's C; from memory, three decimals).
    assert cochran_critical_value(lots, replicates, alpha) == pytest.approx(table, abs=6e-4)


def test_pooled_cv_weights_each_lots_variance_by_its_dof():
    # Worked by hand: CVs 1 %, 2 %, 2 % with 2 dof each → CV² = (2·1 + 2·4 + 2·4)/6 = 3 (%²).
    pool = pool_relative_repeatability({"A": [99, 100, 101], "B": [196, 200, 204], "C": [49, 50, 51]})
    assert pool is not None
    assert pool.relative_sd == pytest.approx(math.sqrt(3.0) / 100, rel=1e-12)
    assert (pool.dof, pool.pooled_lots, pool.own_scatter_lots) == (6, ("A", "B", "C"), ())
    assert pool.relative_se(3) == pytest.approx(pool.relative_sd / math.sqrt(3))


def test_the_straggler_test_is_cochrans_c_for_equal_replicates():
    # Four lots of triplicates: Cochran's C = s²max / Σs² against 0.768 (5 %, the table above).
    # Three lots with CV 1 % and one with CV c: C = c² / (c² + 3).
    critical = cochran_critical_value(4, 3, 0.05)
    c_at_limit = math.sqrt(3 * critical / (1 - critical))
    for c, kept_own in ((0.98 * c_at_limit, False), (1.02 * c_at_limit, True)):
        lots = {name: [100 - 1.0, 100.0, 100 + 1.0] for name in "ABC"}  # CV 1 %
        lots["D"] = [100 - c, 100.0, 100 + c]  # CV c %
        pool = pool_relative_repeatability(lots)
        assert pool is not None
        assert ("D" in pool.own_scatter_lots) is kept_own
        assert pool.dof == (6 if kept_own else 8)


def test_fewer_than_two_lots_leave_nothing_to_pool():
    assert pool_relative_repeatability({"A": [1.0, 1.1, 0.9]}) is None
    assert pool_relative_repeatability({"A": [1.0, 1.1, 0.9], "B": [2.0]}) is None
    assert pool_relative_repeatability({"A": [1.0, 1.1, 0.9], "B": [1.0, 9.0, 1.0]}) is None  # B a straggler


def _plate(scatter_pct_by_lot: dict[str, float]):
    """Triplicates around 5 mg/mL whose CV is exactly the given one (mean ± CV)."""
    return {lot: replicate_measurement("protein", "mg/mL", 5.0 * (1 + np.array([-1.0, 0.0, 1.0]) * cv / 100), 10.0,
                                       f"lot {lot} protein")
            for lot, cv in scatter_pct_by_lot.items()}


def test_a_plates_lots_take_the_pooled_se_and_a_straggler_keeps_its_own():
    plate = _plate({"L1": 2.0, "L2": 1.5, "L3": 2.5, "L4": 2.0})
    plate["L5"] = replicate_measurement("protein", "mg/mL", np.array([4.5, 5.0, 5.4]), 10.0, "lot L5 protein")
    pooled = with_plate_scatter(plate, ReplicateScatter.POOLED_PER_PLATE)
    note = pooled["L1"].detail["repeatability"]
    assert pooled["L1"].dof == 8 and note["lots"] == ["L1", "L2", "L3", "L4"]
    assert pooled["L1"].se == pytest.approx(pooled["L1"].value * note["pooled_cv_pct"] / 100 / math.sqrt(3))
    low, high = pooled["L1"].ci95
    assert (high - low) / 2 == pytest.approx(2.306 * pooled["L1"].se, rel=1e-3)  # t(0.975, 8), statistical tables
    assert pooled["L5"].se == plate["L5"].se and pooled["L5"].dof == 2
    assert "Cochran" in pooled["L5"].detail["repeatability"]["own"]


def test_a_lot_over_the_cv_limit_stays_invalid_and_out_of_the_pool():
    plate = _plate({"L1": 2.0, "L2": 2.0})
    plate["L3"] = replicate_measurement("protein", "mg/mL", np.array([4.0, 5.0, 6.0]), 10.0, "lot L3 protein")
    pooled = with_plate_scatter(plate, ReplicateScatter.POOLED_PER_PLATE)
    assert not pooled["L3"].valid and pooled["L3"] == plate["L3"]
    assert pooled["L1"].detail["repeatability"]["lots"] == ["L1", "L2"]


def test_a_method_that_keeps_each_lots_own_scatter_is_obeyed():
    plate = _plate({"L1": 2.0, "L2": 2.0, "L3": 2.0})
    assert with_plate_scatter(plate, ReplicateScatter.PER_LOT) == plate
