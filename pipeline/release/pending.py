"""A lot's verdicts from its whole record, and its disposition with pending and overdue results (pure).

Released only when every required result is in, valid, in specification and in trend. A lot
whose only shortfall is results still within their expected turnaround is *pending* (a normal
state, listing what is awaited); a result past its turnaround holds the lot as *overdue*, saying
since when. An out-of-specification result standing in the record holds the lot (see
``pipeline.release.lot_record``).
"""

from __future__ import annotations

import datetime as dt
from collections.abc import Iterable
from dataclasses import replace

from pipeline.controlled.specs import Specification
from pipeline.release.lot_evaluation import LotEvaluation
from pipeline.release.lot_record import (
    LotHistory,
    LotRecordView,
    LotResult,
    apply_record,
    result_of,
)
from pipeline.release.records import AttributeVerdict, TrendFinding
from pipeline.release.verdicts import disposition, judge_lims, judge_measurement
from pipeline.vocabulary import Disposition, HoldCategory


def tonight_results(evaluation: LotEvaluation) -> dict[str, LotResult]:
    """The night's verdicts that are results (not missing), with where each came from."""
    out: dict[str, LotResult] = {}
    for verdict in evaluation.verdicts:
        where = evaluation.provenance.get(verdict.code, {})
        if where.get("carried"):  # from a plate of the record, read again: that result is on record already
            continue
        result = result_of(verdict, tested_on=str(where.get("tested_on") or evaluation.assay_date),
                           source=str(where.get("source") or ""), files=where.get("files") or {},
                           plate_id=where.get("plate_id"), analyst=where.get("analyst"))
        if result is not None:
            out[verdict.code] = result
    return out


def on_record(evaluation: LotEvaluation, spec: Specification, history: LotHistory
              ) -> tuple[LotEvaluation, LotRecordView]:
    """The evaluation with its verdicts taken from the lot's whole record, and the record after tonight."""
    verdicts, view = apply_record(spec, evaluation.verdicts, tonight_results(evaluation), history,
                                  evaluation.manufactured_on, evaluation.assay_date)
    return replace(evaluation, verdicts=verdicts), view


def _day_after(day: str) -> str:
    return (dt.date.fromisoformat(day) + dt.timedelta(days=1)).isoformat()


def record_disposition(evaluation: LotEvaluation, trend: Iterable[TrendFinding], record: LotRecordView
                       ) -> tuple[Disposition, tuple[HoldCategory, ...], tuple[str, ...]]:
    """Disposition, hold categories in reading order and reasons, with awaited results as pending or overdue."""
    timed = {a.attribute: a for a in record.awaited if a.due_on is not None}
    state, categories, reasons = disposition([v for v in evaluation.verdicts if v.code not in timed], trend,
                                             evaluation.incomplete)
    overdue = [a for a in timed.values() if a.overdue]
    waiting = [a for a in timed.values() if not a.overdue]
    extra = [f"{a.title}: no result; it was due by {a.due_on}, overdue since {_day_after(str(a.due_on))}"
             for a in overdue]
    extra += [f"awaiting {a.title} (expected by {a.due_on})" for a in waiting]
    if overdue:
        categories = HoldCategory.in_reading_order((*categories, HoldCategory.OVERDUE))
        state = Disposition.HELD
    elif waiting and state == Disposition.RELEASED:
        state = Disposition.PENDING
    return state, categories, (*reasons, *extra)


def _nothing_tonight(spec: Specification) -> tuple[AttributeVerdict, ...]:
    return tuple(judge_lims(a, None, None) if a.source == "lims" else judge_measurement(a, None, None)
                 for a in spec.attributes)


def latest_assay_date(history: LotHistory, as_of: str) -> str:
    """The date of the lot's latest recorded result (``as_of`` when it has none)."""
    return max((r.tested_on for r in history.results if r.tested_on), default=as_of)


def investigation_recheck(spec: Specification, lot_id: str, manufactured_on: str, assay_date: str) -> LotEvaluation:
    """A held lot with no data tonight whose record gained an investigation outcome: decided again from
    its record as a night with its latest results (of ``assay_date``) would decide it, verdicts and
    trend from the record, so a retest that came in before the outcome counts."""
    return LotEvaluation(lot_id=lot_id, product_code=spec.product_code, manufactured_on=manufactured_on,
                         assay_date=assay_date, measurements={}, verdicts=_nothing_tonight(spec), incomplete=(),
                         kinetics=None, plates=(), input_files={})


def overdue_recheck(spec: Specification, lot_id: str, manufactured_on: str, as_of: str,
                    history: LotHistory) -> LotEvaluation | None:
    """A pending lot with no data tonight, to be decided again from its record alone when one of its
    awaited results has turned overdue by ``as_of``; None while it is still only pending."""
    verdicts = _nothing_tonight(spec)
    evaluation = LotEvaluation(lot_id=lot_id, product_code=spec.product_code, manufactured_on=manufactured_on,
                               assay_date=as_of, measurements={}, verdicts=verdicts, incomplete=(), kinetics=None,
                               plates=(), input_files={}, record_only=True)
    _, view = apply_record(spec, verdicts, {}, history, manufactured_on, as_of)
    return evaluation if any(a.overdue for a in view.awaited) else None
