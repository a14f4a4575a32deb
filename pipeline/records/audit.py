"""The audit trail (adapter): hash-chained events in the store, mirrored to a JSON-lines log.

The store is the source of truth. Each event is chained in the same transaction as the data it
describes (a decision, a limit re-baseline, a person's disposition); the log file then receives
every event it does not yet hold, so a crash between the two is mended on the next write.
``verify_trail`` checks both chains and that they agree record for record.
"""

from __future__ import annotations

import datetime as dt
import json
from dataclasses import dataclass
from pathlib import Path
from typing import Any
from zoneinfo import ZoneInfo

from pipeline.records import ledger
from pipeline.records.store import Store


def event(event_kind: str, /, *, time_zone: str, lot_id: str | None = None, **fields: Any) -> dict[str, Any]:
    """A new audit event: kind, UTC time and the same moment in the plant's time zone."""
    moment = dt.datetime.now(dt.UTC)
    local = moment.astimezone(ZoneInfo(time_zone))
    body = {"kind": event_kind, "time_utc": moment.isoformat(timespec="milliseconds"),
            "time_local": f"{local:%Y-%m-%d %H:%M:%S} {local.tzname()} ({time_zone})"}
    if lot_id is not None:
        body["lot_id"] = lot_id
    body.update(fields)
    return body


def sync_log(store: Store, log_path: Path) -> int:
    """Append to the log every stored event after its last line; returns how many were written."""
    line, _ = ledger.last_line(log_path)
    last_seq = json.loads(line)["seq"] if line else 0
    written = 0
    while True:  # in pages: a large night closes with tens of thousands of events
        page = store.audit_events(after_seq=last_seq, limit=SYNC_PAGE_EVENTS)
        if not page:
            return written
        ledger.append_chained(log_path, [json.loads(e.body) for e in page])
        written += len(page)
        last_seq = page[-1].seq


SYNC_PAGE_EVENTS = 2000


@dataclass(frozen=True)
class TrailCheck:
    valid: bool
    store_records: int
    log_records: int
    reason: str


def verify_store(store: Store) -> ledger.ChainCheck:
    rows = store.audit_events()
    check = ledger.verify_records([row.body for row in rows])
    if check.valid:
        for row in rows:
            stored = json.loads(row.body)
            if (stored["hash"], stored["prev_hash"], stored["seq"]) != (row.hash, row.prev_hash, row.seq):
                return ledger.ChainCheck(False, check.records, row.seq, None,
                                         f"store record {row.seq}: its columns disagree with its content", check.last_hash)
        return check
    return ledger.ChainCheck(False, check.records, check.first_bad_seq, check.first_bad_line,
                             "in the store: " + check.reason.replace(f"(line {check.first_bad_line})", f"(row {check.first_bad_line})"),
                             check.last_hash)


def verify_trail(store: Store, log_path: Path) -> TrailCheck:
    """Both chains intact and identical: same number of records, same hash at every position."""
    in_store = verify_store(store)
    in_log = ledger.verify_file(log_path)
    if not in_store.valid:
        return TrailCheck(False, in_store.records, in_log.records, in_store.reason)
    if not in_log.valid:
        return TrailCheck(False, in_store.records, in_log.records, f"in the log file: {in_log.reason}")
    hashes = [e.hash for e in store.audit_events()]
    log_hashes = [json.loads(line)["hash"] for line in ledger.read_lines(log_path)]
    for number, (a, b) in enumerate(zip(hashes, log_hashes, strict=False), start=1):
        if a != b:
            return TrailCheck(False, len(hashes), len(log_hashes),
                              f"record {number} differs between the store and the log file")
    if len(hashes) != len(log_hashes):
        more = "store" if len(hashes) > len(log_hashes) else "log file"
        return TrailCheck(False, len(hashes), len(log_hashes),
                          f"the {more} holds {abs(len(hashes) - len(log_hashes))} more records than the other "
                          f"(store {len(hashes)}, log {len(log_hashes)})")
    return TrailCheck(True, len(hashes), len(log_hashes),
                      f"{len(hashes)} records, both chains intact and identical in the store and the log file")
