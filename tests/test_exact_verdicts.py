"""Exact verdicts: limits no finer than results, qualified LIMS results, rounding rules, scientific attributes.

Sources of the rules checked here:
* Round the result to the digits of the limit, then compare: USP General Notices 7.20 "Rounding
  Rules" (from memory; halves round up) — the default ``rounding: half-up``.
* ASTM E29, "Using Significant Digits in Test Data to Determine Conformance with
  Specifications", rounding method (from memory): a 5 followed by nothing (or zeros) rounds to
  the even digit — the option ``rounding: half-even``.
* A result "< b" means the true value is below b; it meets a maximum only when every value below
  b rounds inside the limit, and proves a failure only when every such value rounds outside
  (the meaning of a censored result; common practice in reporting below a limit of quantitation).
Each expected verdict below is worked by hand from those rules.
"""

from __future__ import annotations

from decimal import Decimal

import pytest

from pipeline.controlled.specs import Attribute, parse_specification
from pipeline.errors import SpecificationError
from pipeline.release.reported_values import read_entered, round_reported, show_rounded
from pipeline.release.verdicts import disposition, judge_lims, judge_measurement, judge_numeric
from pipeline.science.measurement import Measurement
from pipeline.vocabulary import Disposition, HoldCategory, ResultQualifier, Rounding, Verdict

LEAD = Attribute(code="lead", title="Lead", source="lims", test_code="PB", unit="mg/kg", digits=1, maximum=5.0)
COLI = Attribute(code="coliforms", title="Total coliforms", source="lims", test_code="COLI", unit="CFU/g",
                 digits=0, maximum=30.0)
PH = Attribute(code="ph", title="pH", source="lims", test_code="PH", unit="", digits=1, minimum=6.5, maximum=7.5)
DRY = Attribute(code="dry_matter", title="Dry matter", source="lims", test_code="DM", unit="%", digits=1,
                minimum=92.0)
PH_E29 = Attribute(code="ph", title="pH", source="lims", test_code="PH", unit="", digits=1, minimum=6.5,
                   maximum=7.5, rounding=Rounding.HALF_EVEN)
EFFICIENCY = Attribute(code="kcat_over_km", title="Catalytic efficiency", source="kcat_over_km", unit="1/(M·s)",
                       digits=0, maximum=12300.0, scientific=True)
SALM = Attribute(code="salmonella", title="Salmonella", source="lims", test_code="SALM", unit="per 25 g",
                 digits=0, expect="absent")


# ------------------------------------------------------------------------------ reading as entered
@pytest.mark.parametrize(("text", "number", "qualifier", "word", "shown"), [
    ("7.05", Decimal("7.05"), None, None, "7.05"),
    ("6.0E0", Decimal("6.0"), None, None, "6.0E0"),  # E notation: 6.0 × 10⁰
    ("1.5e-1", Decimal("0.15"), None, None, "1.5e-1"),
    ("<0.54", Decimal("0.54"), ResultQualifier.LESS_THAN, None, "< 0.54"),  # never shown as '< 0.5'
    ("< 50", Decimal("50"), ResultQualifier.LESS_THAN, None, "< 50"),
    ("> 300", Decimal("300"), ResultQualifier.GREATER_THAN, None, "> 300"),
    ("not detected", None, ResultQualifier.NOT_DETECTED, None, "not detected"),
    ("Not Detected", None, ResultQualifier.NOT_DETECTED, None, "Not Detected"),
    ("too numerous to count", None, ResultQualifier.TOO_NUMEROUS, None, "too numerous to count"),
    ("TNTC", None, ResultQualifier.TOO_NUMEROUS, None, "TNTC"),
    ("absent", None, None, "absent", "absent"),
])
def test_results_are_read_as_entered(text, number, qualifier, word, shown):
    entered = read_entered(text)
    assert (entered.number, entered.qualifier, entered.word, entered.shown) == (number, qualifier, word, shown)
    if number is not None:
        assert entered.number == number and str(entered.number) == str(Decimal(text.lstrip("<> ")))


@pytest.mark.parametrize("text", ["1,5", "nan", "inf", "<", "< abc", "5 mg", "0x10", "about 5"])
def test_unreadable_results_say_what_is_allowed(text):
    with pytest.raises(ValueError, match="is not a LIMS result|not a finite number"):
        read_entered(text)


