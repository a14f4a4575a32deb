"""Verdicts against a specification and the lot's disposition (docs/assay-rules.md, "Verdicts and disposition"). Pure.

Results are rounded to the digits of the limit before they are compared (the rounding
convention of the pharmacopoeias' general notices: round half away from zero, common practice).
"""

from __future__ import annotations

import math
from collections.abc import Iterable
from decimal import ROUND_HALF_UP, Decimal

from pipeline.controlled.specs import Attribute
from pipeline.release.records import AttributeVerdict, TrendFinding
from pipeline.science.measurement import Measurement
from pipeline.vocabulary import Disposition, HoldCategory, TrendStatus, Verdict


def round_half_up(value: float, digits: int) -> Decimal:
    """Round to ``digits`` decimals, halves away from zero: 2.45 → 2.5, −2.45 → −2.5.

    Goes through ``repr`` so that binary floating point does not turn 2.45 into 2.4499….
    """
    if not math.isfinite(value):
        raise ValueError(f"cannot round a non-finite value {value!r}")
    quantum = Decimal(1).scaleb(-digits)
    return Decimal(repr(value)).quantize(quantum, rounding=ROUND_HALF_UP)


def format_reported(value: float, digits: int, scientific: bool = False) -> str:
    if scientific:
        return f"{value:.3g}" if abs(value) < 1e4 else f"{value:.2e}"
    return f"{round_half_up(value, digits):f}"


def _words(*parts: str) -> str:
    return " ".join(part for part in parts if part)


def judge_numeric(attribute: Attribute, value: float, qualifier: str | None = None) -> tuple[Verdict, str, str | None]:
    """Compare one numeric result with its limits after rounding.

    Returns (verdict, reported text, reason or None). A result qualified '<' (below the
    limit of quantification) passes a maximum at or above that limit and cannot pass a minimum.
    """
    reported = format_reported(value, attribute.digits, attribute.scientific)
    if qualifier == "<":
        reported = f"< {reported}"
    if not attribute.has_limit or attribute.expect is not None:
        return (Verdict.REPORTED if not attribute.has_limit else Verdict.FAIL), reported, (
            None if not attribute.has_limit else f"{attribute.title}: a number was reported where '{attribute.expect}' is expected"
        )
    rounded = float(round_half_up(value, attribute.digits))
    low, high = attribute.minimum, attribute.maximum
    if qualifier == "<":
        if low is not None:
            return Verdict.FAIL, reported, f"{attribute.title}: {reported} {attribute.unit} cannot show the minimum {attribute.limit_text}"
        assert high is not None
        if rounded <= high:
            return Verdict.PASS, reported, None
        return Verdict.FAIL, reported, f"{attribute.title}: {reported} {attribute.unit} does not show the limit {attribute.limit_text}"
    if low is not None and rounded < low:
        return Verdict.FAIL, reported, _words(attribute.title, reported, attribute.unit, "is below the limit", attribute.limit_text, attribute.unit)
    if high is not None and rounded > high:
        return Verdict.FAIL, reported, _words(attribute.title, reported, attribute.unit, "is above the limit", attribute.limit_text, attribute.unit)
    return Verdict.PASS, reported, None


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


def parse_lims_result(text: str) -> tuple[float | str, str | None]:
    """'7.05' → (7.05, None); '< 0.5' → (0.5, '<'); 'absent' → ('absent', None)."""
    cleaned = text.strip()
    if cleaned in ("absent", "present"):
        return cleaned, None
    if cleaned.startswith("<"):
        return float(cleaned[1:].strip()), "<"
    return float(cleaned), None


def judge_lims(attribute: Attribute, result_text: str | None, unit: str | None) -> AttributeVerdict:
    """Verdict of a LIMS-entered result (pH, dry matter, lead, microbiology)."""
    base = dict(code=attribute.code, title=attribute.title, unit=attribute.unit,
                limit_text=attribute.limit_text, method=f"LIMS test {attribute.test_code}")
    if result_text is None:
        return AttributeVerdict(**base, value=None, reported=None, se=None, verdict=Verdict.MISSING,
                                reasons=(f"{attribute.title} (LIMS test {attribute.test_code}): no result received",))
    if attribute.unit and unit and unit.strip() != attribute.unit:
        return AttributeVerdict(**base, value=None, reported=None, se=None, verdict=Verdict.INVALID,
                                reasons=(f"the LIMS reports the unit '{unit}', the specification expects '{attribute.unit}'",))
    value, qualifier = parse_lims_result(result_text)
    if isinstance(value, str):
        if attribute.expect is None:
            return AttributeVerdict(**base, value=value, reported=value, se=None, verdict=Verdict.FAIL,
                                    reasons=(f"{attribute.title}: '{value}' was reported where a number is expected",))
        verdict = Verdict.PASS if value == attribute.expect else Verdict.FAIL
        reason = () if verdict == Verdict.PASS else (f"{attribute.title}: {value} (specification: {attribute.expect})",)
        return AttributeVerdict(**base, value=value, reported=value, se=None, verdict=verdict, reasons=reason)
    verdict, reported, reason = judge_numeric(attribute, value, qualifier)
    return AttributeVerdict(**base, value=value, reported=reported, se=None, verdict=verdict,
                            reasons=(reason,) if reason else ())


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
    for reason, titles in invalid.items():
        reasons.append(f"{', '.join(titles)}: invalid assay: {reason}")
    for finding in trend:
        if finding.status == TrendStatus.OUT_OF_TREND:
            categories.add(HoldCategory.OUT_OF_TREND)
            reasons.extend(finding.signals)
    ordered = HoldCategory.in_reading_order(categories)
    unique_reasons = tuple(dict.fromkeys(reasons))
    return (Disposition.HELD if ordered else Disposition.RELEASED), ordered, unique_reasons
