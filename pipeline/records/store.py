"""The results store (adapter): SQLite by default, PostgreSQL by URL; runs the migrations on open.

Its methods take and return frozen records (``pipeline.records.stored``, ``DecisionRecord``,
the chart types); its ORM rows (``pipeline.records.tables``) never leave it.
"""

from __future__ import annotations

import datetime as dt
from collections.abc import Callable, Iterator
from contextlib import contextmanager
from typing import Any, ClassVar

from sqlalchemy import exists, func, insert, select, text
from sqlalchemy.exc import SQLAlchemyError
from sqlalchemy.orm import Session, sessionmaker

from pipeline.errors import StoreError
from pipeline.records import clock, row_hashes
from pipeline.records.current import is_latest_revision, of_site
from pipeline.records.database import migrate, open_engine, safe_url
from pipeline.records.lot_record_store import write_decision_rows
from pipeline.records.stored import (
    DecisionWrite,
    LimitsWrite,
    StoredDecision,
    StoredEvent,
    StoredFile,
    StoredNight,
    decision_of,
    file_of,
    limits_of,
    night_of,
)
from pipeline.records.tables import (
    AuditEvent,
    ChartPoint,
    ControlLimitRow,
    DecisionRow,
    InputFile,
    LimsExport,
    Lot,
    NightClosing,
    NightRun,
    ResultRow,
)
from pipeline.release.chart_view import ReleasedPoint, StoredLimits
from pipeline.vocabulary import Disposition

NIGHTS_LOCK_KEY = 472_901_002  # held while a night is started: one workspace claims the store at a time
AUDIT_LOCK_KEY = 472_901_003
CHART_LOCK_CLASS = 472_902  # first key of a chart's two-key lock while its limits are frozen; the second its name's hash
CLOCK_TOLERANCE_MINUTES = 5.0  # an event may be this much earlier than the chain's head (clocks drift)
CHUNK = 500  # values per IN (...) query


def utcnow() -> dt.datetime:
    return dt.datetime.now(dt.UTC)


def _chunks(values: list[Any]) -> Iterator[list[Any]]:
    for start in range(0, len(values), CHUNK):
        yield values[start:start + CHUNK]


