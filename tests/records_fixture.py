"""A workspace whose store holds rows in every record table, written by lotgate's own store."""

from __future__ import annotations

import dataclasses
import hashlib

from pipeline.records import audit
from pipeline.records.demo_trust import create_demo_trust
from pipeline.records.desk_accounts import (
    NewCredentials,
    NewUser,
    add_user,
    record_account_event,
    set_credentials,
)
from pipeline.records.lot_record_store import InvestigationWrite, add_investigation, load_histories
from pipeline.records.store import Store
from pipeline.records.stored import DecisionWrite, LimitsWrite
from pipeline.records.workspace import open_workspace, write_settings
from pipeline.records.workspace_id import workspace_id
from pipeline.release.lot_record import LotResult
from pipeline.release.records import CertificateFile, DecisionRecord, RecordedResult
from pipeline.vocabulary import InvestigationOutcome, ResultStatus, Verdict


def _record(lot: str, fingerprint: str, disposition: str = "released") -> DecisionRecord:
    return DecisionRecord(lot, "LLC-200", disposition, (), (), "1.0", "a" * 64, fingerprint, disposition,
                          input_files={"lots-1.csv": "b" * 64},
                          results=(RecordedResult("activity", 1200.0, "1200", "U/mL", "pass"),))


PLANT = "Tarnwick Bioprocess test plant"


def settings_of(url: str, **more) -> dict:
    """The fixture workspace's settings: its store, UTC, and its configured trust anchor."""
    return {"database_url": url, "time_zone": "UTC", "trust": {"root_ca": "keys/root-ca.pem"},
            "signer_register": "keys/signers.yaml", **more}


def filled_workspace(root, url):
    """A workspace whose store holds rows in every record table, written by lotgate's own store."""
    root.mkdir(parents=True, exist_ok=True)
    create_demo_trust(root / "keys", PLANT)  # the plant's anchor and system identity (checkpoints are signed by it)
    write_settings(root, settings_of(url))
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
    # the lot record: one result each, the first lot's out of specification (investigated below)
    writes = [dataclasses.replace(w, lot_results=(LotResult(
        "lead", ResultStatus.VALID, Verdict.FAIL if n == 0 else Verdict.PASS, 7.0 if n == 0 else 1.0,
        "7.0" if n == 0 else "1.0", "mg/kg", None, "2026-11-21", "LIMS test PB", "LIMS test PB",
        {"lims-1.csv": "c" * 64}),)) for n, w in enumerate(writes)]
    writes[1] = dataclasses.replace(writes[1], record=dataclasses.replace(
        writes[1].record, certificate=CertificateFile("LLC-0002_r1_certificate.pdf", "d" * 64, "lotgate system",
                                                      "2026-11-21T01:00:00+00:00", "prepared")))
    stored = store.add_decisions(writes, (limits,))
    # a second revision of LLC-0002 supersedes its certificate (a document_status row)
    store.add_decisions([DecisionWrite(dataclasses.replace(_record("LLC-0002", "fLLC-0002-r2"), revision=2),
                                       "lotgate", night_id=first, manufactured_on="2026-11-20",
                                       events=(audit.event("decision", time_zone="UTC", lot_id="LLC-0002"),))])
    result = load_histories(store, ["LLC-0001"])["LLC-0001"].results[0]
    add_investigation(store, InvestigationWrite("LLC-0001", "lead", result.result_id,
                                                InvestigationOutcome.RESULT_INVALIDATED, "INV-0001",
                                                "pipetting error found", "retest in duplicate", "A. Person",
                                                {"signature": "test"}),
                      [audit.event("investigation-outcome", time_zone="UTC", lot_id="LLC-0001")])
    user = add_user(store, NewUser("reviewer", "A. Person", "reviewer", "argon2-hash", None, None, None, "admin"),
                    [audit.event("desk-account-added", time_zone="UTC")])
    record_account_event(store, user.id, "login-failed", None,
                         [audit.event("desk-login-failed", time_zone="UTC")])
    set_credentials(store, user.id, 0, NewCredentials("changed", "argon2-hash-2", None, None, None, "reviewer"),
                    "password-changed", None, [audit.event("desk-password-changed", time_zone="UTC")])
    store.mark_exported([stored[0].id], "results-000001-000001", [audit.event("lims-results-written", time_zone="UTC")])
    store.finish_night(first, files_received=1, files_archived=1, files_quarantined=0, lots_decided=2)
    audit.sync_log(store, ws.log)
    return ws, store
