"""What needs a person, judged purely from the facts ``lotgate status`` gathered.

Two kinds of need, each with its exit code: lots waiting for a person (held, ready for approval,
pending, overdue), and the operation itself (a failed, interrupted or missing night, a store that
does not answer or is newer than this lotgate, a signing identity expiring within
EXPIRY_WARNING_DAYS days, a workspace disk running full). Operations outrank lots in the exit
code, since they can stop every lot.
"""

from __future__ import annotations

import datetime as dt
from dataclasses import dataclass
from enum import StrEnum

from pipeline.records.status_queries import NightRow, OpenLot, StoreStatus
from pipeline.vocabulary import Disposition, HoldCategory

EXPIRY_WARNING_DAYS = 30
LOW_DISK_BYTES = 2 * 1024**3
LOW_DISK_FRACTION = 0.10
SCHEDULE_GRACE = dt.timedelta(hours=2)  # a scheduled night not started this long after its time is missing


class Need(StrEnum):
    LOTS = "lots await a person"
    OPERATIONS = "the nightly operation needs a person"


EXIT_FOR_NEED = {Need.LOTS: 6, Need.OPERATIONS: 7}


@dataclass(frozen=True)
class IdentityFacts:
    signer_name: str | None
    not_after_utc: dt.datetime | None
    problem: str | None  # why it could not be read


@dataclass(frozen=True)
class StatusFacts:
    now_utc: dt.datetime
    store: StoreStatus
    identity: IdentityFacts | None  # None: no signing identity is set up
    disk_free_bytes: int
    disk_total_bytes: int
    schedule_cron: str | None
    last_scheduled_utc: dt.datetime | None  # the latest time the schedule fired before now
    running: str | None  # who holds the run lock now, when someone does


@dataclass(frozen=True)
class Concern:
    need: Need
    text: str


def night_outcome(night: NightRow) -> str:
    if night.failed_because is not None:
        return "failed: " + night.failed_because
    if night.interrupted:
        return "interrupted; completed by a later run"
    if night.finished_utc is None:
        return "not finished"
    return "completed"


def concerns(facts: StatusFacts) -> tuple[Concern, ...]:
    out: list[Concern] = []
    ops = Need.OPERATIONS
    store = facts.store
    if not store.reachable:
        out.append(Concern(ops, f"the results store cannot be read: {store.problem}"))
    elif store.schema_version is not None and store.schema_head is not None \
            and store.schema_version != store.schema_head:
        out.append(Concern(ops, f"the results store is at migration {store.schema_version}, this lotgate's newest "
                                f"is {store.schema_head}: check that every machine runs the same lotgate version"))
    latest = store.nights[0] if store.nights else None
    if latest is not None:
        if latest.failed_because is not None:
            out.append(Concern(ops, f"night {latest.night_id} failed: {latest.failed_because}; the next run "
                                    "completes it"))
        elif latest.finished_utc is None and facts.running is None:
            out.append(Concern(ops, f"night {latest.night_id} did not finish and no run holds the lock: it stopped; "
                                    "the next run completes it"))
    if facts.schedule_cron and facts.last_scheduled_utc is not None \
            and facts.now_utc - facts.last_scheduled_utc > SCHEDULE_GRACE \
            and (latest is None or latest.started_utc < facts.last_scheduled_utc - dt.timedelta(minutes=5)):
        out.append(Concern(ops, f"the night scheduled for {facts.last_scheduled_utc:%Y-%m-%d %H:%M} UTC did not "
                                "start: is 'lotgate serve' (or the Prefect worker) running?"))
    out += _identity(facts)
    if facts.disk_free_bytes < LOW_DISK_BYTES or facts.disk_free_bytes < LOW_DISK_FRACTION * facts.disk_total_bytes:
        out.append(Concern(ops, f"the workspace's disk has {facts.disk_free_bytes / 1024**3:.1f} GiB free of "
                                f"{facts.disk_total_bytes / 1024**3:.1f} GiB"))
    out += _lots(store.open_lots)
    return tuple(out)


def _identity(facts: StatusFacts) -> list[Concern]:
    identity = facts.identity
    if identity is None:
        return [Concern(Need.OPERATIONS, "no signing identity is set up: released lots cannot get certificates")]
    if identity.problem is not None:
        return [Concern(Need.OPERATIONS, f"the signing identity cannot be read: {identity.problem}")]
    if identity.not_after_utc is None:
        return []
    left = identity.not_after_utc - facts.now_utc
    if left <= dt.timedelta(0):
        return [Concern(Need.OPERATIONS, f"the signing certificate of {identity.signer_name} expired on "
                                         f"{identity.not_after_utc:%Y-%m-%d}")]
    if left <= dt.timedelta(days=EXPIRY_WARNING_DAYS):
        return [Concern(Need.OPERATIONS, f"the signing certificate of {identity.signer_name} expires on "
                                         f"{identity.not_after_utc:%Y-%m-%d} ({left.days} days): renew it")]
    return []


def _lots(lots: tuple[OpenLot, ...]) -> list[Concern]:
    out = []
    for member in Disposition:
        these = [lot for lot in lots if lot.disposition == member.value]
        if these:
            out.append(Concern(Need.LOTS, f"{len(these)} lot(s) {member.value}: "
                                          + ", ".join(lot.lot_id for lot in these[:20])
                                          + (" …" if len(these) > 20 else "")))
    overdue = [lot for lot in lots if HoldCategory.OVERDUE.value in lot.hold_categories]
    if overdue:
        out.append(Concern(Need.LOTS, f"{len(overdue)} lot(s) with overdue results: "
                                      + ", ".join(lot.lot_id for lot in overdue[:20])))
    return out


def exit_code(found: tuple[Concern, ...]) -> int:
    """0 when nothing needs a person; else the highest code among the needs found."""
    return max((EXIT_FOR_NEED[c.need] for c in found), default=0)