# ------------------------------------------------------------------------------ rounding
@pytest.mark.parametrize(("value", "digits", "rounding", "expected"), [
    # half-up (USP General Notices 7.20, from memory): 5 rounds away from zero
    ("2.45", 1, Rounding.HALF_UP, "2.5"), ("-2.45", 1, Rounding.HALF_UP, "-2.5"), ("6.45", 1, Rounding.HALF_UP, "6.5"),
    # half-even (ASTM E29, from memory): 5 followed by nothing rounds to the even digit
    ("2.45", 1, Rounding.HALF_EVEN, "2.4"), ("2.55", 1, Rounding.HALF_EVEN, "2.6"),
    ("6.45", 1, Rounding.HALF_EVEN, "6.4"), ("6.4501", 1, Rounding.HALF_EVEN, "6.5"),  # more than half: up
    ("0.125", 2, Rounding.HALF_EVEN, "0.12"), ("0.135", 2, Rounding.HALF_EVEN, "0.14"),
    ("150.5", 0, Rounding.HALF_EVEN, "150"), ("151.5", 0, Rounding.HALF_EVEN, "152"),
    # no negative zero (a reported "−0.0" is not a number anyone writes)
    ("-0.04", 1, Rounding.HALF_UP, "0.0"), ("-0.05", 1, Rounding.HALF_EVEN, "0.0"), ("-0.0", 2, Rounding.HALF_UP, "0.00"),
])
def test_rounding_rules(value, digits, rounding, expected):
    rounded = round_reported(Decimal(value), digits, rounding)
    assert show_rounded(rounded) == expected


def test_float_results_round_as_their_decimal_text():
    # 2.45 is 2.4500000000000001776… in binary; the decimal the float stands for is 2.45 (repr).
    assert show_rounded(round_reported(2.45, 1)) == "2.5"
    assert show_rounded(round_reported(2.45, 1, Rounding.HALF_EVEN)) == "2.4"
    assert format(round(2.675, 2)) == "2.67"  # Python's binary rounding, which is NOT what is used
    assert show_rounded(round_reported(2.675, 2)) == "2.68"


# ------------------------------------------------------------------------------ limits no finer than results
def _spec(attribute: dict, rounding: str | None = None) -> dict:
    raw = {"kind": "product-specification", "product_code": "TST-1", "product_name": "Test enzyme",
           "version": "1", "effective_from": "2026-01-01", "approved_by": "QA", "molecular_weight_g_per_mol": 30000,
           "activity_method": "M1", "protein_method": "M2",
           "attributes": [{"code": "ph", "source": "lims", "test_code": "PH", **attribute}]}
    if rounding is not None:
        raw["rounding"] = rounding
    return raw


@pytest.mark.parametrize(("attribute", "match"), [
    ({"min": 6.45, "max": 7.5, "digits": 1}, r"spec\.yaml, attribute 'ph': the lower limit 6\.45 has 2 decimals, "
                                             r"but results are reported to 1"),
    ({"max": 5.05, "digits": 1}, r"attribute 'ph': the upper limit 5\.05 has 2 decimals"),
    ({"max": 30.5, "digits": 0}, r"the upper limit 30\.5 has 1 decimal, but results are reported to 0"),
    ({"max": 12345, "digits": 0, "scientific": True}, r"the upper limit 12345 has 5 significant figures, "
                                                      r"but results are reported to 3"),
])
def test_a_limit_finer_than_the_reported_digits_is_refused(attribute, match):
    with pytest.raises(SpecificationError, match=match):
        parse_specification(_spec(attribute), "spec.yaml", "0" * 64)


@pytest.mark.parametrize("attribute", [
    {"min": 6.5, "max": 7.5, "digits": 1}, {"min": 4.00, "max": 8.00, "digits": 2}, {"max": 5, "digits": 1},
    {"max": 12300, "digits": 0, "scientific": True}, {"max": 1.25e-3, "digits": 5},
])
def test_limits_at_or_coarser_than_the_digits_are_accepted(attribute):
    spec = parse_specification(_spec(attribute), "spec.yaml", "0" * 64)
    assert spec.attribute("ph").rounding == Rounding.HALF_UP


