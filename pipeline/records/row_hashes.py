"""Row hashes: every record row carries the SHA-256 of its canonical form, named by an audit event.

The canonical form of a row of table T is the canonical JSON (``ledger.canonical_json``: keys
sorted, no spaces, UTF-8, no NaN) of ``{"table": T, "columns": {name: value}}`` over every column
except the primary key and ``row_sha256`` itself, with values written one way whatever the
database gave back: times as UTC ``YYYY-MM-DDTHH:MM:SS.ffffff`` (SQLite returns them naive,
PostgreSQL aware), Float columns as floats, Integer columns as integers, JSON columns as their
JSON values, text as text, NULL as null. The key is left out because the database assigns it at
insert; the audit event binds key and hash together.

Every transaction that inserts record rows also chains one ``records-written`` audit event listing
each row as ``{"table", "key", "row_sha256"}`` (``Store.session``); ``verify_rows`` recomputes
every row and matches rows and events both ways.
"""

from __future__ import annotations

import datetime as dt
import hashlib
import json
import math
from collections.abc import Iterable, Iterator
from dataclasses import dataclass
from typing import Any

from sqlalchemy import JSON, DateTime, Float, Integer, Table, event, insert, select, text
from sqlalchemy.orm import Session

from pipeline.records import ledger
from pipeline.records.tables import RECORD_TABLES, Base

ROWS_EVENT = "records-written"
PENDING = "lotgate_rows"  # session.info key: the rows this transaction inserted, for its event
_BY_NAME: dict[str, Table] = {model.__tablename__: model.__table__ for model in RECORD_TABLES}  # type: ignore[misc]


def _value(column: Any, value: Any) -> Any:
    if value is None:
        return None
    if isinstance(column.type, DateTime):
        moment = value if isinstance(value, dt.datetime) else dt.datetime.fromisoformat(str(value))
        if moment.tzinfo is not None:
            moment = moment.astimezone(dt.UTC).replace(tzinfo=None)
        return moment.strftime("%Y-%m-%dT%H:%M:%S.%f")
    if isinstance(column.type, Float):
        number = float(value)
        return number if math.isfinite(number) else repr(number)
    if isinstance(column.type, Integer):
        return int(value)
    if isinstance(column.type, JSON):
        return json.loads(json.dumps(value)) if not isinstance(value, str) else json.loads(value)
    return str(value)


def primary_key(table: Table) -> str:
    (key,) = [c.name for c in table.primary_key.columns]
    return key


def canonical_row(table: Table, values: dict[str, Any]) -> str:
    """The row's canonical JSON (pure): every column but the key and row_sha256, written one way."""
    key = primary_key(table)
    columns = {c.name: _value(c, values.get(c.name)) for c in table.columns if c.name not in (key, "row_sha256")}
    return ledger.canonical_json({"table": table.name, "columns": columns})


def row_sha256(table: Table, values: dict[str, Any]) -> str:
    return hashlib.sha256(canonical_row(table, values).encode("utf-8")).hexdigest()


def row_ref(table: Table, key: Any, sha: str) -> dict[str, Any]:
    return {"table": table.name, "key": str(key), "row_sha256": sha}


# --- writing: every insert of a record row goes through one of these two paths ----------------------
def insert_rows(session: Session, model: type[Base], rows: list[dict[str, Any]]) -> list[Any]:
    """A multi-row INSERT of record rows with their hashes; returns their keys, in order."""
    if not rows:
        return []
    table: Table = model.__table__  # type: ignore[assignment]
    key = primary_key(table)
    filled = [{**row, "row_sha256": row_sha256(table, row)} for row in rows]
    keys = list(session.scalars(insert(model).returning(getattr(model, key), sort_by_parameter_order=True), filled))
    session.info.setdefault(PENDING, []).extend(row_ref(table, k, r["row_sha256"]) for k, r in zip(keys, filled, strict=True))
    return keys


def _orm_values(obj: Base) -> dict[str, Any]:
    table: Table = obj.__table__  # type: ignore[assignment]
    values = {}
    for column in table.columns:
        value = getattr(obj, column.key, None)
        if value is None and column.default is not None and getattr(column.default, "is_scalar", False):
            value = column.default.arg
            setattr(obj, column.key, value)
        values[column.name] = value
    return values


def _before_flush(session: Session, _context: Any, _instances: Any) -> None:
    """Record objects added through the ORM get their hash before they are inserted."""
    for obj in session.new:
        if isinstance(obj, RECORD_TABLES):
            obj.row_sha256 = row_sha256(obj.__table__, _orm_values(obj))  # type: ignore[arg-type]
            session.info.setdefault("lotgate_new", []).append(obj)


def _after_flush(session: Session, _context: Any) -> None:
    for obj in session.info.pop("lotgate_new", []):
        table = obj.__table__
        session.info.setdefault(PENDING, []).append(row_ref(table, getattr(obj, primary_key(table)), obj.row_sha256))


