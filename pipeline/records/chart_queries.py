"""Read-only store queries for control charts (adapter): limits, released and held lots.

Reads only the tail of a chart that a view needs (the window plus the rule history), never the
whole table, except for a re-baseline, which reads the released lots from the chosen lot on.
"""

from __future__ import annotations

from pipeline.records.store import Store
from pipeline.release.chart_view import ChartHistory, HeldPoint, ReleasedPoint, StoredLimits
from pipeline.release.records import DecisionRecord, TrendFinding
from pipeline.science.control_charts import HISTORY_POINTS
from pipeline.vocabulary import HoldCategory, TrendStatus


def limit_versions(store: Store, product_code: str, attribute: str) -> tuple[StoredLimits, ...]:
    """Every stored version of a chart's limits, oldest first."""
    return store.limit_versions(product_code, attribute)


def active_limits(store: Store, product_code: str, attribute: str) -> StoredLimits | None:
    active = [v for v in limit_versions(store, product_code, attribute) if v.active]
    return max(active, key=lambda v: v.version) if active else None


def released_count(store: Store, product_code: str, attribute: str) -> int:
    return store.released_count(product_code, attribute)


def released_points(store: Store, product_code: str, attribute: str, *, tail: int | None = None,
                    from_lot: str | None = None, count: int | None = None) -> tuple[ReleasedPoint, ...]:
    """Released lots on a chart in release order: the last ``tail``, or ``count`` from ``from_lot``."""
    return store.released_points(product_code, attribute, tail=tail, from_lot=from_lot, count=count)


def _finding(record: DecisionRecord, attribute: str) -> TrendFinding | None:
    return next((f for f in record.trend if f.attribute == attribute), None)


def held_points(store: Store, product_code: str, attribute: str, *, after_order: int | None,
                limit: int) -> tuple[HeldPoint, ...]:
    """Lots of a product whose latest decision holds them, newest ``limit``, oldest first.

    The value is the attribute's result in that decision (None when it has none, e.g. an
    invalid assay). Out of trend on this chart: the decision's finding for the attribute says
    so, or, for a record without findings, its hold categories include out of trend.
    """
    out = []
    for decision, value in store.held_decisions(product_code, attribute, after_order=after_order, limit=limit):
        record = decision.record
        finding = _finding(record, attribute)
        categories = tuple(record.hold_categories)
        if finding is not None:
            oot, signals = finding.status == TrendStatus.OUT_OF_TREND, tuple(str(x) for x in finding.signals)
        else:
            oot, signals = HoldCategory.OUT_OF_TREND in categories, ()
        label = record.label or f"held: {', '.join(categories)}"
        rules = finding.rules if finding is not None else ()
        out.append(HeldPoint(decision.lot_id, value, decision.id, label, categories, oot, signals, rules))
    return tuple(out)


def chart_history(store: Store, product_code: str, attribute: str, window: int) -> ChartHistory:
    """What a chart view of the last ``window`` lots needs, in four small queries."""
    versions = limit_versions(store, product_code, attribute)
    active = [v for v in versions if v.active]
    total = released_count(store, product_code, attribute)
    released = released_points(store, product_code, attribute, tail=window + HISTORY_POINTS)
    # Held lots older than the first released point read can only be in the window when every
    # released point was read (then fewer than window + 14 exist).
    after = released[0].order if released and len(released) < total else None
    held = held_points(store, product_code, attribute, after_order=after, limit=window)
    return ChartHistory(product_code, attribute, max(active, key=lambda v: v.version) if active else None,
                        versions, total, released, held)

