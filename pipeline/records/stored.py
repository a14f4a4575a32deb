"""What the store hands out and takes in: frozen records, never its ORM rows (adapter types)."""

from __future__ import annotations

import datetime as dt
from dataclasses import dataclass, field
from typing import Any

from pipeline.records.tables import ControlLimitRow, DecisionRow, InputFile, NightRun
from pipeline.release.chart_view import StoredLimits
from pipeline.release.lot_record import LotResult, StatusChange
from pipeline.release.records import DecisionRecord


@dataclass(frozen=True)
class StoredNight:
    id: int
    started_at_utc: dt.datetime


@dataclass(frozen=True)
class StoredFile:
    """An input file as recorded: archived, quarantined or a duplicate, and where it now lies."""

    night_id: int
    file_name: str
    sha256: str
    status: str  # archived, quarantined, duplicate
    stored_as: str
    received_at_utc: dt.datetime
    reason: str | None = None
    kind: str | None = None
    layout_version: str | None = None


@dataclass(frozen=True)
class StoredDecision:
    """One stored revision of a lot's decision: its record and what the store adds to it."""

    id: int
    lot_id: str
    revision: int
    disposition: str
    fingerprint: str
    decided_by: str
    decided_at_utc: dt.datetime
    record: DecisionRecord
    change_note: str | None = None
    superseded_by: int | None = None


@dataclass(frozen=True)
class StoredEvent:
    """One chained audit event as the store holds it."""

    seq: int
    body: str
    prev_hash: str
    hash: str


@dataclass(frozen=True)
class DecisionWrite:
    """One lot's decision to store: the record, its results' standard errors, chart points and audit events."""

    record: DecisionRecord
    decided_by: str
    night_id: int | None = None
    manufactured_on: str | None = None
    standard_errors: dict[str, float | None] = field(default_factory=dict)
    chart_values: dict[str, float] = field(default_factory=dict)
    change_note: str | None = None
    events: tuple[dict[str, Any], ...] = ()
    extra_points: tuple[tuple[str, str, str, float], ...] = ()  # (chart, attribute, point id, value)
    lot_results: tuple[LotResult, ...] = ()  # the lot record: tonight's new results
    status_changes: tuple[StatusChange, ...] = ()  # and the new standing of earlier ones


@dataclass(frozen=True)
class LimitsWrite:
    """A chart's new limits to store, with their audit events."""

    product_code: str
    attribute: str
    center: float
    sigma: float
    mr_bar: float
    baseline_lots: tuple[str, ...]
    frozen_by: str
    reason: str
    events: tuple[dict[str, Any], ...] = ()
    # True: the chart's first limits (a night's baseline reached); stored only if the chart still has none
    first_only: bool = False


def utc(when: dt.datetime) -> dt.datetime:
    """A stored time as an aware UTC datetime (SQLite gives back naive ones; they were written in UTC)."""
    return when.replace(tzinfo=dt.UTC) if when.tzinfo is None else when.astimezone(dt.UTC)


def night_of(row: NightRun) -> StoredNight:
    return StoredNight(row.id, utc(row.started_at_utc))


def file_of(row: InputFile) -> StoredFile:
    return StoredFile(row.night_id, row.file_name, row.sha256, row.status, row.stored_as,
                      utc(row.received_at_utc), row.reason, row.kind, row.layout_version)


def decision_of(row: DecisionRow, superseded_by: int | None = None) -> StoredDecision:
    """The stored decision; ``superseded_by``: the id of the lot's next revision (found by query, never stored)."""
    return StoredDecision(row.id, row.lot_id, row.revision, row.disposition, row.fingerprint, row.decided_by,
                          utc(row.decided_at_utc), DecisionRecord.from_json(row.record or {}),
                          row.change_note, superseded_by)


def limits_of(row: ControlLimitRow, active: bool) -> StoredLimits:
    """The stored limits; ``active``: the chart's highest version (found by query, never stored)."""
    return StoredLimits(version=row.version, center=row.center, sigma=row.sigma, mr_bar=row.mr_bar,
                        baseline_lots=tuple(row.baseline_lots or ()),
                        frozen_at_utc=utc(row.frozen_at_utc).isoformat(timespec="seconds"),
                        frozen_by=row.frozen_by, reason=row.reason, active=active)
