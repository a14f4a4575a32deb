"""Rounding, verdicts and disposition (docs/assay-rules.md, "Verdicts and disposition")."""

import pytest

from pipeline.controlled.specs import Attribute
from pipeline.release.records import TrendFinding
from pipeline.release.verdicts import disposition, judge_lims, judge_measurement, round_half_up
from pipeline.science.measurement import Measurement
from pipeline.vocabulary import FAIL, INVALID, MISSING, PASS

MIN_150 = Attribute(code="specific_activity", title="Specific activity", source="specific_activity",
                    unit="U/mg", digits=0, minimum=150.0, maximum=260.0)
LEAD = Attribute(code="lead", title="Lead", source="lims", test_code="PB", unit="mg/kg", digits=1, maximum=5.0)
SALM = Attribute(code="salmonella", title="Salmonella", source="lims", test_code="SALM", unit="per 25 g",
                 digits=0, expect="absent")


@pytest.mark.parametrize(("value", "digits", "expected"), [
    # Round half away from zero to the limit's digits (pharmacopoeial general notices, common practice).
    (2.45, 1, "2.5"), (2.449, 1, "2.4"), (-2.45, 1, "-2.5"), (149.5, 0, "150"), (0.125, 2, "0.13"),
])
def test_round_half_up(value, digits, expected):
    assert str(round_half_up(value, digits)) == expected


@pytest.mark.parametrize(("value", "verdict"), [
    (149.5, PASS),   # rounds to 150, meets ≥ 150 (common practice: compare after rounding)
    (149.49, FAIL),  # rounds to 149
    (260.4, PASS),   # rounds to 260
    (260.5, FAIL),   # rounds to 261
])
def test_numeric_limits_are_judged_after_rounding(value, verdict):
    result = judge_measurement(MIN_150, Measurement("specific_activity", "U/mg", value, se=1.0), "LIP-PNPB")
    assert result.verdict == verdict
    if verdict == FAIL:
        assert "limit 150 – 260" in result.reasons[0]


def test_invalid_measurement_is_never_out_of_specification():
    bad = Measurement("specific_activity", "U/mg", None, valid=False, reasons=("reference recovery 82 %",))
    result = judge_measurement(MIN_150, bad, "LIP-PNPB")
    assert result.verdict == INVALID
    state, categories, reasons = disposition([result], [])
    assert categories == ("invalid assay",)
    assert reasons == ("Specific activity: invalid assay: reference recovery 82 %",)


def test_lims_results_qualified_and_qualitative():
    assert judge_lims(LEAD, "<0.5", "mg/kg").verdict == PASS
    assert judge_lims(LEAD, "5.04", "mg/kg").verdict == PASS   # 5.0 after rounding
    assert judge_lims(LEAD, "5.05", "mg/kg").verdict == FAIL   # 5.1 after rounding
    assert judge_lims(LEAD, "1.0", "µg/g").verdict == INVALID  # unit does not match the specification
    assert judge_lims(SALM, "absent", "per 25 g").verdict == PASS
    assert judge_lims(SALM, "present", "per 25 g").verdict == FAIL
    assert judge_lims(SALM, None, None).verdict == MISSING


def test_disposition_orders_hold_categories_and_keeps_every_reason():
    verdicts = [judge_lims(LEAD, "7.0", "mg/kg"), judge_lims(SALM, None, None)]
    trend = [TrendFinding("activity", "out of trend", signals=("rule 1 at lot X",))]
    state, categories, reasons = disposition(verdicts, trend)
    assert state == "held"
    assert categories == ("out of specification", "incomplete", "out of trend")
    assert len(reasons) == 3


def test_released_only_when_everything_passes():
    state, categories, reasons = disposition([judge_lims(LEAD, "<0.5", "mg/kg")],
                                             [TrendFinding("activity", "in trend")])
    assert (state, categories, reasons) == ("released", (), ())
