"""The results store (adapter): SQLAlchemy models; SQLite by default, PostgreSQL by URL.

Decisions are never overwritten: a changed input set for a lot makes a new revision that
supersedes the earlier one, which stays readable.
"""

from __future__ import annotations

import datetime as dt
import json
from collections.abc import Iterator
from contextlib import contextmanager
from dataclasses import dataclass
from pathlib import Path
from typing import Any

from alembic import command
from alembic.config import Config
from filelock import FileLock
from sqlalchemy import (
    JSON,
    DateTime,
    Float,
    ForeignKey,
    Integer,
    String,
    Text,
    UniqueConstraint,
    create_engine,
    event,
    func,
    insert,
    select,
    update,
)
from sqlalchemy.exc import SQLAlchemyError
from sqlalchemy.orm import DeclarativeBase, Mapped, Session, mapped_column, sessionmaker

from pipeline.errors import StoreError

MIGRATIONS = Path(__file__).resolve().parent / "migrations"
MIGRATION_LOCK_KEY = 472_901_001
RUN_LOCK_KEY = 472_901_002
AUDIT_LOCK_KEY = 472_901_003


def _sqlite_pragmas(connection: Any, _record: Any) -> None:
    """Write-ahead log: readers never block the writer, and a commit costs one sync, not three."""
    cursor = connection.cursor()
    cursor.execute("PRAGMA journal_mode=WAL")
    cursor.execute("PRAGMA synchronous=NORMAL")
    cursor.execute("PRAGMA busy_timeout=30000")
    cursor.close()


class Base(DeclarativeBase):
    pass


def utcnow() -> dt.datetime:
    return dt.datetime.now(dt.UTC)


class NightRun(Base):
    __tablename__ = "night_runs"
    id: Mapped[int] = mapped_column(Integer, primary_key=True)
    started_at_utc: Mapped[dt.datetime] = mapped_column(DateTime(timezone=True))
    finished_at_utc: Mapped[dt.datetime | None] = mapped_column(DateTime(timezone=True), nullable=True)
    code_version: Mapped[str] = mapped_column(String(40))
    files_received: Mapped[int] = mapped_column(Integer, default=0)
    files_archived: Mapped[int] = mapped_column(Integer, default=0)
    files_quarantined: Mapped[int] = mapped_column(Integer, default=0)
    lots_decided: Mapped[int] = mapped_column(Integer, default=0)


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


class Lot(Base):
    __tablename__ = "lots"
    lot_id: Mapped[str] = mapped_column(String(40), primary_key=True)
    product_code: Mapped[str] = mapped_column(String(20), index=True)
    manufactured_on: Mapped[str | None] = mapped_column(String(10), nullable=True)
    first_seen_utc: Mapped[dt.datetime] = mapped_column(DateTime(timezone=True))


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
    superseded_by: Mapped[int | None] = mapped_column(ForeignKey("decisions.id"), nullable=True)
    lims_export: Mapped[str | None] = mapped_column(String(120), nullable=True)


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
    active: Mapped[int] = mapped_column(Integer, default=1)


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


@dataclass(frozen=True)
class DecisionWrite:
    """One lot's decision to store: the record, its results, chart points and audit events."""

    lot_id: str
    product_code: str
    manufactured_on: str | None
    night_id: int | None
    decision: dict[str, Any]
    results: tuple[dict[str, Any], ...]
    chart_values: dict[str, float]
    decided_by: str
    change_note: str | None = None
    events: tuple[dict[str, Any], ...] = ()
    extra_points: tuple[tuple[str, str, str, float], ...] = ()


