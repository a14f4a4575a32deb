"""A lot's record across nights: which result of each attribute is reportable, and what is awaited (pure).

Every result a lot ever had stays in its record with its provenance and a status
(``ResultStatus``). A night's new results join the record; the lot's verdicts are then taken
from the WHOLE record, attribute by attribute:

- an invalid result (the assay failed system suitability) is superseded by the next valid
  result of the same test, automatically (common practice: an invalid run yields no result);
- an out-of-specification result stands: a later passing result never replaces it on its own
  ("testing into compliance"). Only a signed investigation outcome moves it — "assignable
  laboratory cause: result invalidated" (the result becomes invalidated and the next valid
  result counts) or "confirmed OOS" (the result stands, the lot stays held). FDA, *Investigating
  Out-of-Specification (OOS) Test Results for Pharmaceutical Production* (2006), from memory;
- results are never averaged across an OOS result and a retest: the reportable result is one
  recorded result, never a mean of several;
- otherwise the latest valid result is reportable;
- no result at all: the attribute is awaited. With a turnaround (``turnaround_days`` of the
  attribute) it is pending until manufacture + turnaround, then overdue; without one it was
  due with the lot's data and the lot is incomplete.
"""

from __future__ import annotations

import datetime as dt
from collections.abc import Mapping
from dataclasses import dataclass, replace
from typing import Any

from pipeline.controlled.specs import Attribute, Specification
from pipeline.plain_data import to_plain
from pipeline.release.records import AttributeVerdict
from pipeline.vocabulary import InvestigationOutcome, ResultStatus, Verdict

_VALID_VERDICTS = (Verdict.PASS, Verdict.FAIL, Verdict.REPORTED)


@dataclass(frozen=True)
class LotResult:
    """One result in a lot's record, with where it came from and its standing."""

    attribute: str
    status: ResultStatus
    verdict: Verdict
    value: float | str | None
    reported: str | None
    unit: str
    se: float | None
    tested_on: str  # ISO date of the assay (or the LIMS test)
    source: str  # "plate AK-…", "LIMS test PH"
    method: str | None  # method id and version, or the LIMS test
    files: dict[str, str]  # file name -> SHA-256 it came from
    reasons: tuple[str, ...] = ()
    plate_id: str | None = None
    analyst: str | None = None
    night_id: int | None = None
    result_id: int | None = None  # the stored row; None for a result of tonight not yet stored
    status_reason: str | None = None  # why the status changed (superseded by…, invalidated under INV-…)
    reference: str | None = None  # the investigation reference of an invalidation

    def to_dict(self) -> dict[str, Any]:
        return to_plain(vars(self))


@dataclass(frozen=True)
class Investigation:
    """A signed outcome of an out-of-specification investigation on one recorded result."""

    attribute: str
    result_id: int
    outcome: InvestigationOutcome
    reference: str
    reason: str
    retest_plan: str
    decided_by: str
    recorded_at_utc: str

    def to_dict(self) -> dict[str, Any]:
        return to_plain(vars(self))


@dataclass(frozen=True)
class LotHistory:
    """What the store holds for one lot before tonight: its results (statuses resolved) and investigations."""

    results: tuple[LotResult, ...] = ()
    investigations: tuple[Investigation, ...] = ()


@dataclass(frozen=True)
class StatusChange:
    """A new standing for a stored result, to be recorded as a new row (the result itself is never changed)."""

    result_id: int
    attribute: str
    status: ResultStatus
    reason: str


@dataclass(frozen=True)
class Awaited:
    """A required result not yet in the record."""

    attribute: str
    title: str
    due_on: str | None  # None: due with the lot's data (no turnaround declared)
    overdue: bool


@dataclass(frozen=True)
class AttributeRecord:
    """One attribute's record: every result in order, the reportable one, and the rule that chose it."""

    attribute: str
    title: str
    results: tuple[LotResult, ...]
    reportable_index: int | None  # index in ``results`` of the reportable result
    rule: str  # why this result is reportable, for a person

    def to_dict(self) -> dict[str, Any]:
        return {"attribute": self.attribute, "title": self.title, "rule": self.rule,
                "reportable_index": self.reportable_index, "results": [r.to_dict() for r in self.results]}