class Store:
    """Opens the database named by a SQLAlchemy URL and creates its tables when new."""

    def __init__(self, url: str, *, clock_tolerance_minutes: float = CLOCK_TOLERANCE_MINUTES):
        self.url = url
        self.clock_tolerance = dt.timedelta(minutes=clock_tolerance_minutes)
        try:
            self.engine = open_engine(url)
            migrate(self.engine)
        except SQLAlchemyError as exc:
            raise StoreError(f"cannot open the results store at {safe_url(url)}: {exc.__class__.__name__}: {exc}") from exc
        self._sessions = sessionmaker(self.engine, expire_on_commit=False)
        row_hashes.watch(self._sessions)

    _commit_checks: ClassVar[dict[str, Callable[[], None]]] = {}  # per URL: the flow opens its own Store

    def set_commit_check(self, check: Callable[[], None] | None) -> None:
        """Call ``check`` (the run lock's) before every commit on this database in this process; None: no more."""
        if check is None:
            Store._commit_checks.pop(self.url, None)
        else:
            Store._commit_checks[self.url] = check

    @property
    def is_postgresql(self) -> bool:
        return self.engine.dialect.name == "postgresql"

    @contextmanager
    def session(self) -> Iterator[Session]:
        session = self._sessions()
        try:
            yield session
            session.flush()
            if rows := row_hashes.take_pending(session):  # the rows written, named with their hashes
                self.chain_events(session, [{"kind": row_hashes.ROWS_EVENT,
                                             "time_utc": utcnow().isoformat(timespec="milliseconds"), "rows": rows}])
            if (check := Store._commit_checks.get(self.url)) is not None:
                check()  # raises when the night lost its lock: nothing of this session is committed
            session.commit()
        except SQLAlchemyError as exc:
            session.rollback()
            raise StoreError(f"the results store refused a write: {exc.__class__.__name__}: {exc}") from exc
        except BaseException:
            session.rollback()
            raise
        finally:
            session.close()

    # --- nights and files ----------------------------------------------------------------
    def start_night(self, code_version: str, workspace_id: str | None = None, *, shared: bool = False) -> int:
        """A new night of the workspace ``workspace_id`` (None: of none); refused when the store is another's."""
        with self.session() as s:
            if self.is_postgresql:
                s.connection().exec_driver_sql(f"SELECT pg_advisory_xact_lock({NIGHTS_LOCK_KEY})")
            if workspace_id is not None:
                self._check_workspace(s, workspace_id, shared)
            night = NightRun(started_at_utc=utcnow(), code_version=code_version, workspace_id=workspace_id)
            s.add(night)
            s.flush()
            return night.id

    def check_workspace(self, workspace_id: str, *, shared: bool = False) -> None:
        """Refuse a workspace whose nights this store must not hold (see ``_check_workspace``)."""
        with self.session() as s:
            self._check_workspace(s, workspace_id, shared)

    def _check_workspace(self, s: Session, workspace_id: str, shared: bool) -> None:
        """A store not declared shared holds the nights of one workspace (nights before identities count for none)."""
        if shared:
            return
        other = s.scalar(select(NightRun).where(NightRun.workspace_id.is_not(None),
                                                NightRun.workspace_id != workspace_id).limit(1))
        if other is not None:
            raise StoreError(
                f"the results store at {safe_url(self.url)} holds the nights of another workspace (identity "
                f"{other.workspace_id}, night {other.id}); this workspace's identity is {workspace_id}. "
                "Point this workspace at its own store, or, if the plant's sites share this store on purpose, "
                "set 'store_shared: true' in every sharing workspace's workspace.yaml (lot ids must then be "
                "unique across the sites)")

    def finish_night(self, night_id: int, how: str = "closed", **counts: int) -> None:
        """The night's end as a new row (closed with its counts, or found interrupted); never an UPDATE."""
        with self.session() as s:
            if s.get(NightRun, night_id) is None:
                raise StoreError(f"night {night_id} is not in the results store")
            s.add(NightClosing(night_id=night_id, closed_at_utc=utcnow(), how=how, **counts))

    def unfinished_nights(self, workspace_id: str) -> list[StoredNight]:
        """This workspace's nights that never finished (and those of before workspace identities)."""
        with self.session() as s:
            mine = (NightRun.workspace_id == workspace_id) | NightRun.workspace_id.is_(None)
            closed = exists().where(NightClosing.night_id == NightRun.id)
            return [night_of(n) for n in s.scalars(select(NightRun).where(~closed, mine).order_by(NightRun.id))]

    def record_files(self, night_id: int, files: list[dict[str, Any]], events: list[dict[str, Any]]) -> None:
        """Input files (name, SHA-256, status, reason, where stored) and their audit events, in one transaction."""
        with self.session() as s:
            if files:
                now = utcnow()
                row_hashes.insert_rows(s, InputFile, [{"night_id": night_id, "received_at_utc": now, **fields}
                                                      for fields in files])
            self.chain_events(s, events)

    def files(self, night_id: int | None = None) -> list[StoredFile]:
        return self.files_of_nights(None if night_id is None else [night_id])

    def files_of_nights(self, night_ids: list[int] | None) -> list[StoredFile]:
        """The files recorded by these nights (every night: None), in the order recorded."""
        if night_ids == []:
            return []
        with self.session() as s:
            query = select(InputFile).order_by(InputFile.id)
            if night_ids is not None:
                query = query.where(InputFile.night_id.in_(night_ids))
            return [file_of(row) for row in s.scalars(query)]

    def archived_files(self, sha256s: list[str]) -> dict[str, StoredFile]:
        """Files already archived with these SHA-256 values, the first of each."""
        out: dict[str, StoredFile] = {}
        with self.session() as s:
            for chunk in _chunks(sha256s):
                for row in s.scalars(select(InputFile).where(InputFile.sha256.in_(chunk), InputFile.status == "archived")
                                     .order_by(InputFile.id)):
                    out.setdefault(row.sha256, file_of(row))
        return out

    # --- decisions -------------------------------------------------------------------------
    def decisions(self, lot_id: str | None = None) -> list[StoredDecision]:
        """Every revision (of one lot, or of all), in the order stored."""
        with self.session() as s:
            query = select(DecisionRow).order_by(DecisionRow.id)
            if lot_id is not None:
                query = query.where(DecisionRow.lot_id == lot_id)
            return self._with_successors(s, list(s.scalars(query)))

    @staticmethod
    def _with_successors(s: Session, rows: list[DecisionRow]) -> list[StoredDecision]:
        """Each row as a StoredDecision naming the revision that superseded it (the lot's next), if any."""
        following: dict[tuple[str, int], int] = {}
        for chunk in _chunks(list({row.lot_id for row in rows})):
            for lot_id, revision, decision_id in s.execute(select(DecisionRow.lot_id, DecisionRow.revision,
                                                                  DecisionRow.id).where(DecisionRow.lot_id.in_(chunk))):
                following[(lot_id, revision - 1)] = decision_id
        return [decision_of(row, following.get((row.lot_id, row.revision))) for row in rows]

    def latest_decision(self, lot_id: str) -> StoredDecision | None:
        return self.previous_decisions([lot_id]).get(lot_id)

    def previous_decisions(self, lot_ids: list[str]) -> dict[str, StoredDecision]:
        """The latest decision of each lot that has one (one query per 500 lots)."""
        out: dict[str, StoredDecision] = {}
        with self.session() as s:
            for chunk in _chunks(lot_ids):
                rows = s.scalars(select(DecisionRow).where(DecisionRow.lot_id.in_(chunk), is_latest_revision()))
                out.update({row.lot_id: decision_of(row) for row in rows})
        return out

    def known_fingerprints(self, fingerprints: list[str]) -> dict[str, StoredDecision]:
        """Decisions already made with these fingerprints (one query per 500, no scan)."""
        out: dict[str, StoredDecision] = {}
        with self.session() as s:
            for chunk in _chunks(fingerprints):
                out.update({row.fingerprint: decision_of(row)
                            for row in s.scalars(select(DecisionRow).where(DecisionRow.fingerprint.in_(chunk)))})
        return out

    def decisions_of_lots(self, lot_ids: list[str]) -> list[StoredDecision]:
        """Every revision of these lots, in the order stored (one query per 500 lots)."""
        with self.session() as s:
            return self._with_successors(s, [row for chunk in _chunks(lot_ids) for row in s.scalars(
                select(DecisionRow).where(DecisionRow.lot_id.in_(chunk)).order_by(DecisionRow.id))])

    def decisions_by_id(self, decision_ids: list[int]) -> list[StoredDecision]:
        """These decisions, in the order of ``decision_ids`` (read in chunks by the caller to bound memory)."""
        with self.session() as s:
            rows = {row.id: row for row in s.scalars(select(DecisionRow).where(DecisionRow.id.in_(decision_ids)))}
            return [decision_of(rows[i]) for i in decision_ids]

    def unexported_decision_ids(self, site_id: str | None = None) -> list[int]:
        """Decisions not yet in a LIMS file, of the lots of the site ``site_id`` (None: of every lot)."""
        with self.session() as s:
            exported = exists().where(LimsExport.decision_id == DecisionRow.id)
            return list(s.scalars(select(DecisionRow.id).where(~exported, of_site(DecisionRow.lot_id, site_id))
                                  .order_by(DecisionRow.id)))

    def mark_exported(self, decision_ids: list[int], export_name: str, events: list[dict[str, Any]]) -> None:
        """One new lims_exports row per decision written into the LIMS file ``export_name``."""
        with self.session() as s:
            now = utcnow()
            row_hashes.insert_rows(s, LimsExport, [{"decision_id": i, "export_name": export_name,
                                                    "exported_at_utc": now} for i in decision_ids])
            self.chain_events(s, events)

    def add_decisions(self, writes: list[DecisionWrite], limits: tuple[LimitsWrite, ...] = ()) -> list[StoredDecision]:
        """Store several lots' decisions, each as a new revision with its audit events, in ONE transaction.

        All or nothing: a failure (or a kill) stores none of them, nor the chart ``limits`` stored
        first in the same transaction. Lots and latest revisions are read with one query per 500
        lots, rows are inserted in batches, and the audit events of every lot are chained after one
        read of the chain's head, in the order of ``writes``.
        """
        if not writes and not limits:
            return []
        with self.session() as s:
            for frozen in limits:
                self._freeze(s, frozen)
            latest = self._new_lots_and_latest(s, writes)
            rows: list[tuple[DecisionRow, DecisionRow | None]] = []
            for w in writes:
                previous = latest.get(w.record.lot_id)
                r = w.record
                row = DecisionRow(
                    lot_id=r.lot_id, revision=(previous.revision + 1) if previous else 1, night_id=w.night_id,
                    disposition=r.disposition, hold_categories=list(r.hold_categories), reasons=list(r.reasons),
                    spec_version=r.spec_version, spec_sha256=r.spec_sha256, fingerprint=r.fingerprint,
                    decided_by=w.decided_by, change_note=w.change_note, decided_at_utc=utcnow(), record=r.to_json())
                s.add(row)
                if previous is not None:
                    s.flush()  # the same lot twice in one batch: the later revision needs the earlier id
                latest[r.lot_id] = row
                rows.append((row, previous))
            s.flush()
            results: list[dict[str, Any]] = []
            points: list[dict[str, Any]] = []
            events: list[dict[str, Any]] = []
            for w, (row, _previous) in zip(writes, rows, strict=True):
                results += [{"decision_id": row.id, "attribute": r.code,
                             "value": r.value if isinstance(r.value, int | float) else None,
                             "value_text": r.value if isinstance(r.value, str) else None,
                             "se": w.standard_errors.get(r.code), "unit": r.unit or "", "reported": r.reported,
                             "verdict": r.verdict} for r in w.record.results]
                points += [{"product_code": w.record.product, "attribute": attribute, "lot_id": w.record.lot_id,
                            "value": value, "decision_id": row.id} for attribute, value in w.chart_values.items()]
                points += [{"product_code": chart_code, "attribute": attribute, "lot_id": point_id, "value": value,
                            "decision_id": row.id} for chart_code, attribute, point_id, value in w.extra_points]
                events.extend({**e, "revision": row.revision} for e in w.events)
            s.flush()
            for model, values in ((ResultRow, results), (ChartPoint, points)):
                row_hashes.insert_rows(s, model, values)  # one multi-row statement per table, not one per row
            for w, (row, previous) in zip(writes, rows, strict=True):
                write_decision_rows(s, w, row, previous)  # the lot record (lot_record_store)
            self.chain_events(s, events)
            return [decision_of(row, None) for row, _ in rows]

    @staticmethod
    def _new_lots_and_latest(s: Session, writes: list[DecisionWrite]) -> dict[str, DecisionRow]:
        """Add the lots not yet known; return the latest revision of each lot already decided."""
        lot_ids = list(dict.fromkeys(w.record.lot_id for w in writes))
        known_lots: set[str] = set()
        latest: dict[str, DecisionRow] = {}
        for chunk in _chunks(lot_ids):
            known_lots.update(s.scalars(select(Lot.lot_id).where(Lot.lot_id.in_(chunk))))
            for row in s.scalars(select(DecisionRow).where(DecisionRow.lot_id.in_(chunk))
                                 .order_by(DecisionRow.lot_id, DecisionRow.revision)):
                latest[row.lot_id] = row
        for w in writes:
            if w.record.lot_id not in known_lots:
                known_lots.add(w.record.lot_id)
                s.add(Lot(lot_id=w.record.lot_id, product_code=w.record.product,
                          manufactured_on=w.manufactured_on, first_seen_utc=utcnow()))
        s.flush()
        return latest

    # --- control charts ----------------------------------------------------------------------
    def freeze_limits(self, product_code: str, attribute: str, center: float, sigma: float, mr_bar: float,
                      baseline_lots: list[str], frozen_by: str, reason: str,
                      events: list[dict[str, Any]] | None = None) -> StoredLimits:
        """A new version of a chart's limits (the highest version is the active one), with its audit events."""
        with self.session() as s:
            stored = self._freeze(s, LimitsWrite(product_code, attribute, center, sigma, mr_bar, tuple(baseline_lots),
                                                 frozen_by, reason, tuple(events or ())))
            assert stored is not None  # only a chart's first limits (first_only) are ever left unstored
            return stored

    def _freeze(self, s: Session, w: LimitsWrite) -> StoredLimits | None:
        """The chart's next version of limits; None when ``w`` is a chart's first limits and another site
        sharing the store froze that chart's limits meanwhile (its nights judged with the same rule)."""
        where = (ControlLimitRow.product_code == w.product_code, ControlLimitRow.attribute == w.attribute)
        if self.is_postgresql:  # one freeze of a chart at a time, whichever site it comes from
            s.connection().execute(text("SELECT pg_advisory_xact_lock(:first, hashtext(:chart))"),
                                   {"first": CHART_LOCK_CLASS, "chart": f"{w.product_code}/{w.attribute}"})
        current = s.scalar(select(func.max(ControlLimitRow.version)).where(*where)) or 0
        if w.first_only and current:
            return None
        row = ControlLimitRow(product_code=w.product_code, attribute=w.attribute, version=current + 1,
                              center=w.center, sigma=w.sigma, mr_bar=w.mr_bar, baseline_n=len(w.baseline_lots),
                              baseline_lots=list(w.baseline_lots), frozen_at_utc=utcnow(), frozen_by=w.frozen_by,
                              reason=w.reason)
        s.add(row)
        s.flush()
        self.chain_events(s, [{**e, "version": row.version, "previous_version": current or None} for e in w.events])
        return limits_of(row, active=True)

    def chart_point_counts(self, decision_ids: list[int]) -> dict[tuple[str, str], int]:
        """How many chart points these decisions put on each chart (chart, attribute)."""
        out: dict[tuple[str, str], int] = {}
        with self.session() as s:
            for chunk in _chunks(decision_ids):
                for chart, attribute, count in s.execute(
                        select(ChartPoint.product_code, ChartPoint.attribute, func.count(ChartPoint.id))
                        .where(ChartPoint.decision_id.in_(chunk)).group_by(ChartPoint.product_code, ChartPoint.attribute)):
                    out[(chart, attribute)] = out.get((chart, attribute), 0) + int(count)
        return out

    def limit_versions(self, product_code: str, attribute: str) -> tuple[StoredLimits, ...]:
        """Every stored version of a chart's limits, oldest first."""
        with self.session() as s:
            rows = list(s.scalars(select(ControlLimitRow).where(
                ControlLimitRow.product_code == product_code, ControlLimitRow.attribute == attribute)
                .order_by(ControlLimitRow.version)))
            return tuple(limits_of(r, active=r is rows[-1]) for r in rows)

    def released_count(self, product_code: str, attribute: str) -> int:
        with self.session() as s:
            return int(s.scalar(select(func.count(ChartPoint.id)).where(
                ChartPoint.product_code == product_code, ChartPoint.attribute == attribute)) or 0)

    def released_points(self, product_code: str, attribute: str, *, tail: int | None = None,
                        from_lot: str | None = None, count: int | None = None) -> tuple[ReleasedPoint, ...]:
        """Released lots on a chart in release order: all, the last ``tail``, or ``count`` from ``from_lot``.

        ``from_lot`` not on the chart gives an empty tuple.
        """
        where = (ChartPoint.product_code == product_code, ChartPoint.attribute == attribute)
        with self.session() as s:
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

    def held_decisions(self, product_code: str, attribute: str, *, after_order: int | None,
                       limit: int) -> list[tuple[StoredDecision, float | None]]:
        """Latest decisions of the product's lots that hold them (not on the chart), newest ``limit``,
        oldest first, each with its value of ``attribute`` (None when it has none)."""
        charted = select(ChartPoint.lot_id).where(ChartPoint.product_code == product_code,
                                                  ChartPoint.attribute == attribute)
        with self.session() as s:
            query = (select(DecisionRow).join(Lot, Lot.lot_id == DecisionRow.lot_id)
                     .where(Lot.product_code == product_code, is_latest_revision(),
                            DecisionRow.disposition != Disposition.RELEASED, DecisionRow.lot_id.not_in(charted)))
            if after_order is not None:
                query = query.where(DecisionRow.id > after_order)
            rows = list(reversed(list(s.scalars(query.order_by(DecisionRow.id.desc()).limit(limit)))))
            values: dict[int, float | None] = {}
            if rows:
                for r in s.scalars(select(ResultRow).where(ResultRow.decision_id.in_([d.id for d in rows]),
                                                           ResultRow.attribute == attribute)):
                    values[r.decision_id] = None if r.value is None else float(r.value)
            return [(decision_of(d, None), values.get(d.id)) for d in rows]

    # --- audit events ------------------------------------------------------------------------
    def chain_events(self, session: Session, events: list[dict[str, Any]]) -> list[dict[str, Any]]:
        """Chain audit ``events`` after the last stored one, inside the caller's transaction."""
        from pipeline.records import ledger

        if not events:
            return []
        if self.is_postgresql:
            session.connection().exec_driver_sql(f"SELECT pg_advisory_xact_lock({AUDIT_LOCK_KEY})")
        last = session.scalars(select(AuditEvent).order_by(AuditEvent.seq.desc()).limit(1)).first()
        if last is not None and (why := clock.set_back(last.seq, last.time_utc, utcnow(), self.clock_tolerance)):
            raise StoreError(why)
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

    def event_bodies(self, kind: str) -> list[str]:
        """The bodies of every chained event of one kind, in chain order (the kind column is indexed)."""
        with self.session() as s:
            return list(s.scalars(select(AuditEvent.body).where(AuditEvent.kind == kind).order_by(AuditEvent.seq)))

    def last_event(self) -> StoredEvent | None:
        """The head of the audit chain (None when empty)."""
        with self.session() as s:
            r = s.scalars(select(AuditEvent).order_by(AuditEvent.seq.desc()).limit(1)).first()
            return None if r is None else StoredEvent(r.seq, r.body, r.prev_hash, r.hash)

    def audit_events(self, after_seq: int = 0, limit: int | None = None) -> list[StoredEvent]:
        """Chained events after ``after_seq``, in chain order; at most ``limit`` when given."""
        with self.session() as s:
            query = select(AuditEvent).where(AuditEvent.seq > after_seq).order_by(AuditEvent.seq)
            return [StoredEvent(r.seq, r.body, r.prev_hash, r.hash)
                    for r in s.scalars(query if limit is None else query.limit(limit))]
