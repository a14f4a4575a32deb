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


# --- the reviewer's desk: accounts and what happens to them (migration 0006) -------------------
class DeskUser(Base):
    """A person's desk account, written once: login, role, Argon2 password hash, and the person's
    signing identity re-encrypted under the desk password (a file under keys/desk/, its SHA-256 here).

    Nothing about an account is ever updated: failures, locks, unlocks and sign-ins are rows of
    ``desk_account_events``.
    """

    __tablename__ = "desk_users"
    id: Mapped[int] = mapped_column(Integer, primary_key=True)
    login: Mapped[str] = mapped_column(String(60), unique=True)
    printed_name: Mapped[str] = mapped_column(String(120))
    role: Mapped[str] = mapped_column(String(20))
    password_hash: Mapped[str] = mapped_column(String(200))
    key_file: Mapped[str | None] = mapped_column(String(200), nullable=True)
    key_sha256: Mapped[str | None] = mapped_column(String(64), nullable=True)
    signer_certificate_sha256: Mapped[str | None] = mapped_column(String(64), nullable=True)
    created_at_utc: Mapped[dt.datetime] = mapped_column(DateTime(timezone=True))
    created_by: Mapped[str] = mapped_column(String(120))
    row_sha256: Mapped[str | None] = mapped_column(String(64), nullable=True)


class DeskAccountEvent(Base):
    """One thing that happened to a desk account (append-only): a sign-in, a failure, a lock, an unlock."""

    __tablename__ = "desk_account_events"
    id: Mapped[int] = mapped_column(Integer, primary_key=True)
    user_id: Mapped[int] = mapped_column(ForeignKey("desk_users.id"), index=True)
    kind: Mapped[str] = mapped_column(String(30))
    at_utc: Mapped[dt.datetime] = mapped_column(DateTime(timezone=True))
    detail: Mapped[str | None] = mapped_column(Text, nullable=True)
    row_sha256: Mapped[str | None] = mapped_column(String(64), nullable=True)


class DeskCredentials(Base):
    """A desk account's password (Argon2 hash) and sealed signing identity from now on (migration 0008).

    The person changed their own password (``changed``: the key re-sealed under the new one) or an
    administrator set one (``reset``: the key cannot be opened without the old password, so it is
    re-imported from the person's PKCS#12 or the account keeps none). The latest row of an account
    is in force; with none, the account's own row is.
    """

    __tablename__ = "desk_credentials"
    id: Mapped[int] = mapped_column(Integer, primary_key=True)
    user_id: Mapped[int] = mapped_column(ForeignKey("desk_users.id"), index=True)
    kind: Mapped[str] = mapped_column(String(20))
    password_hash: Mapped[str] = mapped_column(String(200))
    key_file: Mapped[str | None] = mapped_column(String(200), nullable=True)
    key_sha256: Mapped[str | None] = mapped_column(String(64), nullable=True)
    signer_certificate_sha256: Mapped[str | None] = mapped_column(String(64), nullable=True)
    set_at_utc: Mapped[dt.datetime] = mapped_column(DateTime(timezone=True))
    set_by: Mapped[str] = mapped_column(String(120))
    row_sha256: Mapped[str | None] = mapped_column(String(64), nullable=True)


# --- the lot record (migration 0005): results across nights, investigations, documents' status ---------------
# Append-only: a result's new standing (superseded, invalidated) is a new row naming the row it
# changes (``replaces``); an investigation outcome and a document's new status are rows of their own.


