"""Deciding the night's lots: the charts' state read once, earlier decisions, then trend and disposition."""

from __future__ import annotations

import datetime as dt
from dataclasses import dataclass
from typing import Any
from zoneinfo import ZoneInfo

from pipeline import __version__
from pipeline.controlled.catalog import Catalog
from pipeline.controlled.specs import KineticMethod
from pipeline.records.chart_queries import (
    active_limits,
    held_points,
    released_count,
    released_points,
)
from pipeline.records.lot_record_store import (
    charted_lots,
    investigated_lots,
    load_histories,
    pending_lots,
)
from pipeline.records.store import Store
from pipeline.release.chart_view import held_marks
from pipeline.release.decision import (
    CHART_TAIL,
    ChartKey,
    ChartState,
    FrozenLimits,
    NightDecisions,
    decide_night,
    lot_fingerprint,
)
from pipeline.release.lot_evaluation import LotEvaluation
from pipeline.release.lot_record import LotHistory
from pipeline.release.pending import investigation_recheck, latest_assay_date, overdue_recheck
from pipeline.vocabulary import Disposition, HoldCategory, NelsonRule

BASELINE_REACHED = "lotgate (baseline reached)"  # who froze a chart's first limits: the nightly job


def load_charts(store: Store, catalog: Catalog, evaluations: list[LotEvaluation]) -> dict[ChartKey, ChartState]:
    """Read each chart's state once per night, as it stood before any of these lots was decided.

    A run stopped part-way through publishing has committed some of these lots (their decisions'
    fingerprints are stored), with their chart points and, with the first of them, the limits
    frozen when a baseline was reached. Those are left out here, so a restart judges every lot
    against exactly the charts the first attempt saw: within a night each lot's judgement depends
    on the lots before it, so continuing from a half-published store would judge the rest
    against other charts. The restart then publishes only the lots not yet stored.
    """
    fingerprints = [lot_fingerprint(e, catalog, __version__) for e in evaluations]
    attempt = {stored.id for stored in store.known_fingerprints(fingerprints).values()}
    attempt_points = store.chart_point_counts(sorted(attempt))
    charts: dict[ChartKey, ChartState] = {}
    wanted: list[tuple[str, Any]] = []
    trended: dict[tuple[str, str], Any] = {}
    for evaluation in evaluations:  # each lot's own specification version: versions may trend other attributes
        spec = catalog.specification_for_lot(evaluation.product_code, evaluation.manufactured_on, evaluation.assay_date)
        for attribute in spec.attributes:
            if attribute.trend:
                trended.setdefault((spec.product_code, attribute.code), attribute)
    wanted += [(product, attribute) for (product, _), attribute in sorted(trended.items(), key=lambda kv: kv[0])]
    plates = {(str(p.get("method_id")), p.get("method_version")) for e in evaluations for p in e.plates
              if p.get("kind") == "activity"}
    for method_id in sorted({m for m, _ in plates}):
        method = next((found for found in (catalog.method_version(m, v) for m, v in sorted(plates, key=str)
                                           if m == method_id) if found is not None), None)
        if isinstance(method, KineticMethod):
            wanted.append((method.method_id, method.recovery_attribute()))
    for product, attribute in wanted:
        left_out = attempt_points.get((product, attribute.code), 0)
        total = released_count(store, product, attribute.code) - left_out
        stored = active_limits(store, product, attribute.code)
        if stored is not None and stored.frozen_by == BASELINE_REACHED and total < len(stored.baseline_lots):
            stored = None  # frozen by the stopped attempt from lots it released: frozen again, the same way
        points = [p for p in released_points(store, product, attribute.code,
                                             tail=CHART_TAIL + left_out if stored else None) if p.order not in attempt]
        points = points[-CHART_TAIL:] if stored else points
        limits = None if stored is None else FrozenLimits(stored.version, stored.center, stored.sigma,
                                                          stored.mr_bar, tuple(stored.baseline_lots))
        marks: tuple[tuple[NelsonRule, int], ...] = ()
        if stored is not None and points:  # held lots' signalled runs: their points do not count again
            held = [h for h in held_points(store, product, attribute.code, after_order=points[0].order,
                                           limit=CHART_TAIL) if h.order not in attempt]
            offset = total - len(points)
            marks = tuple((rule, offset + p) for rule, positions in held_marks(points, held).items() for p in positions)
        charts[(product, attribute.code)] = ChartState(
            product, attribute.code, limits, tuple(p.lot_id for p in points), tuple(p.value for p in points),
            total=total, marks=marks)
    return charts


