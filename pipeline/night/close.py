"""Closing the night: used files archived, the LIMS results written, and the night's count recorded.

Every file received is either archived or quarantined: received = archived + quarantined.
"""

from __future__ import annotations

import hashlib
from dataclasses import dataclass
from pathlib import Path
from typing import Any

from pipeline import __version__
from pipeline.documents.lims_results import lims_files, result_rows
from pipeline.errors import LotgateError
from pipeline.night.publish import Outcome
from pipeline.night.receive import Intake, changed_report, quarantine_record, stored_name
from pipeline.night.seal import seal
from pipeline.records import archive_files, audit
from pipeline.records.store import Store
from pipeline.records.workspace import Workspace, atomic_write, unique_target
from pipeline.vocabulary import ProblemCode

LIMS_READ_DECISIONS = 500  # decision records read at a time: a large night's would fill memory


def write_lims_results(ws: Workspace, store: Store) -> list[Path]:
    """Every decision not yet exported, as CSV and JSON plus a SHA-256 manifest (atomic writes): of this
    site's lots only, when sites share the store (each site's LIMS takes its own lots' results).

    The file names come from the first and last decision exported, so a night re-run after a
    crash writes the same bytes to the same names, and a night with nothing new writes nothing.
    """
    pending = store.unexported_decision_ids(ws.site_id())
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


def close(ws: Workspace, store: Store, intake: Intake, outcomes: list[Outcome], notes: list[str],
          signer: Any = None) -> NightSummary:
    """Archive the used files, write the LIMS results, count (received = archived + quarantined), seal the chain."""
    staged, changed = _archive_used_files(ws, store, intake)
    lims = write_lims_results(ws, store)
    archived, quarantined = len(intake.parsed) - len(changed), len(intake.quarantined) + len(changed)
    decided = sum(o.new for o in outcomes)
    store.finish_night(intake.night_id, files_received=intake.received, files_archived=archived,
                       files_quarantined=quarantined, lots_decided=decided)
    store.add_events([audit.event("night-closed", time_zone=ws.time_zone, night_id=intake.night_id,
                                  files_received=intake.received, files_archived=archived,
                                  files_quarantined=quarantined, lots_decided=decided, not_decided=notes)])
    audit.sync_log(store, ws.log)
    if signer is not None:  # a night without a signing identity (tests only) writes no checkpoint
        try:
            seal(ws, store, f"night {intake.night_id} closed", signer)
        except (LotgateError, OSError) as exc:  # the night's records stand; the failure is recorded and said
            notes = [*notes, f"no checkpoint was sealed after this night: {exc}"]
            store.add_events([audit.event("checkpoint-not-sealed", time_zone=ws.time_zone, night_id=intake.night_id,
                                          reason=str(exc))])
            audit.sync_log(store, ws.log)
    return NightSummary(intake.night_id, intake.received, archived, quarantined, outcomes, notes,
                        [(q.file_name, q.reason) for q in intake.quarantined] + changed,
                        [str(p.relative_to(ws.root)) for p in lims])


def _archive_used_files(ws: Workspace, store: Store, intake: Intake) -> tuple[int, list[tuple[str, str]]]:
    """Copy each used file into the archive, hash the copy, record it, then place it read-only.

    A copy whose SHA-256 differs from the one read (the file changed after it was read) is put in
    quarantine instead, with that reason. Recorded first, placed after: a run killed in between
    leaves the inbox file, which its restart archives (recovery).
    """
    archive = ws.archive / f"night-{intake.night_id:04d}"
    files, events, moves, changed = [], [], [], []
    for parsed in intake.parsed:
        source = intake.paths[parsed.file_name]
        tmp, copy_sha = archive_files.stage_copy(source, archive)
        if copy_sha == parsed.sha256:
            target = unique_target(archive, stored_name(parsed.file_name))
            stored_as = str(target.relative_to(ws.root))
            files.append(dict(file_name=parsed.file_name, sha256=parsed.sha256, kind=parsed.kind,
                              layout_version=parsed.layout_version, status="archived",
                              reason="; ".join(parsed.conversions) or None, stored_as=stored_as))
            events.append(audit.event("file-archived", time_zone=ws.time_zone, night_id=intake.night_id,
                                      file=parsed.file_name, sha256=parsed.sha256, stored_as=stored_as))
            moves.append((source, tmp, target, None))
            continue
        target = unique_target(ws.quarantine, stored_name(parsed.file_name))
        report = changed_report(parsed.file_name, parsed.sha256, copy_sha, "after lotgate read it, before it was archived")
        report += (f"- tonight's results used the file as read (SHA-256 {parsed.sha256[:16]}…); the bytes kept here "
                   "are the changed ones. Check with the laboratory which content is right before relying on them\n")
        row, event = quarantine_record(ws, intake.night_id, parsed.file_name, copy_sha, "quarantined", report.strip(),
                                       str(target.relative_to(ws.root)), problem=str(ProblemCode.CHANGED_WHILE_READ),
                                       sha256_read=parsed.sha256)
        files.append(row)
        events.append(event)
        moves.append((source, tmp, target, report))
        changed.append((parsed.file_name, report.strip()))
    store.record_files(intake.night_id, files, events)
    for source, tmp, target, report in moves:
        archive_files.place(tmp, target)
        source.unlink(missing_ok=True)
        if report is not None:
            atomic_write(target.with_name(target.name + ".reason.txt"), report.encode("utf-8"))
    return len(moves), changed