def watch(session_factory: Any) -> None:
    """Hash the record rows every session of ``session_factory`` adds through the ORM."""
    event.listen(session_factory, "before_flush", _before_flush)
    event.listen(session_factory, "after_flush", _after_flush)


def take_pending(session: Session) -> list[dict[str, Any]]:
    """The rows this transaction inserted (and forget them): the body of its records-written event."""
    return session.info.pop(PENDING, [])


# --- checking ------------------------------------------------------------------------------------
@dataclass(frozen=True)
class RowProblem:
    table: str
    key: str
    what: str

    def __str__(self) -> str:
        return f"{self.table} row {self.key}: {self.what}"


@dataclass(frozen=True)
class RowsCheck:
    rows: int
    tables: int
    problems: tuple[RowProblem, ...]

    @property
    def valid(self) -> bool:
        return not self.problems


def named_rows(event_bodies: Iterable[str]) -> dict[tuple[str, str], tuple[str, int]]:
    """(table, key) → (row_sha256, event seq) from the chained events' bodies (pure)."""
    out: dict[tuple[str, str], tuple[str, int]] = {}
    for body in event_bodies:
        record = json.loads(body)
        if record.get("kind") != ROWS_EVENT:
            continue
        for ref in record.get("rows", ()):
            out[(ref["table"], ref["key"])] = (ref["row_sha256"], record["seq"])
    return out


def _stored_rows(session: Session, table: Table, page: int = 2000) -> Iterator[dict[str, Any]]:
    key = table.c[primary_key(table)]
    last = None
    while True:
        query = select(table).order_by(key).limit(page)
        if last is not None:
            query = query.where(key > last)
        rows = [dict(r._mapping) for r in session.execute(query)]
        if not rows:
            return
        yield from rows
        last = rows[-1][key.name]


def verify_rows(session: Session, event_bodies: Iterable[str]) -> RowsCheck:
    """Recompute every record row's hash; match each row with the event that wrote it, and back."""
    named = named_rows(event_bodies)
    problems: list[RowProblem] = []
    count = 0
    seen: set[tuple[str, str]] = set()
    for name, table in _BY_NAME.items():
        key = primary_key(table)
        for row in _stored_rows(session, table):
            count += 1
            ref = (name, str(row[key]))
            seen.add(ref)
            actual = row_sha256(table, row)
            claimed = named.get(ref)
            if claimed is None:
                problems.append(RowProblem(name, ref[1], "no audit event recorded this row: it was inserted "
                                                         "outside lotgate (or its key was changed)"))
            elif actual != claimed[0]:
                how = ("its content no longer matches its own row_sha256 nor the hash audit event "
                       f"{claimed[1]} recorded: the row was edited after it was written")
                if row.get("row_sha256") == actual:
                    how = (f"its content and row_sha256 were rewritten together; audit event {claimed[1]} "
                           "recorded another hash: the row was edited after it was written")
                problems.append(RowProblem(name, ref[1], how))
            elif row.get("row_sha256") != actual:
                problems.append(RowProblem(name, ref[1], "its row_sha256 column was changed (its content "
                                                         f"still matches audit event {claimed[1]})"))
    for (name, key), (_, seq) in sorted(named.items(), key=lambda item: item[1][1]):
        if (name, key) not in seen and name in _BY_NAME:
            problems.append(RowProblem(name, key, f"audit event {seq} recorded this row, but it is not in "
                                                  "the store: it was deleted"))
    return RowsCheck(count, len(_BY_NAME), tuple(problems))


def seal_existing_rows(bind: Any, table_names: Iterable[str], now: dt.datetime, migration: str) -> None:
    """Hash the rows already stored in ``table_names`` and name them in one chained audit event.

    For a migration that makes tables record tables: their rows from before get their hash here,
    and the event (``"sealed_by_migration"``) binds key and hash as a night's own event would.
    """
    refs = []
    for name in table_names:
        table = _BY_NAME[name]
        key = primary_key(table)
        for row in bind.execute(select(table).order_by(table.c[key])).mappings().all():
            sha = row_sha256(table, dict(row))
            bind.execute(table.update().where(table.c[key] == row[key]).values(row_sha256=sha))
            refs.append(row_ref(table, row[key], sha))
    if not refs:
        return
    last = bind.execute(text("SELECT seq, hash FROM audit_events ORDER BY seq DESC LIMIT 1")).first()
    (record,) = ledger.chain([{"kind": ROWS_EVENT, "time_utc": now.isoformat(timespec="milliseconds"),
                               "sealed_by_migration": migration, "rows": refs}],
                             prev_hash=last.hash if last else ledger.GENESIS, start_seq=(last.seq + 1) if last else 1)
    bind.execute(text("INSERT INTO audit_events (seq, time_utc, kind, lot_id, body, prev_hash, hash) "
                      "VALUES (:seq, :time_utc, :kind, NULL, :body, :prev_hash, :hash)"),
                 {"seq": record["seq"], "time_utc": record["time_utc"], "kind": record["kind"],
                  "body": ledger.canonical_json(record), "prev_hash": record["prev_hash"], "hash": record["hash"]})