def test_rounding_is_chosen_per_specification():
    spec = parse_specification(_spec({"min": 6.5, "max": 7.5, "digits": 1}, "half-even"), "spec.yaml", "0" * 64)
    assert spec.attribute("ph").rounding == Rounding.HALF_EVEN
    with pytest.raises(SpecificationError, match=r"spec\.yaml.*rounding"):
        parse_specification(_spec({"min": 6.5, "max": 7.5, "digits": 1}, "bankers"), "spec.yaml", "0" * 64)


# ------------------------------------------------------------------------------ verdicts of every edge case
@pytest.mark.parametrize(("attribute", "text", "verdict", "reported"), [
    # plain numbers, rounded to the limit's digits first
    (PH, "6.46", Verdict.PASS, "6.5"),                 # 6.5 meets 6.5 – 7.5
    (PH, "6.44", Verdict.FAIL, "6.4"),
    (PH, "6.45", Verdict.PASS, "6.5"),                 # half-up: 6.45 → 6.5
    (PH_E29, "6.45", Verdict.FAIL, "6.4"),             # ASTM E29: 6.45 → 6.4, below 6.5
    (PH_E29, "7.55", Verdict.FAIL, "7.6"),             # ASTM E29: 7.55 → 7.6 (6 is even)
    (PH_E29, "7.45", Verdict.PASS, "7.4"),
    (LEAD, "5.04", Verdict.PASS, "5.0"),
    (LEAD, "5.05", Verdict.FAIL, "5.1"),
    (LEAD, "6.0E0", Verdict.FAIL, "6.0"),              # E notation read, not a rejected file
    (LEAD, "4.9E0", Verdict.PASS, "4.9"),
    (LEAD, "-0.01", Verdict.PASS, "0.0"),              # never "-0.0"
    # '<' against a maximum: passes when the largest value it allows rounds inside
    (LEAD, "<0.5", Verdict.PASS, "< 0.5"),
    (LEAD, "< 5.05", Verdict.PASS, "< 5.05"),          # every value below 5.05 rounds to ≤ 5.0
    (LEAD, "< 5.0", Verdict.PASS, "< 5.0"),
    (LEAD, "< 0.54", Verdict.PASS, "< 0.54"),          # shown as entered, not "< 0.5"
    (LEAD, "< 5.06", Verdict.UNDECIDED, "< 5.06"),     # 5.055 < 5.06 rounds to 5.1: could be out, not proven
    (COLI, "< 50", Verdict.UNDECIDED, "< 50"),         # "< 50 CFU/g" against ≤ 30: not a proven failure
    (COLI, "< 30", Verdict.PASS, "< 30"),
    (COLI, "< 30.5", Verdict.PASS, "< 30.5"),          # values below 30.5 round to ≤ 30 (half-up)
    # '<' against a minimum: a proven failure when even its largest value rounds below
    (DRY, "< 91.9", Verdict.FAIL, "< 91.9"),
    (DRY, "< 92.05", Verdict.UNDECIDED, "< 92.05"),
    (PH, "< 6.0", Verdict.FAIL, "< 6.0"),
    (PH, "< 7.0", Verdict.UNDECIDED, "< 7.0"),
    # '>' against a maximum: a proven failure when its smallest value rounds above
    (COLI, "> 300", Verdict.FAIL, "> 300"),
    (COLI, "> 30", Verdict.UNDECIDED, "> 30"),         # 30.2 > 30 rounds to 30: not proven
    (COLI, "> 30.5", Verdict.FAIL, "> 30.5"),          # every value above 30.5 rounds to ≥ 31 (half-up)
    (DRY, "> 92.0", Verdict.PASS, "> 92.0"),           # against a minimum only
    (DRY, "> 91.9", Verdict.UNDECIDED, "> 91.9"),
    # no number at all
    (COLI, "not detected", Verdict.UNDECIDED, "not detected"),
    (COLI, "too numerous to count", Verdict.UNDECIDED, "too numerous to count"),
    # "not detected in 25 g" is a pathogen test's "absent in 25 g" (common practice; the unit matched)
    (SALM, "not detected", Verdict.PASS, "not detected"),
    (SALM, "ND", Verdict.PASS, "ND"),                 # shown as entered
    (SALM, "too numerous to count", Verdict.FAIL, "too numerous to count"),  # growth is presence
    (SALM, "< 1", Verdict.UNDECIDED, "< 1"),           # a bound where the test's word is expected
    (SALM, "0", Verdict.FAIL, "0"),                    # a plain number where a word is expected
    (SALM, "Absent", Verdict.PASS, "absent"),
    (SALM, "present", Verdict.FAIL, "present"),
])
def test_verdict_of_every_edge_case(attribute, text, verdict, reported):
    result = judge_lims(attribute, text, attribute.unit or None)
    assert (result.verdict, result.reported) == (verdict, reported)
    assert "-0" not in (result.reported or "")
    if verdict == Verdict.PASS:
        assert result.reasons == ()
    else:
        assert len(result.reasons) == 1 and attribute.title in result.reasons[0]
    if verdict == Verdict.UNDECIDED:
        assert "held for review (not out of specification)" in result.reasons[0]


