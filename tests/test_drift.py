"""A slowly drifting process is held out of trend before it produces an out-of-specification lot.

The product history here is SIMULATED (seeded, invented numbers): 20 stable lots build the
baseline, then the specific activity drifts by a small step per lot, well inside the
specification for a long time. Every lot goes through ``pipeline.decide.decide_night`` as the
nightly job would, one after another, so a lot released earlier is history for the next one.
That the trend rules catch a drift before the limits are crossed is the purpose of trending
(run rules: Nelson, J. Quality Technology 16(4), 1984; common practice).
"""

from __future__ import annotations

import datetime as dt

import numpy as np
import pytest

from pipeline.controlled.catalog import Catalog
from pipeline.controlled.specs import parse_specification
from pipeline.release.decision import ChartState, decide_night
from pipeline.release.lot_evaluation import LotEvaluation
from pipeline.release.records import AttributeVerdict
from pipeline.release.verdicts import judge_numeric
from pipeline.vocabulary import Disposition, HoldCategory, TrendStatus, Verdict

SPEC = parse_specification({
    "kind": "product-specification", "product_code": "SIM-1", "product_name": "Simulated lipase",
    "version": "1", "effective_from": "2026-01-01", "approved_by": "test", "molecular_weight_g_per_mol": 33000,
    "activity_method": "SIM-ACT", "protein_method": "SIM-PROT",
    "trend_defaults": {"baseline_n": 20, "rules": [1, 2, 3, 4]},
    "attributes": [{"code": "specific_activity", "title": "Specific activity", "source": "specific_activity",
                    "unit": "U/mg", "min": 150, "max": 260, "digits": 0, "trend": True}],
}, "simulated specification", "0" * 64)
ATTRIBUTE = SPEC.attribute("specific_activity")

BASELINE_LOTS = 20
LOTS = 160
MEAN_U_PER_MG = 205.0
NOISE_U_PER_MG = 5.0  # lot-to-lot SD, invented
STEP_U_PER_MG = 0.5  # drift per lot after the baseline: a tenth of the lot-to-lot SD


def simulated_history(direction: int, seed: int = 20261201) -> list[float]:
    """Values of LOTS simulated lots: stable for the baseline, then drifting by ±STEP per lot."""
    rng = np.random.default_rng(seed)
    lot = np.arange(LOTS)
    drift = direction * STEP_U_PER_MG * np.clip(lot - BASELINE_LOTS + 1, 0, None)
    return [float(v) for v in MEAN_U_PER_MG + drift + rng.normal(0.0, NOISE_U_PER_MG, LOTS)]


def evaluation(number: int, value: float) -> LotEvaluation:
    verdict, reported, reason = judge_numeric(ATTRIBUTE, value)
    made = dt.date(2026, 1, 1) + dt.timedelta(days=number)
    return LotEvaluation(
        lot_id=f"SIM-{number:03d}", product_code="SIM-1", manufactured_on=made.isoformat(),
        assay_date=made.isoformat(), measurements={},
        verdicts=(AttributeVerdict(ATTRIBUTE.code, ATTRIBUTE.title, ATTRIBUTE.unit, value, reported, 1.0,
                                   ATTRIBUTE.limit_text, verdict, (reason,) if reason else ()),),
        incomplete=(), kinetics=None, plates=(), input_files={f"sim-{number:03d}.csv": "0" * 64})


@pytest.mark.parametrize(("direction", "limit"), [(-1, "below"), (+1, "above")])
def test_drift_is_held_out_of_trend_before_the_first_oos_lot(direction, limit):
    values = simulated_history(direction)
    charts: dict[tuple[str, str], ChartState] = {}
    night = decide_night([evaluation(i, v) for i, v in enumerate(values)], Catalog({"SIM-1": SPEC}, {}), charts,
                         "test")
    decisions = night.lots
    categories = [d.decision.hold_categories for d in decisions]
    first_oot = next(i for i, c in enumerate(categories) if HoldCategory.OUT_OF_TREND in c)
    first_oos = next(i for i, c in enumerate(categories) if HoldCategory.OUT_OF_SPECIFICATION in c)
    # the baseline lots are released while the chart is "not yet established"
    assert all(d.decision.disposition == Disposition.READY_FOR_RELEASE for d in decisions[:BASELINE_LOTS])  # release mode approval
    assert all(d.trend[0].status == TrendStatus.NOT_YET_ESTABLISHED for d in decisions[:BASELINE_LOTS])
    frozen = night.charts[("SIM-1", "specific_activity")].limits
    assert night.newly_frozen == {("SIM-1", "specific_activity"): frozen} and charts == {}  # the given charts stay as given
    assert frozen is not None and frozen.baseline_lots[-1] == f"SIM-{BASELINE_LOTS - 1:03d}"
    # the first hold for trend comes first, on a lot still inside its specification, and well
    # before the drift reaches the limit
    assert BASELINE_LOTS <= first_oot < first_oos
    held = decisions[first_oot]
    assert held.decision.hold_categories == (HoldCategory.OUT_OF_TREND,)
    assert held.evaluation.verdicts[0].verdict == Verdict.PASS
    assert first_oos - first_oot >= 30
    assert first_oot - BASELINE_LOTS < 40  # caught while the mean has moved by less than 4 SD
    assert all(HoldCategory.OUT_OF_SPECIFICATION not in c for c in categories[:first_oos])
    assert f"is {limit} the limit" in decisions[first_oos].decision.reasons[0]
    reason = held.decision.reasons[0]
    assert "Nelson rule" in reason and held.evaluation.lot_id in reason
    # the simulated drift has moved the mean by then, the frozen centre has not
    assert frozen.center == pytest.approx(np.mean(values[:BASELINE_LOTS]))
