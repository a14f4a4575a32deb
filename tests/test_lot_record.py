"""The lot record's rules: which result is reportable, pending and overdue (pure functions).

The rules for out-of-specification results follow FDA, "Investigating Out-of-Specification (OOS)
Test Results for Pharmaceutical Production" (2006), from memory: an OOS result is not replaced by
a passing retest unless an investigation finds an assignable laboratory cause and invalidates it
("testing into compliance" is not allowed), and an OOS result and a retest are not averaged. That
an invalid run (failed system suitability) yields no result and is repeated is common practice.
"""

from pipeline.controlled.specs import Attribute
from pipeline.release.lot_record import (
    Investigation,
    LotHistory,
    LotResult,
    apply_record,
    awaited,
    choose,
)
from pipeline.release.pending import record_disposition
from pipeline.release.records import AttributeVerdict
from pipeline.vocabulary import (
    Disposition,
    HoldCategory,
    InvestigationOutcome,
    ResultStatus,
    Verdict,
)

SA = Attribute(code="specific_activity", title="Specific activity", source="specific_activity", unit="U/mg",
               digits=0, minimum=150, maximum=260)
MICRO = Attribute(code="coliforms", title="Total coliforms", source="lims", unit="CFU/g", digits=0, maximum=30,
                  test_code="COLI", turnaround_days=5)


def _result(value, verdict, *, status=ResultStatus.VALID, result_id=None, day="2026-11-24"):
    return LotResult("specific_activity", status, verdict, value, None if value is None else f"{value:.0f}", "U/mg",
                     None, day, f"plate P-{day}", "LIP-PNPB v2.0", {f"kinread-{day}.csv": "a" * 64},
                     result_id=result_id)


def _tonight(value, verdict):
    return AttributeVerdict("specific_activity", "Specific activity", "U/mg", value,
                            None if value is None else f"{value:.0f}", None, "150 – 260", verdict)


def _investigation(result_id, outcome):
    return Investigation("specific_activity", result_id, outcome, "INV-1", "pipette out of calibration",
                         "retest on a fresh plate", "A. Person", "2026-11-26T08:00:00+00:00")


def test_an_invalid_result_is_superseded_by_the_next_valid_one():
    results = (_result(None, Verdict.INVALID, status=ResultStatus.INVALID, result_id=1), _result(210.0, Verdict.PASS))
    verdict, record, changes, oos = choose(SA, results, (), _tonight(210.0, Verdict.PASS))
    assert verdict.verdict == Verdict.PASS and verdict.value == 210.0 and oos is None
    assert [r.status for r in record.results] == [ResultStatus.SUPERSEDED, ResultStatus.VALID]
    assert record.reportable_index == 1
    assert [(c.result_id, c.status) for c in changes] == [(1, ResultStatus.SUPERSEDED)]


def test_an_invalid_rerun_does_not_replace_an_earlier_valid_result():
    results = (_result(210.0, Verdict.PASS, result_id=1),
               _result(None, Verdict.INVALID, status=ResultStatus.INVALID, day="2026-11-25"))
    verdict, record, changes, _ = choose(SA, results, (), _tonight(None, Verdict.INVALID))
    assert verdict.verdict == Verdict.PASS and verdict.value == 210.0 and record.reportable_index == 0
    assert changes == ()


def test_an_oos_result_is_not_replaced_by_a_passing_retest_on_its_own():
    results = (_result(120.0, Verdict.FAIL, result_id=1), _result(210.0, Verdict.PASS, day="2026-11-25"))
    verdict, record, _, oos = choose(SA, results, (), _tonight(210.0, Verdict.PASS))
    assert oos == "open" and verdict.verdict == Verdict.FAIL and verdict.value == 120.0
    assert record.reportable_index == 0
    assert any("stands until an authorised person" in r for r in verdict.reasons)
    # Not averaged: the reportable value is the recorded OOS value, not (120 + 210) / 2 = 165 (in spec).
    assert verdict.value != 165.0


def test_an_invalidated_oos_result_lets_the_retest_count():
    results = (_result(120.0, Verdict.FAIL, result_id=1), _result(210.0, Verdict.PASS, day="2026-11-25"))
    investigations = (_investigation(1, InvestigationOutcome.RESULT_INVALIDATED),)
    verdict, record, changes, oos = choose(SA, results, investigations, _tonight(210.0, Verdict.PASS))
    assert oos is None and verdict.verdict == Verdict.PASS and verdict.value == 210.0
    assert record.results[0].status == ResultStatus.INVALIDATED and record.results[0].reference == "INV-1"
    assert [(c.result_id, c.status) for c in changes] == [(1, ResultStatus.INVALIDATED)]


