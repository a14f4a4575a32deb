"""Verdicts against a specification and the lot's disposition (docs/assay-rules.md, "Verdicts and disposition"). Pure.

A result is rounded to the reported digits of its attribute (the limit is never finer: see
``pipeline.controlled.limit_precision``) with the specification's rounding (half-up by default,
half-even per ASTM E29), then compared with the limit: the compendial convention of rounding
before comparing (USP General Notices 7.20, from memory). A qualified result is judged by what
it means (``judge_numeric``): it meets the limit only when every value it allows rounds inside
the limit, fails only when every value it allows rounds outside, and is otherwise undecided.
"""

from __future__ import annotations

import math
from collections.abc import Iterable
from decimal import Decimal

from pipeline.controlled.specs import Attribute
from pipeline.release.records import AttributeVerdict, TrendFinding
from pipeline.release.reported_values import (
    EnteredResult,
    exact,
    inf_above,
    read_entered,
    round_half_up,
    round_reported,
    show_rounded,
    sup_below,
)
from pipeline.science.measurement import Measurement
from pipeline.vocabulary import Disposition, HoldCategory, ResultQualifier, TrendStatus, Verdict

__all__ = ["disposition", "is_bound", "judge_entered", "judge_lims", "judge_measurement", "judge_numeric", "round_half_up"]


def is_bound(verdict: AttributeVerdict) -> bool:
    """True for a result entered as a bound ('< 0.5', '> 300'): its number is no point for a chart.

    A qualified result is always reported as entered, qualifier first (``EnteredResult.shown``).
    """
    return isinstance(verdict.reported, str) and verdict.reported.startswith(("<", ">"))


def _words(*parts: str) -> str:
    return " ".join(part for part in parts if part)


def _limits(attribute: Attribute) -> tuple[Decimal | None, Decimal | None]:
    low = None if attribute.minimum is None else exact(attribute.minimum)
    high = None if attribute.maximum is None else exact(attribute.maximum)
    return low, high


def _undecided(attribute: Attribute, reported: str, why: str) -> tuple[Verdict, str, str]:
    judged = _words(f"{attribute.title}: {reported}", attribute.unit, "cannot be judged against the limit",
                    attribute.limit_text, attribute.unit)
    return Verdict.UNDECIDED, reported, f"{judged}: {why}; held for review (not out of specification)"


def _judge_bounded(attribute: Attribute, entered: EnteredResult) -> tuple[Verdict, str, str | None]:
    """A '<' or '>' result: pass when every value it allows rounds inside, fail when every one rounds outside."""
    assert entered.number is not None
    reported = entered.shown
    low, high = _limits(attribute)
    args = (attribute.digits, attribute.rounding, attribute.scientific)
    if entered.qualifier == ResultQualifier.LESS_THAN:
        highest = sup_below(entered.number, *args)  # the largest reported value a true value below it gives
        if low is not None and highest < low:
            return Verdict.FAIL, reported, _words(attribute.title, reported, attribute.unit, "is below the limit",
                                                  attribute.limit_text, attribute.unit)
        if low is None and high is not None and highest <= high:
            return Verdict.PASS, reported, None
        if low is not None:
            return _undecided(attribute, reported, "a value below the bound may also be below the lower limit")
        return _undecided(attribute, reported, f"values below {entered.number} include some that meet the limit "
                                               "and some that do not")
    lowest = inf_above(entered.number, *args)
    if high is not None and lowest > high:
        return Verdict.FAIL, reported, _words(attribute.title, reported, attribute.unit, "is above the limit",
                                              attribute.limit_text, attribute.unit)
    if high is None and low is not None and lowest >= low:
        return Verdict.PASS, reported, None
    if high is not None:
        return _undecided(attribute, reported, "a value above the bound may also be above the upper limit")
    return _undecided(attribute, reported, f"values above {entered.number} include some that meet the limit "
                                           "and some that do not")


