"""Setting aside the night's plate reads whose plate format their method does not declare (shell).

The check itself is pure (pipeline.intake.plate_methods.format_problems); here each such read
is quarantined like a read that breaks its layout: recorded first (name, SHA-256, reason), then
moved beside its reason file, and dropped from the night's parsed exports. Its plate's lots are
then held, naming the quarantined read and the reason (pipeline.intake.assembly).
"""

from __future__ import annotations

from pipeline.controlled.catalog import Catalog
from pipeline.intake.plate_methods import format_problems
from pipeline.night.receive import Intake
from pipeline.night.receive import _quarantine as quarantine_file
from pipeline.records import audit
from pipeline.records.store import Store
from pipeline.records.workspace import Workspace


def set_aside_undeclared_formats(ws: Workspace, store: Store, intake: Intake, catalog: Catalog) -> list[str]:
    """Quarantine every parsed read whose plate format its method version does not declare; their names."""
    rejected = format_problems(intake.parsed, catalog)
    if not rejected:
        return []
    kept = []
    for parsed in intake.parsed:
        problem = rejected.get(parsed.file_name)
        if problem is None:
            kept.append(parsed)
            continue
        path = intake.paths.pop(parsed.file_name)
        text = path.read_bytes().decode("utf-8", errors="replace")
        quarantine_file(ws, store, intake, path, parsed.sha256, "quarantined", problem.report(), text)
    intake.parsed = kept
    audit.sync_log(store, ws.log)
    return sorted(rejected)