class Store:
    """Opens the database named by a SQLAlchemy URL and creates its tables when new."""

    def __init__(self, url: str):
        self.url = url
        try:
            self.engine = create_engine(url, future=True)
            if self.engine.dialect.name == "sqlite":
                event.listen(self.engine, "connect", _sqlite_pragmas)
            self.migrate()
        except SQLAlchemyError as exc:
            raise StoreError(f"cannot open the results store at {safe_url(url)}: {exc.__class__.__name__}: {exc}") from exc
        self._sessions = sessionmaker(self.engine, expire_on_commit=False)

    @property
    def is_postgresql(self) -> bool:
        return self.engine.dialect.name == "postgresql"

    def migrate(self, revision: str = "head") -> None:
        """Bring the database to ``revision`` with Alembic; one process at a time."""
        config = Config()
        config.set_main_option("script_location", str(MIGRATIONS))
        if self.is_postgresql:
            with self.engine.begin() as connection:
                connection.exec_driver_sql(f"SELECT pg_advisory_xact_lock({MIGRATION_LOCK_KEY})")
                config.attributes["connection"] = connection
                command.upgrade(config, revision)
            return
        database = self.engine.url.database
        lock = FileLock(f"{database}.migrate.lock") if database and database != ":memory:" else None
        if lock is not None:
            Path(database).parent.mkdir(parents=True, exist_ok=True)
            lock.acquire(timeout=60)
        try:
            with self.engine.begin() as connection:
                config.attributes["connection"] = connection
                command.upgrade(config, revision)
        finally:
            if lock is not None:
                lock.release()

    @contextmanager
    def session(self) -> Iterator[Session]:
        session = self._sessions()
        try:
            yield session
            session.commit()
        except SQLAlchemyError as exc:
            session.rollback()
            raise StoreError(f"the results store refused a write: {exc.__class__.__name__}: {exc}") from exc
        except BaseException:
            session.rollback()
            raise
        finally:
            session.close()

    # --- reads -------------------------------------------------------------------------
    def known_file(self, sha256: str) -> InputFile | None:
        with self.session() as s:
            return s.scalars(select(InputFile).where(InputFile.sha256 == sha256,
                                                     InputFile.status == "archived").limit(1)).first()

    def archived_files(self, sha256s: list[str]) -> dict[str, InputFile]:
        """Files already archived with these SHA-256 values (chunked IN queries)."""
        out: dict[str, InputFile] = {}
        with self.session() as s:
            for start in range(0, len(sha256s), 500):
                rows = s.scalars(select(InputFile).where(InputFile.sha256.in_(sha256s[start:start + 500]),
                                                         InputFile.status == "archived"))
                for row in rows:
                    out.setdefault(row.sha256, row)
        return out

    def latest_decision(self, lot_id: str) -> DecisionRow | None:
        with self.session() as s:
            return s.scalars(select(DecisionRow).where(DecisionRow.lot_id == lot_id)
                             .order_by(DecisionRow.revision.desc()).limit(1)).first()

    def decision_by_fingerprint(self, fingerprint: str) -> DecisionRow | None:
        with self.session() as s:
            return s.scalars(select(DecisionRow).where(DecisionRow.fingerprint == fingerprint)).first()

    def unfinished_nights(self) -> list[NightRun]:
        with self.session() as s:
            return list(s.scalars(select(NightRun).where(NightRun.finished_at_utc.is_(None)).order_by(NightRun.id)))

    def files_of_nights(self, night_ids: list[int]) -> list[InputFile]:
        if not night_ids:
            return []
        with self.session() as s:
            return list(s.scalars(select(InputFile).where(InputFile.night_id.in_(night_ids)).order_by(InputFile.id)))

    def known_fingerprints(self, fingerprints: list[str]) -> dict[str, DecisionRow]:
        """Decisions already made with these fingerprints (chunked IN queries, no scan)."""
        out: dict[str, DecisionRow] = {}
        with self.session() as s:
            for start in range(0, len(fingerprints), 500):
                chunk = fingerprints[start:start + 500]
                for row in s.scalars(select(DecisionRow).where(DecisionRow.fingerprint.in_(chunk))):
                    out[row.fingerprint] = row
        return out

    def decisions(self, lot_id: str | None = None) -> list[DecisionRow]:
        with self.session() as s:
            query = select(DecisionRow).order_by(DecisionRow.id)
            if lot_id is not None:
                query = query.where(DecisionRow.lot_id == lot_id)
            return list(s.scalars(query))

    def chart_points(self, product_code: str, attribute: str, tail: int | None = None) -> list[ChartPoint]:
        """Released lots on a chart, oldest first; only the last ``tail`` when given (no full scan)."""
        with self.session() as s:
            query = select(ChartPoint).where(ChartPoint.product_code == product_code,
                                             ChartPoint.attribute == attribute)
            if tail is None:
                return list(s.scalars(query.order_by(ChartPoint.id)))
            return list(reversed(list(s.scalars(query.order_by(ChartPoint.id.desc()).limit(tail)))))

    def chart_count(self, product_code: str, attribute: str) -> int:
        with self.session() as s:
            return int(s.scalar(select(func.count(ChartPoint.id)).where(
                ChartPoint.product_code == product_code, ChartPoint.attribute == attribute)) or 0)

    def active_limits(self, product_code: str, attribute: str) -> ControlLimitRow | None:
        with self.session() as s:
            return s.scalars(select(ControlLimitRow).where(ControlLimitRow.product_code == product_code,
                                                           ControlLimitRow.attribute == attribute,
                                                           ControlLimitRow.active == 1)
                             .order_by(ControlLimitRow.version.desc()).limit(1)).first()

    def files(self, night_id: int | None = None) -> list[InputFile]:
        with self.session() as s:
            query = select(InputFile).order_by(InputFile.id)
            if night_id is not None:
                query = query.where(InputFile.night_id == night_id)
            return list(s.scalars(query))

    # --- writes ------------------------------------------------------------------------
    def start_night(self, code_version: str) -> int:
        with self.session() as s:
            night = NightRun(started_at_utc=utcnow(), code_version=code_version)
            s.add(night)
            s.flush()
            return night.id

    def finish_night(self, night_id: int, **counts: int) -> None:
        with self.session() as s:
            night = s.get(NightRun, night_id)
            assert night is not None
            for key, value in counts.items():
                setattr(night, key, value)
            night.finished_at_utc = utcnow()

    def record_file(self, night_id: int, **fields: Any) -> None:
        with self.session() as s:
            s.add(InputFile(night_id=night_id, received_at_utc=utcnow(), **fields))

    def freeze_limits(self, product_code: str, attribute: str, center: float, sigma: float, mr_bar: float,
                      baseline_lots: list[str], frozen_by: str, reason: str,
                      events: list[dict[str, Any]] | None = None) -> ControlLimitRow:
        """A new version of a chart's limits (earlier ones deactivated), with its audit event."""
        with self.session() as s:
            current = s.scalar(select(func.max(ControlLimitRow.version)).where(
                ControlLimitRow.product_code == product_code, ControlLimitRow.attribute == attribute)) or 0
            for row in s.scalars(select(ControlLimitRow).where(ControlLimitRow.product_code == product_code,
                                                               ControlLimitRow.attribute == attribute)):
                row.active = 0
            row = ControlLimitRow(product_code=product_code, attribute=attribute, version=current + 1,
                                  center=center, sigma=sigma, mr_bar=mr_bar, baseline_n=len(baseline_lots),
                                  baseline_lots=baseline_lots, frozen_at_utc=utcnow(), frozen_by=frozen_by,
                                  reason=reason, active=1)
            s.add(row)
            s.flush()
            self.chain_events(s, [{**e, "version": row.version, "previous_version": current or None}
                                  for e in (events or [])])
            return row

    def chain_events(self, session: Session, events: list[dict[str, Any]]) -> list[dict[str, Any]]:
        """Chain audit ``events`` after the last stored one, inside the caller's transaction."""
        from pipeline.records import ledger

        if not events:
            return []
        if self.is_postgresql:
            session.connection().exec_driver_sql(f"SELECT pg_advisory_xact_lock({AUDIT_LOCK_KEY})")
        last = session.scalars(select(AuditEvent).order_by(AuditEvent.seq.desc()).limit(1)).first()
        chained = ledger.chain(events, prev_hash=last.hash if last else ledger.GENESIS,
                               start_seq=(last.seq + 1) if last else 1)
        session.flush()
        session.execute(insert(AuditEvent), [
            {"seq": record["seq"], "time_utc": str(record.get("time_utc", "")), "kind": record["kind"],
             "lot_id": record.get("lot_id"), "body": ledger.canonical_json(record), "prev_hash": record["prev_hash"],
             "hash": record["hash"]} for record in chained])
        return chained

    def add_events(self, events: list[dict[str, Any]]) -> list[dict[str, Any]]:
        with self.session() as s:
            return self.chain_events(s, events)

    def add_decision(self, *, lot_id: str, product_code: str, manufactured_on: str | None, night_id: int | None,
                     decision: dict[str, Any], results: list[dict[str, Any]], chart_values: dict[str, float],
                     decided_by: str, change_note: str | None = None,
                     events: list[dict[str, Any]] | None = None,
                     extra_points: tuple[tuple[str, str, str, float], ...] = ()) -> DecisionRow:
        """Store one lot's decision as a new revision with its audit events, in one transaction."""
        return self.add_decisions([DecisionWrite(
            lot_id=lot_id, product_code=product_code, manufactured_on=manufactured_on, night_id=night_id,
            decision=decision, results=tuple(results), chart_values=dict(chart_values), decided_by=decided_by,
            change_note=change_note, events=tuple(events or ()), extra_points=tuple(extra_points))])[0]

    def add_decisions(self, writes: list[DecisionWrite]) -> list[DecisionRow]:
        """Store several lots' decisions, each as a new revision with its audit events, in ONE transaction.

        All or nothing: a failure (or a kill) stores none of them. Lots and latest revisions are
        read with one query per 500 lots, rows are inserted in batches, and the audit events of
        every lot are chained after one read of the chain's head, in the order of ``writes``.
        """
        if not writes:
            return []
        with self.session() as s:
            lot_ids = list(dict.fromkeys(w.lot_id for w in writes))
            known_lots: set[str] = set()
            latest: dict[str, DecisionRow] = {}
            for start in range(0, len(lot_ids), 500):
                chunk = lot_ids[start:start + 500]
                known_lots.update(s.scalars(select(Lot.lot_id).where(Lot.lot_id.in_(chunk))))
                for row in s.scalars(select(DecisionRow).where(DecisionRow.lot_id.in_(chunk))
                                     .order_by(DecisionRow.lot_id, DecisionRow.revision)):
                    latest[row.lot_id] = row
            new_lots = []
            for w in writes:
                if w.lot_id not in known_lots:
                    known_lots.add(w.lot_id)
                    new_lots.append(Lot(lot_id=w.lot_id, product_code=w.product_code,
                                        manufactured_on=w.manufactured_on, first_seen_utc=utcnow()))
            s.add_all(new_lots)
            s.flush()
            rows: list[DecisionRow] = []
            for w in writes:
                previous = latest.get(w.lot_id)
                d = w.decision
                row = DecisionRow(
                    lot_id=w.lot_id, revision=(previous.revision + 1) if previous else 1, night_id=w.night_id,
                    disposition=d["disposition"], hold_categories=list(d["hold_categories"]),
                    reasons=list(d["reasons"]), spec_version=d["spec_version"], spec_sha256=d["spec_sha256"],
                    fingerprint=d["fingerprint"], decided_by=w.decided_by, change_note=w.change_note,
                    decided_at_utc=utcnow(), record=json.loads(json.dumps(d)))
                s.add(row)
                if previous is not None:
                    s.flush()  # the same lot twice in one batch: the later revision needs the earlier id
                latest[w.lot_id] = row
                rows.append((row, previous))
            s.flush()
            results: list[dict[str, Any]] = []
            points: list[dict[str, Any]] = []
            events: list[dict[str, Any]] = []
            for w, (row, previous) in zip(writes, rows, strict=True):
                if previous is not None:
                    previous.superseded_by = row.id
                for result in w.results:
                    value = result.get("value")
                    results.append({"decision_id": row.id, "attribute": result["code"],
                                    "value": value if isinstance(value, int | float) else None,
                                    "value_text": value if isinstance(value, str) else None,
                                    "se": result.get("se"), "unit": result.get("unit") or "",
                                    "reported": result.get("reported"), "verdict": result["verdict"]})
                points += [{"product_code": w.product_code, "attribute": attribute, "lot_id": w.lot_id,
                            "value": value, "decision_id": row.id} for attribute, value in w.chart_values.items()]
                points += [{"product_code": chart_code, "attribute": attribute, "lot_id": point_id, "value": value,
                            "decision_id": row.id} for chart_code, attribute, point_id, value in w.extra_points]
                events.extend({**e, "revision": row.revision} for e in w.events)
            s.flush()
            for model, values in ((ResultRow, results), (ChartPoint, points)):
                if values:
                    s.execute(insert(model), values)  # one multi-row statement per table, not one per row
            self.chain_events(s, events)
            return [row for row, _ in rows]

    def record_files(self, night_id: int, files: list[dict[str, Any]], events: list[dict[str, Any]]) -> None:
        with self.session() as s:
            if files:
                now = utcnow()
                s.execute(insert(InputFile), [{"night_id": night_id, "received_at_utc": now, **fields}
                                              for fields in files])
            self.chain_events(s, events)

    def unexported_decisions(self) -> list[DecisionRow]:
        with self.session() as s:
            return list(s.scalars(select(DecisionRow).where(DecisionRow.lims_export.is_(None)).order_by(DecisionRow.id)))

    def unexported_decision_ids(self) -> list[int]:
        with self.session() as s:
            return list(s.scalars(select(DecisionRow.id).where(DecisionRow.lims_export.is_(None))
                                  .order_by(DecisionRow.id)))

    def decisions_by_id(self, decision_ids: list[int]) -> list[DecisionRow]:
        """These decisions, in the order of ``decision_ids`` (read in chunks by the caller to bound memory)."""
        with self.session() as s:
            rows = {row.id: row for row in s.scalars(select(DecisionRow).where(DecisionRow.id.in_(decision_ids)))}
        return [rows[i] for i in decision_ids]

    def mark_exported(self, decision_ids: list[int], export_name: str, events: list[dict[str, Any]]) -> None:
        with self.session() as s:
            for start in range(0, len(decision_ids), 500):  # an UPDATE, not the rows loaded and written back
                s.execute(update(DecisionRow).where(DecisionRow.id.in_(decision_ids[start:start + 500]))
                          .values(lims_export=export_name).execution_options(synchronize_session=False))
            self.chain_events(s, events)

    def previous_decisions(self, lot_ids: list[str]) -> dict[str, DecisionRow]:
        """The latest decision of each lot that has one (one query for the night)."""
        if not lot_ids:
            return {}
        out: dict[str, DecisionRow] = {}
        with self.session() as s:
            for start in range(0, len(lot_ids), 500):
                rows = s.scalars(select(DecisionRow).where(DecisionRow.lot_id.in_(lot_ids[start:start + 500]))
                                 .order_by(DecisionRow.lot_id, DecisionRow.revision))
                out.update({row.lot_id: row for row in rows})
        return out


def safe_url(url: str) -> str:
    """The URL with any password hidden, for messages."""
    if "@" in url and "://" in url:
        scheme, rest = url.split("://", 1)
        credentials, host = rest.rsplit("@", 1)
        user = credentials.split(":", 1)[0]
        return f"{scheme}://{user}:***@{host}" if ":" in credentials else url
    return url
