"""Read-only store queries for control charts (adapter): limits, released and held lots.

Reads only the tail of a chart that a view needs (the window plus the rule history), never the
whole table, except for a re-baseline, which reads the released lots from the chosen lot on.
"""

from __future__ import annotations

import datetime as dt
from typing import Any

from sqlalchemy import func, select

from pipeline.records.store import ChartPoint, ControlLimitRow, DecisionRow, Lot, ResultRow, Store
from pipeline.release.chart_view import ChartHistory, HeldPoint, ReleasedPoint, StoredLimits
from pipeline.science.control_charts import HISTORY_POINTS
from pipeline.vocabulary import Disposition, HoldCategory, TrendStatus


def _utc_text(when: dt.datetime | None) -> str:
    if when is None:
        return ""
    if when.tzinfo is None:  # SQLite gives back naive datetimes; they were written in UTC
        when = when.replace(tzinfo=dt.UTC)
    return when.astimezone(dt.UTC).isoformat(timespec="seconds")


def _limits(row: ControlLimitRow) -> StoredLimits:
    return StoredLimits(version=row.version, center=row.center, sigma=row.sigma, mr_bar=row.mr_bar,
                        baseline_lots=tuple(row.baseline_lots or ()),
                        frozen_at_utc=_utc_text(row.frozen_at_utc), frozen_by=row.frozen_by,
                        reason=row.reason, active=bool(row.active))


def limit_versions(store: Store, product_code: str, attribute: str) -> tuple[StoredLimits, ...]:
    """Every stored version of a chart's limits, oldest first."""
    with store.session() as s:
        rows = s.scalars(select(ControlLimitRow).where(
            ControlLimitRow.product_code == product_code, ControlLimitRow.attribute == attribute)
            .order_by(ControlLimitRow.version))
        return tuple(_limits(r) for r in rows)


def active_limits(store: Store, product_code: str, attribute: str) -> StoredLimits | None:
    active = [v for v in limit_versions(store, product_code, attribute) if v.active]
    return max(active, key=lambda v: v.version) if active else None


def released_count(store: Store, product_code: str, attribute: str) -> int:
    with store.session() as s:
        return int(s.scalar(select(func.count(ChartPoint.id)).where(
            ChartPoint.product_code == product_code, ChartPoint.attribute == attribute)) or 0)


def released_points(store: Store, product_code: str, attribute: str, *, tail: int | None = None,
                    from_lot: str | None = None, count: int | None = None) -> tuple[ReleasedPoint, ...]:
    """Released lots on a chart in release order: the last ``tail``, or ``count`` from ``from_lot``.

    ``from_lot`` not on the chart gives an empty tuple.
    """
    where = (ChartPoint.product_code == product_code, ChartPoint.attribute == attribute)
    with store.session() as s:
        query = select(ChartPoint).where(*where)
        if from_lot is not None:
            start = s.scalar(select(ChartPoint.id).where(*where, ChartPoint.lot_id == from_lot))
            if start is None:
                return ()
            query = query.where(ChartPoint.id >= start).order_by(ChartPoint.id)
            rows = list(s.scalars(query.limit(count) if count is not None else query))
        elif tail is not None:
            rows = list(reversed(list(s.scalars(query.order_by(ChartPoint.id.desc()).limit(tail)))))
        else:
            rows = list(s.scalars(query.order_by(ChartPoint.id)))
        return tuple(ReleasedPoint(r.lot_id, float(r.value), int(r.decision_id)) for r in rows)


def _finding(record: dict[str, Any], attribute: str) -> dict[str, Any] | None:
    for finding in record.get("trend") or ():
        if isinstance(finding, dict) and finding.get("attribute") == attribute:
            return finding
    return None


def held_points(store: Store, product_code: str, attribute: str, *, after_order: int | None,
                limit: int) -> tuple[HeldPoint, ...]:
    """Lots of a product whose latest decision holds them, newest ``limit``, oldest first.

    The value is the attribute's result in that decision (None when it has none, e.g. an
    invalid assay). Out of trend on this chart: the decision's finding for the attribute says
    so, or, for a record without findings, its hold categories include out of trend.
    """
    charted = select(ChartPoint.lot_id).where(ChartPoint.product_code == product_code,
                                              ChartPoint.attribute == attribute)
    with store.session() as s:
        query = (select(DecisionRow).join(Lot, Lot.lot_id == DecisionRow.lot_id)
                 .where(Lot.product_code == product_code, DecisionRow.superseded_by.is_(None),
                        DecisionRow.disposition != Disposition.RELEASED, DecisionRow.lot_id.not_in(charted)))
        if after_order is not None:
            query = query.where(DecisionRow.id > after_order)
        decisions = list(reversed(list(s.scalars(query.order_by(DecisionRow.id.desc()).limit(limit)))))
        ids = [d.id for d in decisions]
        values: dict[int, float | None] = {}
        if ids:
            for r in s.scalars(select(ResultRow).where(ResultRow.decision_id.in_(ids),
                                                       ResultRow.attribute == attribute)):
                values[r.decision_id] = None if r.value is None else float(r.value)
        out = []
        for d in decisions:
            record = d.record or {}
            finding = _finding(record, attribute)
            categories = tuple(d.hold_categories or ())
            if finding is not None:
                oot = finding.get("status") == TrendStatus.OUT_OF_TREND
                signals = tuple(str(x) for x in finding.get("signals") or ())
            else:
                oot, signals = HoldCategory.OUT_OF_TREND in categories, ()
            label = str(record.get("label") or f"held: {', '.join(categories)}")
            out.append(HeldPoint(d.lot_id, values.get(d.id), int(d.id), label, categories, oot, signals))
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