def test_an_undecided_result_holds_the_lot_but_is_not_out_of_specification():
    result = judge_lims(COLI, "< 50", "CFU/g")
    assert result.reasons == ("Total coliforms: < 50 CFU/g cannot be judged against the limit ≤ 30 CFU/g: values "
                              "below 50 include some that meet the limit and some that do not; held for review "
                              "(not out of specification)",)
    state, categories, reasons = disposition([result], [])
    assert state == Disposition.HELD
    assert categories == (HoldCategory.UNDECIDED_RESULT,)
    assert HoldCategory.OUT_OF_SPECIFICATION not in categories and reasons == result.reasons


def test_a_rounded_limit_is_never_shown_beside_an_unrounded_comparison():
    # The defect: "pH 6.5 is below the limit 6.5 – 7.5" (6.46 shown as 6.5, compared as 6.46).
    result = judge_lims(PH, "6.44", "")
    assert result.reasons == ("pH 6.4 is below the limit 6.5 – 7.5",)
    assert judge_lims(PH, "6.46", "").verdict == Verdict.PASS


@pytest.mark.parametrize(("value", "verdict", "reported"), [
    (12345.0, Verdict.PASS, "1.23e+04"),   # shown 1.23e+04 = 12300: meets ≤ 12300 as displayed
    (12349.9, Verdict.PASS, "1.23e+04"),
    (12350.0, Verdict.FAIL, "1.24e+04"),   # half-up at the third significant figure
    (9995.0, Verdict.PASS, "1.00e+04"),    # 9995 → 1.00e4 (three figures, not four)
    (123.44, Verdict.PASS, "123"),
])
def test_scientific_attributes_are_compared_as_displayed(value, verdict, reported):
    result = judge_measurement(EFFICIENCY, Measurement("kcat_over_km", "1/(M·s)", value, se=1.0), "LIP-PNPB")
    assert (result.verdict, result.reported) == (verdict, reported)
    if verdict == Verdict.FAIL:
        assert result.reasons == ("Catalytic efficiency 1.24e+04 1/(M·s) is above the limit ≤ 12300 1/(M·s)",)


def test_computed_results_round_with_the_specifications_rule():
    half_even = Attribute(code="specific_activity", title="Specific activity", source="specific_activity",
                          unit="U/mg", digits=0, minimum=150.0, rounding=Rounding.HALF_EVEN)
    assert judge_numeric(half_even, 149.5)[:2] == (Verdict.PASS, "150")          # 149.5 → 150 (0 is even)
    assert judge_numeric(half_even, 150.5)[:2] == (Verdict.PASS, "150")          # 150.5 → 150 (ASTM E29)
    assert judge_numeric(half_even, 148.5)[:2] == (Verdict.FAIL, "148")          # 148.5 → 148


