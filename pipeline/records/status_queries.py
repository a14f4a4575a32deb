"""Read-only store queries for ``lotgate status`` (adapter): recent nights, open lots, the schema version.

Opens the database WITHOUT migrating it (a status check must change nothing) and reads through
short read-only sessions; returns frozen records, never ORM rows.
"""

from __future__ import annotations

import datetime as dt
import json
from dataclasses import dataclass

from sqlalchemy import Engine, select, text
from sqlalchemy.exc import SQLAlchemyError
from sqlalchemy.orm import Session

from pipeline.records.current import closings, counts_of, is_latest_revision, of_site
from pipeline.records.database import MIGRATIONS, open_engine, safe_url
from pipeline.records.stored import utc
from pipeline.records.tables import AuditEvent, DecisionRow, NightRun
from pipeline.vocabulary import Disposition

NIGHT_EVENTS = ("night-interrupted", "night-failed", "night-closed")


@dataclass(frozen=True)
class NightRow:
    night_id: int
    started_utc: dt.datetime
    finished_utc: dt.datetime | None
    files_received: int
    files_archived: int
    files_quarantined: int
    lots_decided: int
    failed_because: str | None  # the night-failed event's reason, when one was recorded
    interrupted: bool  # finished by a later run's recovery
    closed: bool  # its own close stage ran (a night-closed event)


@dataclass(frozen=True)
class OpenLot:
    lot_id: str
    product: str
    disposition: str
    hold_categories: tuple[str, ...]
    reasons: tuple[str, ...]
    decided_utc: dt.datetime


@dataclass(frozen=True)
class StoreStatus:
    reachable: bool
    problem: str | None
    schema_version: str | None
    schema_head: str | None
    nights: tuple[NightRow, ...]
    open_lots: tuple[OpenLot, ...]


def schema_head() -> str | None:
    """The newest migration this lotgate knows (Alembic's head revision)."""
    from alembic.config import Config
    from alembic.script import ScriptDirectory

    config = Config()
    config.set_main_option("script_location", str(MIGRATIONS))
    return ScriptDirectory.from_config(config).get_current_head()


def _schema_version(engine: Engine) -> str | None:
    with engine.connect() as connection:
        try:
            return connection.execute(text("SELECT version_num FROM alembic_version")).scalar()
        except SQLAlchemyError:
            return None


def _nights(s: Session, workspace_id: str, count: int) -> tuple[NightRow, ...]:
    mine = (NightRun.workspace_id == workspace_id) | NightRun.workspace_id.is_(None)
    runs = list(s.scalars(select(NightRun).where(mine).order_by(NightRun.id.desc()).limit(count)))
    if not runs:
        return ()
    ids = {run.id for run in runs}
    failed: dict[int, str] = {}
    interrupted: set[int] = set()
    closed: set[int] = set()
    first = min(ids)
    # Only the events of these nights' kinds, from the oldest night listed on (one query).
    for body in s.scalars(select(AuditEvent.body).where(AuditEvent.kind.in_(NIGHT_EVENTS))
                          .order_by(AuditEvent.seq)):
        event = json.loads(body)
        night = event.get("night_id")
        if not isinstance(night, int) or night < first or night not in ids:
            continue
        if event["kind"] == "night-failed":
            failed[night] = str(event.get("why", ""))
        elif event["kind"] == "night-interrupted":
            interrupted.add(night)
        else:
            closed.add(night)
    ended = closings(s, [r.id for r in runs])
    out = []
    for r in runs:
        finished, received, archived, quarantined, lots = counts_of(ended.get(r.id))
        out.append(NightRow(r.id, utc(r.started_at_utc), None if finished is None else utc(finished), received,
                            archived, quarantined, lots, failed.get(r.id), r.id in interrupted, r.id in closed))
    return tuple(out)


def _open_lots(s: Session, site_id: str | None) -> tuple[OpenLot, ...]:
    """Each lot's latest decision that still needs a person: anything but released or rejected (of the
    site ``site_id`` when sites share the store)."""
    final = (Disposition.RELEASED.value, Disposition.REJECTED.value)
    rows = s.scalars(select(DecisionRow).where(is_latest_revision(), DecisionRow.disposition.not_in(final),
                                               of_site(DecisionRow.lot_id, site_id)).order_by(DecisionRow.id))
    return tuple(OpenLot(r.lot_id, str((r.record or {}).get("product", "")), r.disposition,
                         tuple(r.hold_categories or ()), tuple(r.reasons or ()), utc(r.decided_at_utc)) for r in rows)


def store_status(url: str, workspace_id: str, nights: int = 5, *, shared: bool = False) -> StoreStatus:
    """What the store says, or why it could not be read (unreachable, not migrated), without changing it."""
    head = schema_head()
    try:
        engine = open_engine(url)
    except SQLAlchemyError as exc:
        return StoreStatus(False, f"cannot open {safe_url(url)} ({exc.__class__.__name__})", None, head, (), ())
    try:
        version = _schema_version(engine)
        if version is None:
            return StoreStatus(True, f"{safe_url(url)} holds no lotgate tables yet (no night has run)", None, head,
                               (), ())
        with Session(engine) as s:
            return StoreStatus(True, None, version, head, _nights(s, workspace_id, nights),
                               _open_lots(s, workspace_id if shared else None))
    except SQLAlchemyError as exc:
        first = str(exc).splitlines()[0][:200]
        return StoreStatus(False, f"{safe_url(url)} did not answer ({exc.__class__.__name__}: {first})", None, head,
                           (), ())
    finally:
        engine.dispose()
