"""Closing the night: used files archived, the LIMS results written, and the night's count recorded.

Every file received is either archived or quarantined: received = archived + quarantined.
"""

from __future__ import annotations

import hashlib
import os
from dataclasses import dataclass
from pathlib import Path

from pipeline import __version__
from pipeline.documents.lims_results import lims_files, result_rows
from pipeline.night.publish import Outcome
from pipeline.night.receive import Intake, stored_name
from pipeline.records import audit
from pipeline.records.store import Store
from pipeline.records.workspace import Workspace, atomic_write, unique_target

LIMS_READ_DECISIONS = 500  # decision records read at a time: a large night's would fill memory


def write_lims_results(ws: Workspace, store: Store) -> list[Path]:
    """Every decision not yet exported, as CSV and JSON plus a SHA-256 manifest (atomic writes).

    The file names come from the first and last decision exported, so a night re-run after a
    crash writes the same bytes to the same names, and a night with nothing new writes nothing.
    """
    pending = store.unexported_decision_ids()
    if not pending:
        return []
    rows = []
    for start in range(0, len(pending), LIMS_READ_DECISIONS):
        rows += result_rows([d.record for d in store.decisions_by_id(pending[start:start + LIMS_READ_DECISIONS])])
    export = lims_files(pending, rows, __version__)
    written = []
    for name, data in export.files.items():
        path = ws.lims / name
        if not (path.exists() and path.read_bytes() == data):
            atomic_write(path, data)
        written.append(path)
    store.mark_exported(pending, export.stem, [audit.event(
        "lims-results-written", time_zone=ws.time_zone, files={p.name: hashlib.sha256(p.read_bytes()).hexdigest()
                                                                for p in written},
        decisions=len(pending), rows=len(rows))])
    return written


@dataclass(frozen=True)
class NightSummary:
    night_id: int
    received: int
    archived: int
    quarantined: int
    outcomes: list[Outcome]
    notes: list[str]
    quarantine_reasons: list[tuple[str, str]]
    lims_files: list[str]


def close(ws: Workspace, store: Store, intake: Intake, outcomes: list[Outcome], notes: list[str]) -> NightSummary:
    """Archive the used files, write the LIMS results, and count: received = archived + quarantined."""
    archive = ws.archive / f"night-{intake.night_id:04d}"
    files, events, moves = [], [], []
    for parsed in intake.parsed:
        target = unique_target(archive, stored_name(parsed.file_name))
        stored_as = str(target.relative_to(ws.root))
        files.append(dict(file_name=parsed.file_name, sha256=parsed.sha256, kind=parsed.kind,
                          layout_version=parsed.layout_version, status="archived",
                          reason="; ".join(parsed.conversions) or None, stored_as=stored_as))
        events.append(audit.event("file-archived", time_zone=ws.time_zone, night_id=intake.night_id,
                                  file=parsed.file_name, sha256=parsed.sha256, stored_as=stored_as))
        moves.append((intake.paths[parsed.file_name], target))
    # Recorded first, moved after: a run killed in between finishes the moves when it restarts.
    store.record_files(intake.night_id, files, events)
    for source, target in moves:
        os.replace(source, target)
    lims = write_lims_results(ws, store)
    archived, quarantined = len(intake.parsed), len(intake.quarantined)
    decided = sum(o.new for o in outcomes)
    store.finish_night(intake.night_id, files_received=intake.received, files_archived=archived,
                       files_quarantined=quarantined, lots_decided=decided)
    store.add_events([audit.event("night-closed", time_zone=ws.time_zone, night_id=intake.night_id,
                                  files_received=intake.received, files_archived=archived,
                                  files_quarantined=quarantined, lots_decided=decided, not_decided=notes)])
    audit.sync_log(store, ws.log)
    return NightSummary(intake.night_id, intake.received, archived, quarantined, outcomes, notes,
                        [(q.file_name, q.reason) for q in intake.quarantined],
                        [str(p.relative_to(ws.root)) for p in lims])
