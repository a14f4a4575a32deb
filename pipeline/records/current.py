"""What stands now, found by query over append-only records: a lot's latest revision, a night's end.

Nothing in a record table is updated (migration 0004), so "superseded" and "finished" are never
columns: a decision stands while no later revision of its lot exists, and a night is finished when
a ``night_closings`` row closes it.
"""

from __future__ import annotations

from typing import Any

from sqlalchemy import exists, or_, select, true
from sqlalchemy.orm import Session

from pipeline.records.tables import DecisionRow, NightClosing, NightRun


def is_latest_revision() -> Any:
    """Where-clause on ``DecisionRow``: the decision is its lot's latest revision (no later one exists)."""
    later = DecisionRow.__table__.alias("later")
    return ~exists().where(later.c.lot_id == DecisionRow.lot_id, later.c.revision > DecisionRow.revision)


def closings(s: Session, night_ids: list[int]) -> dict[int, NightClosing]:
    """The row that ended each of these nights (closed with its counts, or found interrupted), if any."""
    if not night_ids:
        return {}
    return {row.night_id: row for row in s.scalars(select(NightClosing).where(NightClosing.night_id.in_(night_ids)))}


def counts_of(closing: NightClosing | None) -> tuple[Any, int, int, int, int]:
    """(closed at or None, files received, archived, quarantined, lots decided) of a night's closing row."""
    if closing is None or closing.how != "closed":
        return None, 0, 0, 0, 0
    return (closing.closed_at_utc, closing.files_received or 0, closing.files_archived or 0,
            closing.files_quarantined or 0, closing.lots_decided or 0)


def of_site(lot_id: Any, site_id: str | None) -> Any:
    """Where-clause: the lot ``lot_id`` (a column) belongs to the workspace ``site_id`` of a shared store.

    A lot belongs to the site whose nights decided it: some decision of it was stored by a night of
    that workspace. A lot decided only by nights from before workspaces had identities belongs to
    every site. ``site_id`` None (a store of one workspace): every lot.
    """
    if site_id is None:
        return true()
    decisions, nights = DecisionRow.__table__.alias("site_decisions"), NightRun.__table__.alias("site_nights")
    decided_by = exists().where(decisions.c.lot_id == lot_id, decisions.c.night_id == nights.c.id)
    return or_(decided_by.where(nights.c.workspace_id == site_id),
               ~decided_by.where(nights.c.workspace_id.is_not(None)))