def judge_entered(attribute: Attribute, entered: EnteredResult) -> tuple[Verdict, str, str | None]:
    """Compare one result (a number, a '<'/'>' bound, or a word without a number) with its limits.

    Returns (verdict, reported text, reason or None). A plain number is rounded to the attribute's
    digits and compared; a bound by its meaning (``_judge_bounded``); 'not detected' and 'too
    numerous to count' carry no number, so against a numeric limit they are undecided; against a
    presence/absence test's expected word they mean 'absent' and 'present' (common practice: a
    pathogen test reports "not detected in 25 g" for the specification's "absent in 25 g").
    """
    if entered.word is not None:
        raise ValueError(f"'{entered.text}' is a word, not a number")
    if entered.number is None:
        reported = entered.shown
        if not attribute.has_limit:
            return Verdict.REPORTED, reported, None
        if attribute.expect is not None:  # a presence/absence test (its unit, e.g. per 25 g, already matched)
            meaning = "absent" if entered.qualifier == ResultQualifier.NOT_DETECTED else "present"
            if meaning == attribute.expect:
                return Verdict.PASS, reported, None
            return Verdict.FAIL, reported, f"{attribute.title}: {reported} (specification: {attribute.expect})"
        return _undecided(attribute, reported, f"'{reported}' gives no number (the method's detection or counting "
                                               "range decides); retest with a range that settles the limit, or "
                                               "reject the lot")
    if entered.qualifier is None:
        rounded = round_reported(entered.number, attribute.digits, attribute.rounding, attribute.scientific)
        reported = show_rounded(rounded, attribute.scientific)
    else:
        reported = entered.shown
    if not attribute.has_limit:
        return Verdict.REPORTED, reported, None
    if attribute.expect is not None and entered.qualifier is not None:  # '< 1' for 'absent': not the test's answer
        return Verdict.UNDECIDED, reported, (
            f"{attribute.title}: {reported} was reported where '{attribute.expect}' is expected; the LIMS must "
            "report the test's own answer (absent or present): correct the entry or retest; held for review "
            "(not out of specification)")
    if attribute.expect is not None:
        return Verdict.FAIL, reported, f"{attribute.title}: a number was reported where '{attribute.expect}' is expected"
    if entered.qualifier is not None:
        return _judge_bounded(attribute, entered)
    low, high = _limits(attribute)
    if low is not None and rounded < low:
        return Verdict.FAIL, reported, _words(attribute.title, reported, attribute.unit, "is below the limit",
                                              attribute.limit_text, attribute.unit)
    if high is not None and rounded > high:
        return Verdict.FAIL, reported, _words(attribute.title, reported, attribute.unit, "is above the limit",
                                              attribute.limit_text, attribute.unit)
    return Verdict.PASS, reported, None


def judge_numeric(attribute: Attribute, value: float, qualifier: str | None = None) -> tuple[Verdict, str, str | None]:
    """``judge_entered`` for a computed number (optionally qualified '<' or '>')."""
    if not math.isfinite(value):
        raise ValueError(f"cannot judge a non-finite value {value!r}")
    number = exact(value)
    text = f"{qualifier}{number}" if qualifier else str(number)
    return judge_entered(attribute, EnteredResult(text, number, ResultQualifier(qualifier) if qualifier else None))


def judge_measurement(attribute: Attribute, measurement: Measurement | None, method: str | None) -> AttributeVerdict:
    """Verdict of a computed attribute (activity, protein, kinetics)."""
    base = dict(code=attribute.code, title=attribute.title, unit=attribute.unit,
                limit_text=attribute.limit_text, method=method)
    if measurement is None or measurement.detail.get("missing"):
        why = "; ".join(measurement.reasons) if measurement is not None and measurement.reasons else \
            "the assay data needed for it did not arrive"
        return AttributeVerdict(**base, value=None, reported=None, se=None, verdict=Verdict.MISSING,
                                reasons=(f"{attribute.title}: no result ({why})",))
    if not measurement.valid:
        return AttributeVerdict(**base, value=None, reported=None, se=None, verdict=Verdict.INVALID,
                                reasons=measurement.reasons or ("invalid",))
    if measurement.value is None or not math.isfinite(measurement.value):
        return AttributeVerdict(**base, value=None, reported=None, se=None, verdict=Verdict.INVALID,
                                reasons=measurement.reasons or ("no number could be computed",))
    verdict, reported, reason = judge_numeric(attribute, measurement.value)
    return AttributeVerdict(**base, value=measurement.value, reported=reported, se=measurement.se,
                            verdict=verdict, reasons=(reason,) if reason else ())


