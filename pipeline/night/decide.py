"""Deciding the night's lots: the charts' state read once, earlier decisions, then trend and disposition."""

from __future__ import annotations

from typing import Any

from pipeline import __version__
from pipeline.controlled.catalog import Catalog
from pipeline.controlled.specs import KineticMethod
from pipeline.records.chart_queries import active_limits, released_count, released_points
from pipeline.records.store import Store
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
from pipeline.vocabulary import Disposition

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
    fingerprints = [lot_fingerprint(e, catalog.specifications, catalog.methods, __version__) for e in evaluations]
    attempt = {stored.id for stored in store.known_fingerprints(fingerprints).values()}
    attempt_points = store.chart_point_counts(sorted(attempt))
    charts: dict[ChartKey, ChartState] = {}
    wanted: list[tuple[str, Any]] = []
    for product in sorted({e.product_code for e in evaluations}):
        wanted += [(product, a) for a in catalog.specifications[product].attributes if a.trend]
    for method_id in sorted({p.get("method_id") for e in evaluations for p in e.plates if p.get("kind") == "activity"}):
        method = catalog.methods.get(str(method_id))
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
        charts[(product, attribute.code)] = ChartState(
            product, attribute.code, limits, tuple(p.lot_id for p in points), tuple(p.value for p in points),
            total=total)
    return charts


def earlier_decisions(store: Store, evaluations: list[LotEvaluation]) -> dict[str, str]:
    """For each lot decided before, a note on its latest decision (one query for the night)."""
    latest = store.previous_decisions([e.lot_id for e in evaluations])
    return {lot: f"revision {stored.revision}: {stored.record.label} (decided by {stored.decided_by})"
            for lot, stored in latest.items()
            if stored.disposition not in (Disposition.RELEASED, Disposition.READY_FOR_RELEASE)
            or not stored.decided_by.startswith("lotgate")}


def decide(evaluations: list[LotEvaluation], catalog: Catalog, charts: dict[ChartKey, ChartState],
           earlier: dict[str, str] | None = None) -> NightDecisions:
    """Trend and disposition of the night's lots, by product, date of manufacture and lot."""
    ordered = sorted(evaluations, key=lambda e: (e.product_code, e.manufactured_on, e.lot_id))
    return decide_night(ordered, catalog.specifications, catalog.methods, charts, __version__, earlier or {})
