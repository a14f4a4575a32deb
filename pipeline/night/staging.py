"""Documents written but not yet in place: after a stopped run, each is placed or removed.

A lot's documents are written into the staging folder, the decision naming them (with their
SHA-256) is committed, and then they are moved into place (``lot_documents``). A run stopped in
between leaves documents staged. On the next run, before anything else is decided, a staged
document whose committed decision names it with the same SHA-256 is moved into place; any other
is removed, and each removal is recorded (a ``document-removed`` audit event). When a night was
left unfinished, the documents already in place are checked the same way: one that no committed
decision names (written by a version of lotgate that placed documents before their decision) is
removed and recorded too.
"""

from __future__ import annotations

from pathlib import Path

from pipeline.night.lot_documents import (
    documents_named,
    lot_of_document,
    place_document,
    staging_folder,
)
from pipeline.records import audit
from pipeline.records.controlled_files import sha256_file
from pipeline.records.store import Store
from pipeline.records.workspace import Workspace


def recover_documents(ws: Workspace, store: Store, interrupted: bool) -> None:
    """Place the staged documents whose decisions are committed; remove (and record) the others.

    After an interrupted night (``interrupted``) the documents in place are checked too.
    """
    staging = staging_folder(ws)
    staged = sorted(p for p in staging.rglob("*") if p.is_file()) if staging.is_dir() else []
    placed: list[Path] = []
    if interrupted:
        placed = sorted(p for folder in (ws.certificates, ws.reports) if folder.is_dir() for p in folder.iterdir()
                        if p.is_file() and lot_of_document(p.name) is not None)
    if not staged and not placed:
        return
    lots = sorted({lot for p in (*staged, *placed) if (lot := lot_of_document(p.name)) is not None})
    named: dict[str, str | None] = {}
    for decision in store.decisions_of_lots(lots):
        named.update(documents_named(decision.record))
    removed: list[tuple[Path, str, str]] = []
    for path in staged:
        relative = path.relative_to(staging).as_posix()
        if path.name.startswith(".") and path.name.endswith(".tmp"):
            path.unlink()  # a write cut short: never a whole document
        elif relative in named and named[relative] in (None, sha256_file(path)):
            place_document(ws, relative)
        else:
            removed.append((path, relative, "staged by a run that stopped before the decision naming it was stored"))
    for path in placed:
        relative = path.relative_to(ws.root).as_posix()
        if relative not in named:
            removed.append((path, relative, "in place without a stored decision naming it, left by a run that stopped"))
    if removed:  # recorded first, removed after: a run stopped in between finds them again
        store.add_events([audit.event("document-removed", time_zone=ws.time_zone, lot_id=lot_of_document(path.name),
                                      file=relative, sha256=sha256_file(path), reason=why)
                          for path, relative, why in removed])
        audit.sync_log(store, ws.log)
    for path, _, _ in removed:
        path.unlink()
