"""A workspace whose store holds rows in every record table, written by lotgate's own store."""

from __future__ import annotations

import hashlib

from pipeline.records import audit
from pipeline.records.store import Store
from pipeline.records.stored import DecisionWrite, LimitsWrite
from pipeline.records.workspace import open_workspace, write_settings
from pipeline.records.workspace_id import workspace_id
from pipeline.release.records import DecisionRecord, RecordedResult


def _record(lot: str, fingerprint: str, disposition: str = "released") -> DecisionRecord:
    return DecisionRecord(lot, "LLC-200", disposition, (), (), "1.0", "a" * 64, fingerprint, disposition,
                          input_files={"lots-1.csv": "b" * 64},
                          results=(RecordedResult("activity", 1200.0, "1200", "U/mL", "pass"),))


def filled_workspace(root, url):
    """A workspace whose store holds rows in every record table, written by lotgate's own store."""
    root.mkdir(parents=True, exist_ok=True)
    write_settings(root, {"database_url": url, "time_zone": "UTC"})
    ws = open_workspace(root)
    ws.make_folders()
    store = Store(url)
    first = store.start_night("test", workspace_id(root))
    store.start_night("test", workspace_id(root))  # a second night, never closed
    archived = ws.archive / "night-0001" / "lots-1.csv"
    archived.parent.mkdir(parents=True)
    archived.write_bytes(b"lot_id\nLLC-0001\n")
    archived.chmod(0o444)
    sha = hashlib.sha256(archived.read_bytes()).hexdigest()
    store.record_files(first, [dict(file_name="lots-1.csv", sha256=sha, kind="lot-registry", layout_version="1",
                                    status="archived", reason=None, stored_as="archive/night-0001/lots-1.csv")],
                       [audit.event("file-archived", time_zone="UTC", file="lots-1.csv", sha256=sha)])
    limits = LimitsWrite("LLC-200", "activity", 1200.0, 6.3, 7.1, ("LLC-0001", "LLC-0002"), "lotgate", "baseline",
                         (audit.event("limits-frozen", time_zone="UTC"),))
    writes = [DecisionWrite(_record(lot, f"f{lot}"), "lotgate", night_id=first, manufactured_on="2026-11-20",
                            chart_values={"activity": 1200.0 + n},
                            events=(audit.event("decision", time_zone="UTC", lot_id=lot),))
              for n, lot in enumerate(("LLC-0001", "LLC-0002"))]
    stored = store.add_decisions(writes, (limits,))
    store.mark_exported([stored[0].id], "results-000001-000001", [audit.event("lims-results-written", time_zone="UTC")])
    store.finish_night(first, files_received=1, files_archived=1, files_quarantined=0, lots_decided=2)
    audit.sync_log(store, ws.log)
    return ws, store
