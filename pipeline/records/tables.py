"""The results store's tables (SQLAlchemy models); only the store and its converters (``stored.py``) use them.

Records are never overwritten: a changed input set for a lot makes a new revision that
supersedes the earlier one, which stays readable ("superseded by" is the next revision, found by
query); a night's end, a chart's newer limits and a LIMS export are new rows too. The record
tables (``RECORD_TABLES``, at the end) carry ``row_sha256`` (``row_hashes.py``) and refuse UPDATE
and DELETE in the database (migration 0004). The schema itself is made by the Alembic
migrations under ``migrations/``; these models must match them.
"""

from __future__ import annotations

import datetime as dt
from typing import Any

from sqlalchemy import JSON, DateTime, Float, ForeignKey, Integer, String, Text, UniqueConstraint
from sqlalchemy.orm import DeclarativeBase, Mapped, mapped_column


class Base(DeclarativeBase):
    pass


class NightRun(Base):
    __tablename__ = "night_runs"
    id: Mapped[int] = mapped_column(Integer, primary_key=True)
    started_at_utc: Mapped[dt.datetime] = mapped_column(DateTime(timezone=True))
    code_version: Mapped[str] = mapped_column(String(40))
    workspace_id: Mapped[str | None] = mapped_column(String(32), nullable=True, index=True)
    row_sha256: Mapped[str | None] = mapped_column(String(64), nullable=True)


class InputFile(Base):
    __tablename__ = "input_files"
    id: Mapped[int] = mapped_column(Integer, primary_key=True)
    night_id: Mapped[int] = mapped_column(ForeignKey("night_runs.id"))
    file_name: Mapped[str] = mapped_column(String(255))
    sha256: Mapped[str] = mapped_column(String(64), index=True)
    kind: Mapped[str | None] = mapped_column(String(40), nullable=True)
    layout_version: Mapped[str | None] = mapped_column(String(20), nullable=True)
    status: Mapped[str] = mapped_column(String(20))  # archived, quarantined, duplicate
    reason: Mapped[str | None] = mapped_column(Text, nullable=True)
    stored_as: Mapped[str] = mapped_column(String(400))
    received_at_utc: Mapped[dt.datetime] = mapped_column(DateTime(timezone=True))
    row_sha256: Mapped[str | None] = mapped_column(String(64), nullable=True)


class Lot(Base):
    __tablename__ = "lots"
    lot_id: Mapped[str] = mapped_column(String(40), primary_key=True)
    product_code: Mapped[str] = mapped_column(String(20), index=True)
    manufactured_on: Mapped[str | None] = mapped_column(String(10), nullable=True)
    first_seen_utc: Mapped[dt.datetime] = mapped_column(DateTime(timezone=True))
    row_sha256: Mapped[str | None] = mapped_column(String(64), nullable=True)


class DecisionRow(Base):
    __tablename__ = "decisions"
    __table_args__ = (UniqueConstraint("lot_id", "revision"),)
    id: Mapped[int] = mapped_column(Integer, primary_key=True)
    lot_id: Mapped[str] = mapped_column(ForeignKey("lots.lot_id"), index=True)
    revision: Mapped[int] = mapped_column(Integer)
    night_id: Mapped[int | None] = mapped_column(ForeignKey("night_runs.id"), nullable=True)
    disposition: Mapped[str] = mapped_column(String(20))
    hold_categories: Mapped[list[str]] = mapped_column(JSON)
    reasons: Mapped[list[str]] = mapped_column(JSON)
    spec_version: Mapped[str] = mapped_column(String(20))
    spec_sha256: Mapped[str] = mapped_column(String(64))
    fingerprint: Mapped[str] = mapped_column(String(64), unique=True)
    decided_by: Mapped[str] = mapped_column(String(120))
    change_note: Mapped[str | None] = mapped_column(Text, nullable=True)
    decided_at_utc: Mapped[dt.datetime] = mapped_column(DateTime(timezone=True))
    record: Mapped[dict[str, Any]] = mapped_column(JSON)
    row_sha256: Mapped[str | None] = mapped_column(String(64), nullable=True)


class ResultRow(Base):
    __tablename__ = "results"
    id: Mapped[int] = mapped_column(Integer, primary_key=True)
    decision_id: Mapped[int] = mapped_column(ForeignKey("decisions.id"), index=True)
    attribute: Mapped[str] = mapped_column(String(40))
    value: Mapped[float | None] = mapped_column(Float, nullable=True)
    value_text: Mapped[str | None] = mapped_column(String(80), nullable=True)
    se: Mapped[float | None] = mapped_column(Float, nullable=True)
    unit: Mapped[str] = mapped_column(String(20))
    reported: Mapped[str | None] = mapped_column(String(40), nullable=True)
    verdict: Mapped[str] = mapped_column(String(20))
    row_sha256: Mapped[str | None] = mapped_column(String(64), nullable=True)