# Holds the lot record governs on its own: new results settle them (an invalid assay is superseded by
# the next valid result, an awaited result arrives, an OOS result stands until an investigation).
RECORD_GOVERNED = frozenset({HoldCategory.INVALID_ASSAY, HoldCategory.INCOMPLETE, HoldCategory.OVERDUE,
                             HoldCategory.OUT_OF_SPECIFICATION})


def earlier_decisions(store: Store, evaluations: list[LotEvaluation]) -> dict[str, str]:
    """For each lot whose latest decision a person must review first, a note on it (one query for the night).

    A person's decision, and a nightly hold for a reason the lot record does not settle (out of
    trend, review required), stand until an authorised person decides. A nightly hold for an
    invalid assay, missing, overdue or out-of-specification results, and a pending lot, are
    decided again from the lot's whole record.
    """
    latest = store.previous_decisions([e.lot_id for e in evaluations])
    out = {}
    for lot, stored in latest.items():
        nightly = stored.decided_by.startswith("lotgate")
        settled = stored.disposition in (Disposition.RELEASED, Disposition.READY_FOR_RELEASE, Disposition.PENDING) or (
            stored.disposition == Disposition.HELD and set(stored.record.hold_categories) <= RECORD_GOVERNED)
        if not (nightly and settled):
            out[lot] = f"revision {stored.revision}: {stored.record.label} (decided by {stored.decided_by})"
    return out


@dataclass(frozen=True)
class NightRecords:
    """The night's lots' records before tonight, which of them are on a control chart already, and
    the lots without data tonight decided again from their record: pending lots whose awaited results
    have turned overdue, and held lots whose record gained an investigation outcome since."""

    histories: dict[str, LotHistory]
    charted: frozenset[tuple[str, str, str]]
    rechecks: tuple[LotEvaluation, ...] = ()


def night_date(evaluations: list[LotEvaluation], time_zone: str) -> str:
    """The night's date: its newest assay date, or today in the plant's time zone when no lot has data."""
    if evaluations:
        return max(e.assay_date for e in evaluations)
    return dt.datetime.now(ZoneInfo(time_zone)).date().isoformat()


def lot_records(store: Store, catalog: Catalog, evaluations: list[LotEvaluation],
                time_zone: str = "UTC", site_id: str | None = None) -> NightRecords:
    """Each lot's record as it stood before tonight (what a stopped attempt of this night stored left out,
    as ``load_charts`` does), and the lots to decide again without data: pending ones whose result turned
    overdue, held ones whose record gained an investigation outcome after their decision (of the site
    ``site_id`` only, when sites share the store: another site's lots are its own nights' work)."""
    fingerprints = [lot_fingerprint(e, catalog, __version__) for e in evaluations]
    attempt = {stored.id for stored in store.known_fingerprints(fingerprints).values()}
    lots = [e.lot_id for e in evaluations]
    tonight = set(lots)
    waiting = [(lot, product, made) for lot, product, made in pending_lots(store, site_id)
               if lot not in tonight and product in catalog.specifications and made]
    investigated = [(lot, product, made) for lot, product, made in investigated_lots(store, site_id)
                    if lot not in tonight and product in catalog.specifications and made]
    again = [lot for lot, _, _ in investigated]
    histories = load_histories(store, [*lots, *(lot for lot, _, _ in waiting), *again], attempt)
    as_of = night_date(evaluations, time_zone)
    rechecks = tuple(check for lot, product, made in waiting if (check := overdue_recheck(
        catalog.specification_for_lot(product, made, as_of), lot, made, as_of,
        histories.get(lot, LotHistory()))) is not None)
    for lot, product, made in investigated:
        assayed = latest_assay_date(histories.get(lot, LotHistory()), as_of)
        rechecks += (investigation_recheck(catalog.specification_for_lot(product, made, assayed), lot, made, assayed),)
    return NightRecords(histories, charted_lots(store, [*lots, *again], attempt), rechecks)


def decide(evaluations: list[LotEvaluation], catalog: Catalog, charts: dict[ChartKey, ChartState],
           earlier: dict[str, str] | None = None, records: NightRecords | None = None) -> NightDecisions:
    """Trend and disposition of the night's lots, by product, date of manufacture and lot."""
    everyone = [*evaluations, *(records.rechecks if records else ())]
    ordered = sorted(everyone, key=lambda e: (e.product_code, e.manufactured_on, e.lot_id))
    return decide_night(ordered, catalog, charts, __version__, earlier or {},
                        records.histories if records else None, records.charted if records else frozenset())
