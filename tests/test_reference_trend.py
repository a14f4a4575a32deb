"""The reference standard's recovery is charted per method; a plate out of trend holds its lots.

The recoveries are SIMULATED (invented); the rule is Nelson's rule 1, one point beyond 3σ
(Nelson, J. Quality Technology 16(4), 1984); σ̂ = MR̄/d₂ with d₂ = 1.128 (ASTM MNL 7).
"""

import dataclasses
import datetime as dt

from pipeline.controlled.catalog import Catalog
from pipeline.records.controlled_files import load_catalog
from pipeline.release.decision import ChartState, decide_night
from pipeline.release.lot_evaluation import LotEvaluation
from pipeline.release.records import AttributeVerdict
from pipeline.vocabulary import Disposition, HoldCategory, Verdict

CATALOG = load_catalog()
SPEC = CATALOG.specifications["LLC-200"]
METHOD = dataclasses.replace(CATALOG.methods["LIP-PNPB"], recovery_baseline_n=8)
METHODS = {**CATALOG.methods, "LIP-PNPB": METHOD}
BASELINE = [100.2, 99.1, 100.8, 99.6, 100.4, 99.3, 100.9, 99.8]  # invented, in-window recoveries (%)


def lot(number: int, plate: str, recovery: float) -> LotEvaluation:
    day = (dt.date(2026, 1, 1) + dt.timedelta(days=number)).isoformat()
    # Every attribute passes; the lot's own charts stay out of this test (no value to chart).
    verdicts = tuple(AttributeVerdict(a.code, a.title, a.unit, None, None, None, a.limit_text,
                                      Verdict.REPORTED if a.trend else Verdict.PASS, ()) for a in SPEC.attributes)
    return LotEvaluation(lot_id=f"LLC-T-{number:03d}", product_code="LLC-200", manufactured_on=day, assay_date=day,
                         measurements={}, verdicts=verdicts, incomplete=(), kinetics=None,
                         plates=({"plate_id": plate, "kind": "activity", "method_id": "LIP-PNPB", "valid": True,
                                  "reference_recovery_pct": recovery},),
                         input_files={f"{plate}.csv": "0" * 64})


def test_a_reference_out_of_trend_holds_the_plates_lots():
    lots = [lot(i, f"AK-T-{i:02d}", r) for i, r in enumerate(BASELINE)]
    # Plate 9 recovers 106.5 %: inside the method's 90–110 % window, far beyond 3σ of the baseline.
    lots += [lot(8, "AK-T-08", 106.5), lot(9, "AK-T-08", 106.5), lot(10, "AK-T-10", 100.1)]
    charts: dict[tuple[str, str], ChartState] = {}
    night = decide_night(lots, Catalog({"LLC-200": SPEC}, METHODS), charts, "test")
    decisions = night.lots
    assert all(d.decision.disposition == Disposition.READY_FOR_RELEASE for d in decisions[:8])  # release mode approval
    for held in decisions[8:10]:
        assert held.decision.hold_categories == (HoldCategory.OUT_OF_TREND,)
        assert "Reference standard recovery (LIP-PNPB): Nelson rule 1" in held.decision.reasons[0]
        assert "at plate AK-T-08" in held.decision.reasons[0]
        assert held.charts and held.charts[0]["attribute"] == "reference_recovery"
    assert decisions[10].decision.disposition == Disposition.READY_FOR_RELEASE
    chart = night.charts[("LIP-PNPB", "reference_recovery")]
    assert ("LIP-PNPB", "reference_recovery") in night.newly_frozen and charts == {}
    assert chart.limits is not None and chart.limits.baseline_lots == tuple(f"AK-T-{i:02d}" for i in range(8))
    assert "AK-T-08" not in chart.lots and chart.lots[-1] == "AK-T-10"
    # the plate's point is stored once, with the first lot recorded from it
    assert [p[2] for d in decisions for p in d.extra_points] == [*(f"AK-T-{i:02d}" for i in range(8)), "AK-T-10"]