class ControlLimitRow(Base):
    __tablename__ = "control_limits"
    __table_args__ = (UniqueConstraint("product_code", "attribute", "version"),)
    id: Mapped[int] = mapped_column(Integer, primary_key=True)
    product_code: Mapped[str] = mapped_column(String(20))
    attribute: Mapped[str] = mapped_column(String(40))
    version: Mapped[int] = mapped_column(Integer)
    center: Mapped[float] = mapped_column(Float)
    sigma: Mapped[float] = mapped_column(Float)
    mr_bar: Mapped[float] = mapped_column(Float)
    baseline_n: Mapped[int] = mapped_column(Integer)
    baseline_lots: Mapped[list[str]] = mapped_column(JSON)
    frozen_at_utc: Mapped[dt.datetime] = mapped_column(DateTime(timezone=True))
    frozen_by: Mapped[str] = mapped_column(String(120))
    reason: Mapped[str] = mapped_column(Text)
    row_sha256: Mapped[str | None] = mapped_column(String(64), nullable=True)


class AuditEvent(Base):
    """One hash-chained audit record (the decision log's lines are copies of these)."""

    __tablename__ = "audit_events"
    seq: Mapped[int] = mapped_column(Integer, primary_key=True, autoincrement=False)
    time_utc: Mapped[str] = mapped_column(String(32))
    kind: Mapped[str] = mapped_column(String(40), index=True)
    lot_id: Mapped[str | None] = mapped_column(String(40), nullable=True, index=True)
    body: Mapped[str] = mapped_column(Text)
    prev_hash: Mapped[str] = mapped_column(String(64))
    hash: Mapped[str] = mapped_column(String(64), unique=True)


class ChartPoint(Base):
    """A released lot's value on a product/attribute chart, in the order lots were released."""

    __tablename__ = "chart_points"
    __table_args__ = (UniqueConstraint("product_code", "attribute", "lot_id"),)
    id: Mapped[int] = mapped_column(Integer, primary_key=True)
    product_code: Mapped[str] = mapped_column(String(20), index=True)
    attribute: Mapped[str] = mapped_column(String(40))
    lot_id: Mapped[str] = mapped_column(String(40))
    value: Mapped[float] = mapped_column(Float)
    decision_id: Mapped[int] = mapped_column(ForeignKey("decisions.id"))
    row_sha256: Mapped[str | None] = mapped_column(String(64), nullable=True)


# --- append-only records (migration 0004) ----------------------------------------------------------
class NightClosing(Base):
    """A night's end, as a new row: closed with its counts, or found interrupted by a later run."""

    __tablename__ = "night_closings"
    id: Mapped[int] = mapped_column(Integer, primary_key=True)
    night_id: Mapped[int] = mapped_column(ForeignKey("night_runs.id"), unique=True)
    closed_at_utc: Mapped[dt.datetime] = mapped_column(DateTime(timezone=True))
    how: Mapped[str] = mapped_column(String(20))  # closed, interrupted
    files_received: Mapped[int | None] = mapped_column(Integer, nullable=True)
    files_archived: Mapped[int | None] = mapped_column(Integer, nullable=True)
    files_quarantined: Mapped[int | None] = mapped_column(Integer, nullable=True)
    lots_decided: Mapped[int | None] = mapped_column(Integer, nullable=True)
    row_sha256: Mapped[str | None] = mapped_column(String(64), nullable=True)


class LimsExport(Base):
    """A decision written into a LIMS results file (one row per decision exported)."""

    __tablename__ = "lims_exports"
    id: Mapped[int] = mapped_column(Integer, primary_key=True)
    decision_id: Mapped[int] = mapped_column(ForeignKey("decisions.id"), unique=True)
    export_name: Mapped[str] = mapped_column(String(120))
    exported_at_utc: Mapped[dt.datetime] = mapped_column(DateTime(timezone=True))
    row_sha256: Mapped[str | None] = mapped_column(String(64), nullable=True)


# The GMP record tables: each row carries row_sha256, is named with that hash by the audit event of
# its transaction, and may never be changed or deleted. A new record table joins with one line here
# (and its own row_sha256 column and triggers in its migration: see migrations/versions/0004).
RECORD_TABLES: tuple[type[Base], ...] = (
    NightRun, InputFile, Lot, DecisionRow, ResultRow, ControlLimitRow, ChartPoint, NightClosing, LimsExport,
)
# The audit chain itself is append-only too (refused UPDATE/DELETE), but it is the chain, not a chained row.
APPEND_ONLY_TABLES: tuple[str, ...] = (*(t.__tablename__ for t in RECORD_TABLES), AuditEvent.__tablename__)