class LotResultRow(Base):
    """One result of a lot (``replaces`` empty), or a new standing of an earlier one (``replaces`` its id)."""

    __tablename__ = "lot_results"
    id: Mapped[int] = mapped_column(Integer, primary_key=True)
    lot_id: Mapped[str] = mapped_column(String(40), index=True)
    attribute: Mapped[str] = mapped_column(String(40))
    status: Mapped[str] = mapped_column(String(20))
    replaces: Mapped[int | None] = mapped_column(ForeignKey("lot_results.id"), nullable=True)
    night_id: Mapped[int | None] = mapped_column(ForeignKey("night_runs.id"), nullable=True)
    decision_id: Mapped[int | None] = mapped_column(ForeignKey("decisions.id"), nullable=True, index=True)
    verdict: Mapped[str | None] = mapped_column(String(20), nullable=True)
    value: Mapped[float | None] = mapped_column(Float, nullable=True)
    value_text: Mapped[str | None] = mapped_column(String(80), nullable=True)
    reported: Mapped[str | None] = mapped_column(String(40), nullable=True)
    unit: Mapped[str | None] = mapped_column(String(20), nullable=True)
    se: Mapped[float | None] = mapped_column(Float, nullable=True)
    tested_on: Mapped[str | None] = mapped_column(String(10), nullable=True)
    source: Mapped[str | None] = mapped_column(String(120), nullable=True)
    method: Mapped[str | None] = mapped_column(String(80), nullable=True)
    plate_id: Mapped[str | None] = mapped_column(String(40), nullable=True)
    analyst: Mapped[str | None] = mapped_column(String(120), nullable=True)
    files: Mapped[dict[str, str] | None] = mapped_column(JSON, nullable=True)
    reasons: Mapped[list[str] | None] = mapped_column(JSON, nullable=True)
    reference: Mapped[str | None] = mapped_column(String(40), nullable=True)
    recorded_by: Mapped[str] = mapped_column(String(120))
    recorded_at_utc: Mapped[dt.datetime] = mapped_column(DateTime(timezone=True))
    row_sha256: Mapped[str | None] = mapped_column(String(64), nullable=True)


class InvestigationRow(Base):
    """A signed outcome of an out-of-specification investigation on one recorded result."""

    __tablename__ = "investigations"
    id: Mapped[int] = mapped_column(Integer, primary_key=True)
    lot_id: Mapped[str] = mapped_column(String(40), index=True)
    attribute: Mapped[str] = mapped_column(String(40))
    result_id: Mapped[int] = mapped_column(ForeignKey("lot_results.id"))
    outcome: Mapped[str] = mapped_column(String(60))
    reference: Mapped[str] = mapped_column(String(40))
    reason: Mapped[str] = mapped_column(Text)
    retest_plan: Mapped[str] = mapped_column(Text)
    decided_by: Mapped[str] = mapped_column(String(120))
    signature: Mapped[dict[str, Any]] = mapped_column(JSON)
    recorded_at_utc: Mapped[dt.datetime] = mapped_column(DateTime(timezone=True))
    row_sha256: Mapped[str | None] = mapped_column(String(64), nullable=True)


class DocumentStatusRow(Base):
    """A new standing of a lot's document (today: a certificate superseded by a later revision)."""

    __tablename__ = "document_status"
    id: Mapped[int] = mapped_column(Integer, primary_key=True)
    file: Mapped[str] = mapped_column(String(255), index=True)
    sha256: Mapped[str] = mapped_column(String(64))
    lot_id: Mapped[str] = mapped_column(String(40))
    revision: Mapped[int] = mapped_column(Integer)
    status: Mapped[str] = mapped_column(String(20))
    superseded_by_revision: Mapped[int | None] = mapped_column(Integer, nullable=True)
    reason: Mapped[str] = mapped_column(Text)
    recorded_at_utc: Mapped[dt.datetime] = mapped_column(DateTime(timezone=True))
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
    LotResultRow, InvestigationRow, DocumentStatusRow,  # the lot record (migrations 0005, 0007)
    DeskUser, DeskAccountEvent,  # the desk's accounts and what happens to them (migrations 0006, 0007)
    DeskCredentials,  # a desk account's password and sealed key after a change or a reset (migration 0008)
)
# The audit chain itself is append-only too (refused UPDATE/DELETE), but it is the chain, not a chained row.
APPEND_ONLY_TABLES: tuple[str, ...] = (*(t.__tablename__ for t in RECORD_TABLES), AuditEvent.__tablename__)