@dataclass(frozen=True)
class LotRecordView:
    """The lot's record after tonight: per attribute, the new results and status changes to store, what is awaited."""

    attributes: tuple[AttributeRecord, ...]
    new_results: tuple[LotResult, ...]
    status_changes: tuple[StatusChange, ...]
    awaited: tuple[Awaited, ...]
    open_oos: tuple[str, ...]  # attributes whose OOS result awaits an investigation outcome
    confirmed_oos: tuple[str, ...]

    def to_dict(self) -> dict[str, Any]:
        return {"attributes": [a.to_dict() for a in self.attributes],
                "awaited": [to_plain(vars(a)) for a in self.awaited],
                "open_oos": list(self.open_oos), "confirmed_oos": list(self.confirmed_oos)}


def result_of(verdict: AttributeVerdict, *, tested_on: str, source: str, files: Mapping[str, str],
              plate_id: str | None = None, analyst: str | None = None) -> LotResult | None:
    """Tonight's verdict as a new result of the record (None when no result arrived)."""
    if verdict.verdict == Verdict.MISSING:
        return None
    status = ResultStatus.VALID if verdict.verdict in _VALID_VERDICTS else ResultStatus.INVALID
    return LotResult(verdict.code, status, Verdict(verdict.verdict), verdict.value, verdict.reported, verdict.unit,
                     verdict.se, tested_on, source, verdict.method, dict(sorted(files.items())),
                     tuple(verdict.reasons), plate_id, analyst)


def _where(result: LotResult) -> str:
    """'result of 2026-11-27 (plate AK-…)'."""
    return f"result of {result.tested_on} ({result.source})" if result.source else f"result of {result.tested_on}"


def _verdict_of(attribute: Attribute, result: LotResult, extra: tuple[str, ...] = ()) -> AttributeVerdict:
    return AttributeVerdict(attribute.code, attribute.title, attribute.unit, result.value, result.reported, result.se,
                            attribute.limit_text, result.verdict, (*result.reasons, *extra), result.method)


def _missing(attribute: Attribute, tonight: AttributeVerdict | None) -> AttributeVerdict:
    if tonight is not None:
        return tonight
    return AttributeVerdict(attribute.code, attribute.title, attribute.unit, None, None, None, attribute.limit_text,
                            Verdict.MISSING, (f"{attribute.title}: no result in the lot's record",), None)