def test_an_invalidated_result_without_a_retest_leaves_the_test_awaited():
    stored = (_result(120.0, Verdict.FAIL, status=ResultStatus.INVALIDATED, result_id=1),)
    verdict, _, changes, oos = choose(SA, stored, (_investigation(1, InvestigationOutcome.RESULT_INVALIDATED),), None)
    assert verdict.verdict == Verdict.MISSING and oos is None and changes == ()
    assert "retest is awaited" in verdict.reasons[0]


def test_a_confirmed_oos_result_stands_after_a_passing_retest():
    results = (_result(120.0, Verdict.FAIL, result_id=1), _result(210.0, Verdict.PASS, day="2026-11-25"))
    verdict, _, _, oos = choose(SA, results, (_investigation(1, InvestigationOutcome.CONFIRMED_OOS),), None)
    assert oos == "confirmed" and verdict.verdict == Verdict.FAIL and verdict.value == 120.0


def test_the_latest_valid_result_is_reportable_when_none_is_oos():
    results = (_result(200.0, Verdict.PASS, result_id=1), _result(230.0, Verdict.PASS, day="2026-11-25"))
    verdict, record, _, _ = choose(SA, results, (), _tonight(230.0, Verdict.PASS))
    assert verdict.value == 230.0 and record.reportable_index == 1


def test_due_date_boundaries_the_due_day_itself_is_pending_the_day_after_overdue():
    # manufactured 2026-11-22 + 5 days → due 2026-11-27 (simulation of the rule's own arithmetic)
    on_the_day = awaited(MICRO, "2026-11-22", "2026-11-27")
    day_after = awaited(MICRO, "2026-11-22", "2026-11-28")
    assert on_the_day.due_on == "2026-11-27" and not on_the_day.overdue
    assert day_after.overdue
    no_turnaround = awaited(SA, "2026-11-22", "2030-01-01")
    assert no_turnaround.due_on is None and not no_turnaround.overdue


class _Spec:
    attributes = (SA, MICRO)


class _Evaluation:
    def __init__(self, verdicts):
        self.verdicts = verdicts
        self.incomplete = ()


def _lot(as_of, micro_result=None):
    micro = AttributeVerdict("coliforms", "Total coliforms", "CFU/g", None, None, None, "≤ 30", Verdict.MISSING,
                             ("Total coliforms (LIMS test COLI): no result received",))
    if micro_result is not None:
        micro = AttributeVerdict("coliforms", "Total coliforms", "CFU/g", micro_result, str(micro_result), None,
                                 "≤ 30", Verdict.PASS)
    tonight = (_tonight(210.0, Verdict.PASS), micro)
    new = {"specific_activity": _result(210.0, Verdict.PASS)}
    if micro_result is not None:
        new["coliforms"] = LotResult("coliforms", ResultStatus.VALID, Verdict.PASS, micro_result, str(micro_result),
                                     "CFU/g", None, as_of, "LIMS test COLI", "LIMS test COLI", {})
    verdicts, view = apply_record(_Spec, tonight, new, LotHistory(), "2026-11-22", as_of)
    return record_disposition(_Evaluation(verdicts), (), view)


def test_a_lot_awaiting_only_a_result_within_its_turnaround_is_pending_then_overdue_then_released():
    state, categories, reasons = _lot("2026-11-24")
    assert state == Disposition.PENDING and categories == ()
    assert reasons == ("awaiting Total coliforms (expected by 2026-11-27)",)
    state, categories, reasons = _lot("2026-11-28")
    assert state == Disposition.HELD and categories == (HoldCategory.OVERDUE,)
    assert reasons == ("Total coliforms: no result; it was due by 2026-11-27, overdue since 2026-11-28",)
    state, categories, _ = _lot("2026-11-28", micro_result=3.0)
    assert state == Disposition.RELEASED and categories == ()


def test_dates_are_calendar_days():
    # 2028 is a leap year: 2028-02-26 + 5 days = 2028-03-02 (calendar arithmetic, common practice)
    assert awaited(MICRO, "2028-02-26", "2028-03-02").due_on == "2028-03-02"