def judge_lims(attribute: Attribute, result_text: str | None, unit: str | None) -> AttributeVerdict:
    """Verdict of a LIMS-entered result (pH, dry matter, lead, microbiology), read as entered."""
    base = dict(code=attribute.code, title=attribute.title, unit=attribute.unit,
                limit_text=attribute.limit_text, method=f"LIMS test {attribute.test_code}")
    if result_text is None:
        return AttributeVerdict(**base, value=None, reported=None, se=None, verdict=Verdict.MISSING,
                                reasons=(f"{attribute.title} (LIMS test {attribute.test_code}): no result received",))
    if attribute.unit and unit and unit.strip() != attribute.unit:
        return AttributeVerdict(**base, value=None, reported=None, se=None, verdict=Verdict.INVALID,
                                reasons=(f"the LIMS reports the unit '{unit}', the specification expects '{attribute.unit}'",))
    try:
        entered = read_entered(result_text)
    except ValueError as exc:
        return AttributeVerdict(**base, value=None, reported=None, se=None, verdict=Verdict.INVALID,
                                reasons=(f"{attribute.title} (LIMS test {attribute.test_code}): {exc}",))
    if entered.word is not None:
        value = entered.word
        if attribute.expect is None:
            return AttributeVerdict(**base, value=value, reported=value, se=None, verdict=Verdict.FAIL,
                                    reasons=(f"{attribute.title}: '{value}' was reported where a number is expected",))
        verdict = Verdict.PASS if value == attribute.expect else Verdict.FAIL
        reason = () if verdict == Verdict.PASS else (f"{attribute.title}: {value} (specification: {attribute.expect})",)
        return AttributeVerdict(**base, value=value, reported=value, se=None, verdict=verdict, reasons=reason)
    verdict, reported, why = judge_entered(attribute, entered)
    number: float | str = entered.shown if entered.number is None else float(entered.number)
    return AttributeVerdict(**base, value=number, reported=reported, se=None, verdict=verdict,
                            reasons=(why,) if why else ())


def disposition(verdicts: Iterable[AttributeVerdict], trend: Iterable[TrendFinding],
                extra_incomplete: Iterable[str] = ()) -> tuple[Disposition, tuple[HoldCategory, ...], tuple[str, ...]]:
    """Released only when every required test is present, valid, in specification and in trend.

    Returns (disposition, hold categories in reading order, reasons). OOS is judged only on valid
    results; an invalid assay never becomes an OOS verdict.
    """
    categories: set[HoldCategory] = set()
    reasons: list[str] = []
    for reason in extra_incomplete:
        categories.add(HoldCategory.INCOMPLETE)
        reasons.append(reason)
    invalid: dict[str, list[str]] = {}  # one reason, the attributes it invalidates
    for verdict in verdicts:
        if verdict.verdict == Verdict.FAIL:
            categories.add(HoldCategory.OUT_OF_SPECIFICATION)
            reasons.extend(verdict.reasons)
        elif verdict.verdict == Verdict.INVALID:
            categories.add(HoldCategory.INVALID_ASSAY)
            for reason in verdict.reasons:
                invalid.setdefault(reason, []).append(verdict.title)
        elif verdict.verdict == Verdict.MISSING:
            categories.add(HoldCategory.INCOMPLETE)
            reasons.extend(verdict.reasons)
        elif verdict.verdict == Verdict.UNDECIDED:  # a qualified result the limit cannot settle: held, not OOS
            categories.add(HoldCategory.UNDECIDED_RESULT)
            reasons.extend(verdict.reasons)
    for reason, titles in invalid.items():
        reasons.append(f"{', '.join(titles)}: invalid assay: {reason}")
    for finding in trend:
        if finding.status == TrendStatus.OUT_OF_TREND:
            categories.add(HoldCategory.OUT_OF_TREND)
            reasons.extend(finding.signals)
    ordered = HoldCategory.in_reading_order(categories)
    unique_reasons = tuple(dict.fromkeys(reasons))
    return (Disposition.HELD if ordered else Disposition.RELEASED), ordered, unique_reasons