def choose(attribute: Attribute, results: tuple[LotResult, ...], investigations: tuple[Investigation, ...],
           tonight: AttributeVerdict | None) -> tuple[AttributeVerdict, AttributeRecord, tuple[StatusChange, ...],
                                                       str | None]:
    """The reportable verdict of one attribute from its results in order (oldest first).

    Returns the verdict, the attribute's record, status changes to store (invalid results
    superseded, results invalidated by an investigation), and the OOS state: None, "open" or
    "confirmed".
    """
    by_result = {i.result_id: i for i in investigations}
    resolved: list[LotResult] = []
    changes: list[StatusChange] = []
    for result in results:
        found = by_result.get(result.result_id) if result.result_id is not None else None
        if (found is not None and found.outcome == InvestigationOutcome.RESULT_INVALIDATED
                and result.status != ResultStatus.INVALIDATED):
            why = f"invalidated by {found.decided_by} under investigation {found.reference}: {found.reason}"
            result = replace(result, status=ResultStatus.INVALIDATED, status_reason=why, reference=found.reference)
            changes.append(StatusChange(result.result_id or 0, attribute.code, ResultStatus.INVALIDATED, why))
        resolved.append(result)
    valid = [i for i, r in enumerate(resolved) if r.status == ResultStatus.VALID]
    oos = next((i for i in valid if resolved[i].verdict == Verdict.FAIL), None)
    if oos is not None:
        standing = resolved[oos]
        later = [resolved[i] for i in valid if i > oos]
        investigation = by_result.get(standing.result_id) if standing.result_id is not None else None
        if investigation is not None and investigation.outcome == InvestigationOutcome.CONFIRMED_OOS:
            note = (f"{attribute.title}: out of specification, confirmed by {investigation.decided_by} under "
                    f"investigation {investigation.reference}: the lot stays held until an authorised person "
                    "rejects it")
            state = "confirmed"
        else:
            retests = f"; {len(later)} later result(s) recorded but not reportable while it stands" if later else ""
            note = (f"{attribute.title}: the out-of-specification {_where(standing)} stands until an authorised "
                    f"person records an investigation outcome (lotgate investigate){retests}")
            state = "open"
        verdict = _verdict_of(attribute, standing, (note,))
        return verdict, AttributeRecord(attribute.code, attribute.title, tuple(resolved), oos,
                                        "out-of-specification result stands"), tuple(changes), state
    if valid:
        chosen = valid[-1]
        for i, result in enumerate(resolved):
            if i < chosen and result.status == ResultStatus.INVALID:
                why = f"superseded by the valid {_where(resolved[chosen])}"
                resolved[i] = replace(result, status=ResultStatus.SUPERSEDED, status_reason=why)
                if result.result_id is not None:
                    changes.append(StatusChange(result.result_id, attribute.code, ResultStatus.SUPERSEDED, why))
        pick = resolved[chosen]
        same_as_tonight = tonight is not None and pick.result_id is None
        verdict = tonight if same_as_tonight and tonight is not None else _verdict_of(attribute, pick)
        rule = "latest valid result" if len(valid) > 1 or len(resolved) > 1 else "the only result"
        return verdict, AttributeRecord(attribute.code, attribute.title, tuple(resolved), chosen, rule), \
            tuple(changes), None
    if resolved:
        last = len(resolved) - 1
        pick = resolved[last]
        verdict = tonight if tonight is not None and pick.result_id is None else _verdict_of(attribute, pick)
        if verdict.verdict != Verdict.INVALID and pick.status == ResultStatus.INVALIDATED:
            verdict = AttributeVerdict(attribute.code, attribute.title, attribute.unit, None, None, None,
                                       attribute.limit_text, Verdict.MISSING,
                                       (f"{attribute.title}: its result was invalidated ({pick.status_reason}); "
                                        "a retest is awaited",), pick.method)
        return verdict, AttributeRecord(attribute.code, attribute.title, tuple(resolved), None,
                                        "no valid result"), tuple(changes), None
    return _missing(attribute, tonight), AttributeRecord(attribute.code, attribute.title, (), None, "no result"), \
        (), None


def awaited(attribute: Attribute, manufactured_on: str, as_of: str) -> Awaited:
    """When a missing result is due: manufacture + turnaround; overdue from the day after."""
    if attribute.turnaround_days is None:
        return Awaited(attribute.code, attribute.title, None, False)
    due = dt.date.fromisoformat(manufactured_on) + dt.timedelta(days=attribute.turnaround_days)
    return Awaited(attribute.code, attribute.title, due.isoformat(), dt.date.fromisoformat(as_of) > due)


def apply_record(spec: Specification, tonight: tuple[AttributeVerdict, ...], new: Mapping[str, LotResult],
                 history: LotHistory, manufactured_on: str, as_of: str
                 ) -> tuple[tuple[AttributeVerdict, ...], LotRecordView]:
    """The lot's verdicts from its whole record, and the record's view after tonight.

    ``tonight`` are the night's verdicts (one per attribute), ``new`` tonight's results by
    attribute (what arrived), ``history`` what the record held before tonight.
    """
    by_code = {v.code: v for v in tonight}
    verdicts: list[AttributeVerdict] = []
    records: list[AttributeRecord] = []
    changes: list[StatusChange] = []
    waiting: list[Awaited] = []
    open_oos: list[str] = []
    confirmed: list[str] = []
    for attribute in spec.attributes:
        earlier = tuple(r for r in history.results if r.attribute == attribute.code)
        results = (*earlier, new[attribute.code]) if attribute.code in new else earlier
        investigations = tuple(i for i in history.investigations if i.attribute == attribute.code)
        verdict, record, changed, oos = choose(attribute, results, investigations, by_code.get(attribute.code))
        verdicts.append(verdict)
        records.append(record)
        changes.extend(changed)
        if oos == "open":
            open_oos.append(attribute.code)
        elif oos == "confirmed":
            confirmed.append(attribute.code)
        if verdict.verdict == Verdict.MISSING and attribute.required:
            waiting.append(awaited(attribute, manufactured_on, as_of))
    return tuple(verdicts), LotRecordView(tuple(records), tuple(new[c] for c in new), tuple(changes),
                                          tuple(waiting), tuple(open_oos), tuple(confirmed))
