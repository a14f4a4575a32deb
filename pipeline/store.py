"""The results store (adapter): SQLAlchemy models; SQLite by default, PostgreSQL by URL.

Decisions are never overwritten: a changed input set for a lot makes a new revision that
supersedes the earlier one, which stays readable.
"""

from __future__ import annotations

import datetime as dt
import json
from collections.abc import Iterator
from contextlib import contextmanager
from typing import Any

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
    func,
    select,
)
from sqlalchemy.exc import SQLAlchemyError
from sqlalchemy.orm import DeclarativeBase, Mapped, Session, mapped_column, sessionmaker

from pipeline.errors import StoreError


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


class Store:
    """Opens the database named by a SQLAlchemy URL and creates its tables when new."""

    def __init__(self, url: str):
        self.url = url
        try:
            self.engine = create_engine(url, future=True)
            Base.metadata.create_all(self.engine)
        except SQLAlchemyError as exc:
            raise StoreError(f"cannot open the results store at {safe_url(url)}: {exc.__class__.__name__}: {exc}") from exc
        self._sessions = sessionmaker(self.engine, expire_on_commit=False)

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

    def latest_decision(self, lot_id: str) -> DecisionRow | None:
        with self.session() as s:
            return s.scalars(select(DecisionRow).where(DecisionRow.lot_id == lot_id)
                             .order_by(DecisionRow.revision.desc()).limit(1)).first()

    def decision_by_fingerprint(self, fingerprint: str) -> DecisionRow | None:
        with self.session() as s:
            return s.scalars(select(DecisionRow).where(DecisionRow.fingerprint == fingerprint)).first()

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
                      baseline_lots: list[str], frozen_by: str, reason: str) -> ControlLimitRow:
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
            return row

    def add_decision(self, *, lot_id: str, product_code: str, manufactured_on: str | None, night_id: int | None,
                     decision: dict[str, Any], results: list[dict[str, Any]], chart_values: dict[str, float],
                     decided_by: str, change_note: str | None = None) -> DecisionRow:
        """Store one lot's decision as a new revision, in one transaction (commit per lot)."""
        with self.session() as s:
            if s.get(Lot, lot_id) is None:
                s.add(Lot(lot_id=lot_id, product_code=product_code, manufactured_on=manufactured_on,
                          first_seen_utc=utcnow()))
                s.flush()
            previous = s.scalars(select(DecisionRow).where(DecisionRow.lot_id == lot_id)
                                 .order_by(DecisionRow.revision.desc()).limit(1)).first()
            row = DecisionRow(
                lot_id=lot_id, revision=(previous.revision + 1) if previous else 1, night_id=night_id,
                disposition=decision["disposition"], hold_categories=list(decision["hold_categories"]),
                reasons=list(decision["reasons"]), spec_version=decision["spec_version"],
                spec_sha256=decision["spec_sha256"], fingerprint=decision["fingerprint"],
                decided_by=decided_by, change_note=change_note, decided_at_utc=utcnow(),
                record=json.loads(json.dumps(decision)),
            )
            s.add(row)
            s.flush()
            if previous is not None:
                previous.superseded_by = row.id
            for result in results:
                value = result.get("value")
                s.add(ResultRow(decision_id=row.id, attribute=result["code"],
                                value=value if isinstance(value, int | float) else None,
                                value_text=value if isinstance(value, str) else None,
                                se=result.get("se"), unit=result.get("unit") or "",
                                reported=result.get("reported"), verdict=result["verdict"]))
            for attribute, value in chart_values.items():
                s.add(ChartPoint(product_code=product_code, attribute=attribute, lot_id=lot_id,
                                 value=value, decision_id=row.id))
            return row


def safe_url(url: str) -> str:
    """The URL with any password hidden, for messages."""
    if "@" in url and "://" in url:
        scheme, rest = url.split("://", 1)
        credentials, host = rest.rsplit("@", 1)
        user = credentials.split(":", 1)[0]
        return f"{scheme}://{user}:***@{host}" if ":" in credentials else url
    return url
