"""Read-only store queries for the reviewer's desk (adapter): nights, current decisions, audit events.

They return the store's frozen records (``stored.py``); the ORM rows never leave this module.
"""

from __future__ import annotations

import datetime as dt
import json
from dataclasses import dataclass
from typing import Any

from sqlalchemy import func, select

from pipeline.records.current import closings, counts_of, is_latest_revision, of_site
from pipeline.records.store import Store
from pipeline.records.stored import StoredDecision, StoredFile, decision_of, file_of, utc
from pipeline.records.tables import AuditEvent, DecisionRow, InputFile, NightRun


@dataclass(frozen=True)
class NightCounts:
    """A night as stored: when, and its counts (received = archived + quarantined once finished)."""

    id: int
    started_at_utc: dt.datetime
    finished_at_utc: dt.datetime | None
    files_received: int
    files_archived: int
    files_quarantined: int
    lots_decided: int


@dataclass(frozen=True)
class TrailEvent:
    """One audit event for reading: its place in the chain and its content."""

    seq: int
    kind: str
    lot_id: str | None
    time_utc: str
    body: dict[str, Any]


def latest_nights(store: Store, limit: int = 5, site_id: str | None = None) -> list[NightCounts]:
    """The last ``limit`` nights (of the site ``site_id`` and those from before identities), newest first."""
    query = select(NightRun).order_by(NightRun.id.desc()).limit(limit)
    if site_id is not None:
        query = query.where((NightRun.workspace_id == site_id) | NightRun.workspace_id.is_(None))
    with store.session() as s:
        rows = list(s.scalars(query))
        ended = closings(s, [r.id for r in rows])
        out = []
        for r in rows:
            finished, received, archived, quarantined, lots = counts_of(ended.get(r.id))
            out.append(NightCounts(r.id, utc(r.started_at_utc), None if finished is None else utc(finished),
                                   received, archived, quarantined, lots))
        return out


def current_decisions(store: Store, *, except_dispositions: tuple[str, ...] = (),
                      site_id: str | None = None) -> list[StoredDecision]:
    """The latest revision of every lot of the site ``site_id`` (None: of every lot), but those of
    ``except_dispositions``, in the order decided."""
    query = select(DecisionRow).where(is_latest_revision(), of_site(DecisionRow.lot_id, site_id)).order_by(DecisionRow.id)
    if except_dispositions:
        query = query.where(DecisionRow.disposition.not_in(except_dispositions))
    with store.session() as s:
        return [decision_of(r) for r in s.scalars(query)]


def current_disposition_counts(store: Store, site_id: str | None = None) -> dict[str, int]:
    """How many lots (of the site ``site_id``) stand at each disposition, counted in the database."""
    with store.session() as s:
        return {str(d): int(n) for d, n in s.execute(
            select(DecisionRow.disposition, func.count(DecisionRow.id))
            .where(is_latest_revision(), of_site(DecisionRow.lot_id, site_id))
            .group_by(DecisionRow.disposition))}


def night_disposition_counts(store: Store, night_id: int) -> dict[str, int]:
    """How many revisions a night stored, by disposition (counted in the database)."""
    with store.session() as s:
        return {str(d): int(n) for d, n in s.execute(
            select(DecisionRow.disposition, func.count(DecisionRow.id)).where(DecisionRow.night_id == night_id)
            .group_by(DecisionRow.disposition))}


def night_file_counts(store: Store, night_id: int) -> tuple[int, int]:
    """(files recorded, files set aside: quarantined or duplicates) of a night, counted in the database."""
    with store.session() as s:
        recorded = s.scalar(select(func.count(InputFile.id)).where(InputFile.night_id == night_id)) or 0
        aside = s.scalar(select(func.count(InputFile.id)).where(InputFile.night_id == night_id,
                                                                InputFile.status != "archived")) or 0
        return int(recorded), int(aside)


def set_aside_files(store: Store, night_ids: list[int]) -> list[StoredFile]:
    """The files these nights set aside (quarantined or duplicates), in the order recorded."""
    if not night_ids:
        return []
    with store.session() as s:
        return [file_of(r) for r in s.scalars(select(InputFile).where(InputFile.night_id.in_(night_ids),
                                                                      InputFile.status != "archived")
                                              .order_by(InputFile.id))]


def trail_events(store: Store, *, lot_id: str | None = None, day_from: dt.date | None = None,
                 day_to: dt.date | None = None, limit: int = 500) -> list[TrailEvent]:
    """Audit events, newest first, of one lot and between two UTC days (inclusive) when given."""
    query = select(AuditEvent).order_by(AuditEvent.seq.desc()).limit(limit)
    if lot_id:
        query = query.where(AuditEvent.lot_id == lot_id)
    if day_from is not None:
        query = query.where(AuditEvent.time_utc >= day_from.isoformat())
    if day_to is not None:
        query = query.where(AuditEvent.time_utc < (day_to + dt.timedelta(days=1)).isoformat())
    with store.session() as s:
        return [TrailEvent(r.seq, r.kind, r.lot_id, r.time_utc, json.loads(r.body)) for r in s.scalars(query)]


def trail_length(store: Store) -> int:
    """The sequence number of the last audit event (0 when none)."""
    with store.session() as s:
        return int(s.scalar(select(AuditEvent.seq).order_by(AuditEvent.seq.desc()).limit(1)) or 0)
