"""What bars a person's release of a lot's current revision (pure).

A person's release re-issues the lot's certificate from its current revision, so every result
of that revision must show that the lot meets its specification. The nightly job never releases
a lot with an out-of-specification result (``pipeline.release.lot_record``); the same rule binds
a person (FDA, *Investigating Out-of-Specification (OOS) Test Results for Pharmaceutical
Production*, 2006, from memory: an OOS result is investigated, and only a documented assignable
laboratory cause invalidates it; the retest result is then reportable). A result bars the release
when it is:

- out of specification (``Verdict.FAIL``) with no signed investigation outcome: OPEN_OOS;
- out of specification and confirmed by its investigation: CONFIRMED_OOS (the lot may only be
  rejected);
- out of specification and invalidated by its investigation, while the current revision still
  shows it: INVALIDATED. The invalidated result no longer counts and its retest is reportable;
  the retest comes with the lot's next revision, decided by the nightly job. Until then the
  revision has no valid result of that test, and its certificate would show the invalidated value;
- undecided (a qualified result such as "< 50 CFU/g" against ≤ 30): UNDECIDED. Nothing shows
  that the lot meets the limit, and no investigation outcome can change that: a retest whose
  range settles the limit supersedes the undecided result (it is not a valid result, see
  ``lot_record.result_of``);
- missing or invalid: NO_VALID_RESULT.

Besides the revision's own results, the lot's record is read: an out-of-specification result
standing there (valid, not invalidated) bars the release even if the revision does not show it.
"""

from __future__ import annotations

from collections.abc import Iterable
from dataclasses import dataclass

from pipeline.release.lot_record import Investigation, LotHistory, LotResult
from pipeline.release.records import RecordedResult
from pipeline.vocabulary import InvestigationOutcome, ReleaseBar, ResultStatus, Verdict

_CERTIFIABLE = (Verdict.PASS, Verdict.REPORTED)


@dataclass(frozen=True)
class BarredResult:
    """One result that bars a person's release, as the record shows it."""

    attribute: str  # the attribute code
    bar: ReleaseBar
    reported: str | None  # the result as reported ("34.3", "< 50"); None when there is none
    unit: str
    reference: str | None = None  # the investigation's reference (confirmed or invalidated)


def _investigation_of(result: LotResult, investigations: tuple[Investigation, ...]) -> Investigation | None:
    return next((i for i in investigations if result.result_id is not None and i.result_id == result.result_id), None)


def _oos_standing(attribute: str, history: LotHistory) -> tuple[ReleaseBar, LotResult | None, str | None]:
    """The state of an attribute's out-of-specification result in the lot's record.

    The first valid OOS result not invalidated stands (as the nightly job reads it): open, or
    confirmed by its investigation. With none standing but one invalidated: INVALIDATED. With no
    OOS result in the record at all (a record older than the lot record): open.
    """
    failed = [r for r in history.results if r.attribute == attribute and Verdict(r.verdict) == Verdict.FAIL]
    invalidated: list[tuple[LotResult, str | None]] = []
    for result in failed:
        found = _investigation_of(result, history.investigations)
        if result.status == ResultStatus.INVALIDATED or (
                found is not None and found.outcome == InvestigationOutcome.RESULT_INVALIDATED):
            invalidated.append((result, result.reference or (found.reference if found else None)))
            continue
        if result.status != ResultStatus.VALID:
            continue
        if found is not None and found.outcome == InvestigationOutcome.CONFIRMED_OOS:
            return ReleaseBar.CONFIRMED_OOS, result, found.reference
        return ReleaseBar.OPEN_OOS, result, None
    if invalidated:
        result, reference = invalidated[-1]
        return ReleaseBar.INVALIDATED, result, reference
    return ReleaseBar.OPEN_OOS, None, None


def release_bars(results: Iterable[RecordedResult], history: LotHistory) -> tuple[BarredResult, ...]:
    """The results that bar a person's release of the revision holding ``results``, given the lot's record.

    Empty when every result passes or is reported without a limit and no OOS result stands in
    the record. One entry per attribute, in the revision's order, then the record's.
    """
    bars: list[BarredResult] = []
    for result in results:
        verdict = Verdict(result.verdict)
        if verdict in _CERTIFIABLE:
            continue
        if verdict == Verdict.FAIL:
            bar, _, reference = _oos_standing(result.code, history)
            bars.append(BarredResult(result.code, bar, result.reported, result.unit, reference))
        elif verdict == Verdict.UNDECIDED:
            bars.append(BarredResult(result.code, ReleaseBar.UNDECIDED, result.reported, result.unit))
        else:
            bars.append(BarredResult(result.code, ReleaseBar.NO_VALID_RESULT, None, result.unit))
    named = {b.attribute for b in bars}
    for attribute in dict.fromkeys(r.attribute for r in history.results):
        if attribute in named:
            continue
        bar, standing, reference = _oos_standing(attribute, history)
        if standing is not None and bar in (ReleaseBar.OPEN_OOS, ReleaseBar.CONFIRMED_OOS):
            bars.append(BarredResult(attribute, bar, standing.reported, standing.unit, reference))
    return tuple(bars)