# ------------------------------------------------------------------------------ the LIMS file is read, not set aside
def test_qualified_results_and_e_notation_no_longer_reject_the_lims_file():
    from pathlib import Path

    from pipeline.intake.layouts import load_layouts
    from pipeline.intake.problems import ExportRejected
    from pipeline.intake.validation import parse_export
    from pipeline.release.reported_values import RESULT_PATTERN

    layouts = load_layouts(Path(__file__).resolve().parents[1] / "schemas")
    rows = ["> 300", "not detected", "6.0E0", "<0.54", "TNTC", "too numerous to count", "absent", "7.05", "1.5e-1"]
    text = "lot_id,test_code,result,unit,tested_on,analyst\n" + "".join(
        f"LLC-2611-001,T{chr(65 + i)},{r},,2026-11-27,K. L.\n" for i, r in enumerate(rows))
    parsed = parse_export("lims-LLC-2611-001.csv", text.encode(), layouts)
    assert list(parsed.frame["result"]) == rows  # kept exactly as entered
    assert all(read_entered(r).shown for r in rows)
    # the schema's pattern is the one the verdicts read with
    check = next(c for c in layouts["lims-results"].schema.columns["result"].checks if c.name == "str_matches")
    assert check.statistics["pattern"].replace("(?:", "(") == RESULT_PATTERN.replace("(?:", "(")
    for bad in ("95,2", "nan", "5 mg", "<<5"):
        with pytest.raises(ExportRejected, match="does not have the expected form"):
            parse_export("lims-LLC-2611-001.csv",
                         ("lot_id,test_code,result,unit,tested_on,analyst\n"
                          f"LLC-2611-001,PH,\"{bad}\",,2026-11-27,K. L.\n").encode(), layouts)


# ------------------------------------------------------------------------------ hostile and extreme input
@pytest.mark.parametrize("text", ["1e999999", "-1E-500", "< 1e101"])
def test_an_absurd_number_is_an_invalid_result_not_a_crash(text):
    result = judge_lims(LEAD, text, "mg/kg")
    assert result.verdict == Verdict.INVALID
    assert result.reasons == (f"Lead (LIMS test PB): '{text}' is outside the range of a laboratory result "
                              "(10^-100 to 10^100)",)


@pytest.mark.parametrize(("value", "verdict"), [(1e300, Verdict.FAIL), (-1e300, Verdict.PASS), (1e-300, Verdict.PASS),
                                                (1.7e308, Verdict.FAIL)])
def test_extreme_computed_values_round_exactly(value, verdict):
    # A float rounds on its exact decimal text at any magnitude (no 28-digit context overflow).
    assert judge_numeric(LEAD, value)[0] == verdict
    assert judge_numeric(EFFICIENCY, abs(value))[0] in (Verdict.PASS, Verdict.FAIL)


def test_a_scientific_limit_is_shown_as_written():
    small = Attribute(code="kcat_over_km", title="Catalytic efficiency", source="kcat_over_km", unit="1/(M·s)",
                      digits=0, minimum=0.00125, scientific=True)
    assert small.limit_text == "≥ 0.00125"  # not "≥ 0" at digits 0
    assert EFFICIENCY.limit_text == "≤ 12300"
    assert PH.limit_text == "6.5 – 7.5"


def test_an_undecided_reason_without_a_unit_reads_cleanly():
    assert judge_lims(PH, "< 7.0", "").reasons == (
        "pH: < 7.0 cannot be judged against the limit 6.5 – 7.5: a value below the bound may also be below the "
        "lower limit; held for review (not out of specification)",)


def test_a_person_may_release_neither_an_undecided_nor_a_missing_result():
    # An undecided qualified result does not show the lot meets its limit, and no investigation
    # outcome can be recorded against it (it is not OOS): a certificate cannot be issued on it by a
    # person either; a retest whose range settles the limit supersedes it (tests/test_oos_release.py).
    from pipeline.release.lot_record import LotHistory
    from pipeline.release.records import RecordedResult
    from pipeline.release.release_bars import release_bars
    from pipeline.vocabulary import ReleaseBar

    def bars(verdict: str, reported: str | None) -> list[tuple[str, ReleaseBar]]:
        found = release_bars([RecordedResult("coliforms", reported, reported, "CFU/g", verdict)], LotHistory())
        return [(b.attribute, b.bar) for b in found]

    assert bars(Verdict.UNDECIDED, "< 50") == [("coliforms", ReleaseBar.UNDECIDED)]
    assert bars(Verdict.MISSING, None) == [("coliforms", ReleaseBar.NO_VALID_RESULT)]
    assert bars(Verdict.PASS, "12") == []
