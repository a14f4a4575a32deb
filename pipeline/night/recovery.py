"""Recovering from an interrupted night: finishing its file moves and recording what it set aside."""

from __future__ import annotations

import os
from dataclasses import dataclass

from pipeline.intake.assembly import QuarantinedFile
from pipeline.night.receive import quarantine_record
from pipeline.night.staging import recover_documents
from pipeline.records import audit
from pipeline.records.controlled_files import sha256_file
from pipeline.records.store import Store
from pipeline.records.stored import StoredFile
from pipeline.records.workspace import Workspace, atomic_write


@dataclass(frozen=True)
class Recovery:
    notes: list[str]
    quarantined: list[QuarantinedFile]  # set aside by the interrupted night: still tonight's evidence


def recover_interrupted(ws: Workspace, store: Store) -> Recovery:
    """Finish what a killed run left: archive moves, unrecorded quarantined files, temporary files.

    Decisions need no mending: each was committed with its audit events in one transaction, and
    a lot whose fingerprint is stored is not decided again. The files the interrupted night set
    aside are handed on, so that the lots they name see the same inputs (and fingerprints) as
    they would have in one uninterrupted run.
    """
    for folder in (ws.root, ws.inbox, ws.certificates, ws.reports, ws.lims, ws.archive, ws.quarantine):
        for stale in folder.glob(".*.tmp"):
            stale.unlink(missing_ok=True)
    recover_documents(ws, store)  # documents a stopped run left staged or without a decision (staging.py)
    unfinished = store.unfinished_nights()
    if not unfinished:
        return Recovery([], [])
    night_ids = [n.id for n in unfinished]
    night_files = store.files_of_nights(night_ids)
    notes = _finish_archiving(ws, night_files)
    notes += _record_set_aside(ws, store, night_ids[-1], {f.stored_as for f in night_files},
                               min(n.started_at_utc for n in unfinished).timestamp())
    for night_run in unfinished:
        store.finish_night(night_run.id)
        store.add_events([audit.event("night-interrupted", time_zone=ws.time_zone, night_id=night_run.id,
                                      started_utc=night_run.started_at_utc.isoformat())])
        notes.append(f"night {night_run.id} had been interrupted; its decisions stand and this run completes it")
    carried = [_carried(ws, f) for f in store.files_of_nights(night_ids) if f.status in ("quarantined", "duplicate")]
    audit.sync_log(store, ws.log)
    return Recovery(notes, carried)


def _finish_archiving(ws: Workspace, night_files: list[StoredFile]) -> list[str]:
    """Move into the archive the files recorded as archived but still in the inbox (same SHA-256)."""
    notes = []
    for row in night_files:
        if row.status != "archived":
            continue
        target, source = ws.root / row.stored_as, ws.inbox / row.file_name
        if not target.exists() and source.exists() and sha256_file(source) == row.sha256:
            target.parent.mkdir(parents=True, exist_ok=True)
            os.replace(source, target)
            notes.append(f"finished archiving {row.file_name}, left in the inbox by an interrupted run")
    return notes


def _record_set_aside(ws: Workspace, store: Store, night_id: int, recorded: set[str], since: float) -> list[str]:
    """Record the files the interrupted night moved to quarantine (since it started) but did not record."""
    aside = []
    for path in sorted(ws.quarantine.iterdir()):
        if path.name.endswith(".reason.txt") or not path.is_file() or path.stat().st_mtime < since - 1:
            continue
        if str(path.relative_to(ws.root)) in recorded:
            continue
        reason_file = path.with_name(path.name + ".reason.txt")
        reason = reason_file.read_text(encoding="utf-8") if reason_file.exists() else \
            f"File {path.name} was set aside by a run that was interrupted before it recorded why.\n"
        if not reason_file.exists():
            atomic_write(reason_file, reason.encode("utf-8"))
        aside.append((path, reason))
    notes = []
    for path, reason in aside:
        row, event = quarantine_record(ws, night_id, path.name, sha256_file(path), "quarantined", reason.strip(),
                                       str(path.relative_to(ws.root)), recovered=True)
        store.record_files(night_id, [row], [event])
        notes.append(f"recorded {path.name}, set aside by an interrupted run")
    return notes


def _carried(ws: Workspace, row: StoredFile) -> QuarantinedFile:
    """A file the interrupted night set aside, with the text that links it to the lots it names."""
    path = ws.root / row.stored_as
    text = ""
    earlier_copy = row.status == "duplicate" and "tonight" not in (row.reason or "")
    if (row.status == "quarantined" or earlier_copy) and path.is_file() and not path.is_symlink():
        with open(path, "rb") as handle:
            text = handle.read(1 << 16).decode("utf-8", errors="replace")
    return QuarantinedFile(row.file_name, row.sha256, row.reason or "", text)
