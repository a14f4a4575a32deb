"""Recovering from an interrupted night: finishing, from its records, the file moves it had begun."""

from __future__ import annotations

import os
from dataclasses import dataclass
from pathlib import Path

from pipeline.intake.assembly import QuarantinedFile
from pipeline.night.receive import place_aside
from pipeline.night.staging import recover_documents
from pipeline.records import archive_files, audit
from pipeline.records.controlled_files import sha256_file
from pipeline.records.store import Store
from pipeline.records.stored import StoredFile
from pipeline.records.workspace import Workspace, atomic_write


@dataclass(frozen=True)
class Recovery:
    notes: list[str]
    quarantined: list[QuarantinedFile]  # set aside by the interrupted night: still tonight's evidence


def recover_interrupted(ws: Workspace, store: Store, identity: str | None = None) -> Recovery:
    """Finish what a killed run of this workspace (``identity``) left: file moves, reason files, temporary files.

    Every inbox entry is recorded (name, SHA-256, where it goes) before it is moved, so the
    records say what remains to be done; file times are not consulted. Decisions need no
    mending: each was committed with its audit events in one transaction, and a lot whose
    fingerprint is stored is not decided again. The files the interrupted night set aside are
    handed on, so that the lots they name see the same inputs (and fingerprints) as they would
    have in one uninterrupted run.
    """
    for folder in (ws.root, ws.inbox, ws.certificates, ws.reports, ws.lims, ws.archive, ws.quarantine):
        for stale in folder.glob(".*.tmp"):
            stale.unlink(missing_ok=True)
    for stale in ws.archive.glob("night-*/.*.tmp"):  # archive copies staged by a stopped close
        stale.unlink(missing_ok=True)
    unfinished = store.unfinished_nights(identity)
    # Documents a stopped run left staged, or in place without a decision (staging.py).
    recover_documents(ws, store, interrupted=bool(unfinished))
    if not unfinished:
        return Recovery([], [])
    night_ids = [n.id for n in unfinished]
    night_files = store.files_of_nights(night_ids)
    notes = [note for row in night_files if (note := _finish_move(ws, row))]
    for night_run in unfinished:
        store.finish_night(night_run.id, "interrupted")
        store.add_events([audit.event("night-interrupted", time_zone=ws.time_zone, night_id=night_run.id,
                                      started_utc=night_run.started_at_utc.isoformat())])
        notes.append(f"night {night_run.id} had been interrupted; its decisions stand and this run completes it")
    carried = [_carried(ws, f) for f in night_files if f.status in ("quarantined", "duplicate")]
    audit.sync_log(store, ws.log)
    return Recovery(notes, carried)


def _finish_move(ws: Workspace, row: StoredFile) -> str | None:
    """Move a recorded file still in the inbox (same SHA-256) to where its record says; write a missing reason file."""
    target, source = ws.root / row.stored_as, ws.inbox / row.file_name
    aside = row.status != "archived"
    if not os.path.lexists(target) and os.path.lexists(source) and _same_entry(source, row.sha256):
        target.parent.mkdir(parents=True, exist_ok=True)
        if aside:
            place_aside(source, target, (row.reason or "") + "\n")
        else:  # archived as close does: a read-only copy with the recorded SHA-256, then the inbox file removed
            tmp, copy_sha = archive_files.stage_copy(source, target.parent)
            if copy_sha != row.sha256:
                tmp.unlink()
                return f"{row.file_name} changed in the inbox since an interrupted run recorded it; it was left there"
            archive_files.place(tmp, target)
            source.unlink()
        return f"finished {'setting aside' if aside else 'archiving'} {row.file_name}, left in the inbox by an interrupted run"
    reason_file = target.with_name(target.name + ".reason.txt")
    if aside and os.path.lexists(target) and not reason_file.exists():
        atomic_write(reason_file, ((row.reason or "") + "\n").encode("utf-8"))
        return f"wrote the reason file of {row.file_name}, set aside by an interrupted run"
    return None


def _same_entry(source: Path, sha256: str) -> bool:
    """Whether the inbox entry is the one recorded: a regular file by its bytes; a link or special entry by name."""
    return not source.is_file() or source.is_symlink() or sha256_file(source) == sha256


def _carried(ws: Workspace, row: StoredFile) -> QuarantinedFile:
    """A file the interrupted night set aside, with the text that links it to the lots it names."""
    path = ws.root / row.stored_as
    text = ""
    earlier_copy = row.status == "duplicate" and "tonight" not in (row.reason or "")
    if (row.status == "quarantined" or earlier_copy) and path.is_file() and not path.is_symlink():
        with open(path, "rb") as handle:
            text = handle.read(1 << 16).decode("utf-8", errors="replace")
    return QuarantinedFile(row.file_name, row.sha256, row.reason or "", text)
