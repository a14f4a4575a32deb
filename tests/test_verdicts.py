"""Rounding, verdicts and disposition (docs/assay-rules.md, "Verdicts and disposition")."""

import json

import pytest

from pipeline.controlled.specs import Attribute
from pipeline.release.records import TrendFinding
from pipeline.release.verdicts import disposition, judge_lims, judge_measurement, round_half_up
from pipeline.science.measurement import Measurement
from pipeline.vocabulary import Disposition, HoldCategory, NelsonRule, TrendStatus, Verdict

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
    (149.5, Verdict.PASS),   # rounds to 150, meets ≥ 150 (common practice: compare after rounding)
    (149.49, Verdict.FAIL),  # rounds to 149
    (260.4, Verdict.PASS),   # rounds to 260
    (260.5, Verdict.FAIL),   # rounds to 261
])
def test_numeric_limits_are_judged_after_rounding(value, verdict):
    result = judge_measurement(MIN_150, Measurement("specific_activity", "U/mg", value, se=1.0), "LIP-PNPB")
    assert result.verdict == verdict
    if verdict == Verdict.FAIL:
        assert "limit 150 – 260" in result.reasons[0]


def test_invalid_measurement_is_never_out_of_specification():
    bad = Measurement("specific_activity", "U/mg", None, valid=False, reasons=("reference recovery 82 %",))
    result = judge_measurement(MIN_150, bad, "LIP-PNPB")
    assert result.verdict == Verdict.INVALID
    state, categories, reasons = disposition([result], [])
    assert categories == (HoldCategory.INVALID_ASSAY,)
    assert reasons == ("Specific activity: invalid assay: reference recovery 82 %",)


def test_lims_results_qualified_and_qualitative():
    assert judge_lims(LEAD, "<0.5", "mg/kg").verdict == Verdict.PASS
    assert judge_lims(LEAD, "5.04", "mg/kg").verdict == Verdict.PASS   # 5.0 after rounding
    assert judge_lims(LEAD, "5.05", "mg/kg").verdict == Verdict.FAIL   # 5.1 after rounding
    assert judge_lims(LEAD, "1.0", "µg/g").verdict == Verdict.INVALID  # unit does not match the specification
    assert judge_lims(SALM, "absent", "per 25 g").verdict == Verdict.PASS
    assert judge_lims(SALM, "present", "per 25 g").verdict == Verdict.FAIL
    assert judge_lims(SALM, None, None).verdict == Verdict.MISSING


def test_disposition_orders_hold_categories_and_keeps_every_reason():
    verdicts = [judge_lims(LEAD, "7.0", "mg/kg"), judge_lims(SALM, None, None)]
    trend = [TrendFinding("activity", TrendStatus.OUT_OF_TREND, signals=("rule 1 at lot X",))]
    state, categories, reasons = disposition(verdicts, trend)
    assert state == Disposition.HELD
    assert categories == (HoldCategory.OUT_OF_SPECIFICATION, HoldCategory.INCOMPLETE, HoldCategory.OUT_OF_TREND)
    assert len(reasons) == 3


def test_released_only_when_everything_passes():
    state, categories, reasons = disposition([judge_lims(LEAD, "<0.5", "mg/kg")],
                                             [TrendFinding("activity", TrendStatus.IN_TREND)])
    assert (state, categories, reasons) == (Disposition.RELEASED, (), ())


def test_the_words_stored_and_printed_are_unchanged():
    # The store's and the documents' words (tests/golden/demo): a member is its word in JSON and text.
    words = [Disposition.HELD, HoldCategory.OUT_OF_TREND, Verdict.REPORTED, TrendStatus.NOT_YET_ESTABLISHED]
    assert json.dumps(words) == '["held", "out of trend", "reported", "not yet established"]'
    assert f"held: {', '.join(HoldCategory)}" == ("held: out of specification, invalid assay, incomplete, "
                                                  "out of trend, review required, overdue")
    assert (json.dumps(NelsonRule.NINE_ON_ONE_SIDE), f"rule {NelsonRule(2)}") == ("2", "rule 2")


def test_hold_categories_come_in_reading_order():
    found = ["review required", HoldCategory.OUT_OF_TREND, "out of specification", "not a category"]
    assert HoldCategory.in_reading_order(found) == (HoldCategory.OUT_OF_SPECIFICATION, HoldCategory.OUT_OF_TREND,
                                                    HoldCategory.REVIEW_REQUIRED)
