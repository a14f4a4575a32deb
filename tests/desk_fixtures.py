"""A small workspace for the desk's tests, made directly in the store (a simulation with known content).

Lots with hostile numbers and reasons cannot come through the intake (it refuses them), so they
are stored here as records, as a store damaged or fed by another system could hold them.
"""

from __future__ import annotations

import re
from dataclasses import dataclass
from pathlib import Path

from flows.desk.accounts import Desk, create_account
from flows.desk.roles import DeskRole
from flows.desk.settings import DeskSettings
from pipeline.records.demo_trust import DemoReviewer, create_demo_trust
from pipeline.records.store import Store
from pipeline.records.stored import DecisionWrite
from pipeline.records.workspace import open_workspace, write_settings
from pipeline.release.lot_record import LotResult
from pipeline.release.records import DecisionRecord, RecordedResult
from pipeline.vocabulary import ResultStatus, SignerRole, Verdict

HOSTILE_LOT = "<script>alert(1)</script>"
HOSTILE_REASON = '"><img src=x onerror=alert(2)> & <b>bold</b>'
HOSTILE_FILE = "lims-<i>x</i>.csv"
PASSWORDS = {role: f"{role.value} password 2026" for role in DeskRole}
SIGNER_NAMES = {DeskRole.REVIEWER: "Ines Varga", DeskRole.INVESTIGATOR: "Tomas Orlik",
                DeskRole.CHART_OWNER: "Lena Marsh"}
# Each signing person in the workspace's register of authorised signers, with the roles of their desk role.
REGISTERED = {DeskRole.REVIEWER: DemoReviewer("ines.varga", "Ines Varga", (SignerRole.RELEASE_APPROVAL,
                                                                            SignerRole.REJECTION)),
              DeskRole.INVESTIGATOR: DemoReviewer("tomas.orlik", "Tomas Orlik", (SignerRole.RESULT_INVALIDATION,)),
              DeskRole.CHART_OWNER: DemoReviewer("lena.marsh", "Lena Marsh", (SignerRole.REBASELINE,))}


@dataclass
class DeskWorkspace:
    root: Path
    desk: Desk


OOS_LOT = "LLC-9000-106"  # its lead result 7.0 mg/kg (limit ≤ 5.0 mg/kg) stands with no investigation outcome


def _record(lot: str, disposition: str, label: str, categories=(), reasons=(), value=200.0, night=1, more=()):
    return DecisionRecord(
        lot_id=lot, product="LLC-200", disposition=disposition, hold_categories=tuple(categories),
        reasons=tuple(reasons), spec_version="3.1", spec_sha256="0" * 64, fingerprint=f"fp-{lot}", label=label,
        night_id=night, decided_at_utc="2026-11-27T22:00:00+00:00",
        results=(RecordedResult("specific_activity", value, f"{value:.0f}", "U/mg", "pass"), *more))


def _lead(value: float, verdict: Verdict, lims_file: str) -> LotResult:
    return LotResult("lead", ResultStatus.VALID, verdict, value, f"{value:.1f}", "mg/kg", None, "2026-11-26",
                     "LIMS test PB", "LIMS test PB", {lims_file: "9" * 64})


def make_workspace(root: Path, database_url: str | None = None) -> DeskWorkspace:
    trust = create_demo_trust(root / "keys", "Brackwater Enzymes (test)", tuple(REGISTERED.values()))
    write_settings(root, {"plant_name": "Brackwater Enzymes (test)", "time_zone": "Europe/Berlin",
                          "trust": {"root_ca": "keys/root-ca.pem"}, "signer_register": "keys/signers.yaml",
                          **({"database_url": database_url} if database_url else {})})
    ws = open_workspace(root)
    ws.make_folders()
    store = Store(ws.database_url)
    night = store.start_night("test", "c" * 32)
    store.record_files(night, [
        dict(file_name=HOSTILE_FILE, sha256="1" * 64, kind=None, layout_version=None, status="quarantined",
             reason=f"- {HOSTILE_REASON}", stored_as="quarantine/lims-x.csv")], [])
    writes = [DecisionWrite(_record(f"LLC-9000-{i:03d}", "released", "released", value=200.0 + (i % 5)),
                            "nightly", night_id=night, chart_values={"specific_activity": 200.0 + (i % 5)})
              for i in range(1, 7)]
    writes += [
        DecisionWrite(_record(HOSTILE_LOT, "held", "held: out of specification", ["out of specification"],
                              [HOSTILE_REASON]), "nightly", night_id=night),
        DecisionWrite(_record("LLC-9000-101", "held", "held: out of trend", ["out of trend"],
                              ["specific activity far below the trend"]), "nightly", night_id=night),
        DecisionWrite(_record("LLC-9000-102", "held", "held: overdue", ["overdue"], ["lead result overdue"]),
                      "nightly", night_id=night),
        DecisionWrite(_record("LLC-9000-103", "ready for release", "ready for release"), "nightly", night_id=night),
        DecisionWrite(_record("LLC-9000-104", "pending", "pending", reasons=["protein due"]), "nightly",
                      night_id=night),
        # an out-of-specification lead result standing in the lot's record (for an investigation)
        DecisionWrite(_record("LLC-9000-105", "held", "held: out of specification", ["out of specification"],
                              ["Lead 7.0 mg/kg is above the limit ≤ 5.0 mg/kg"]), "nightly", night_id=night,
                      lot_results=(_lead(7.0, Verdict.FAIL, "lims-9.csv"),)),
        # the same, shown by the revision itself as the night records it (for the release a person may not sign)
        DecisionWrite(_record(OOS_LOT, "held", "held: out of specification", ["out of specification"],
                              ["Lead 7.0 mg/kg is above the limit ≤ 5.0 mg/kg"],
                              more=(RecordedResult("lead", 7.0, "7.0", "mg/kg", "fail"),)), "nightly", night_id=night,
                      lot_results=(_lead(7.0, Verdict.FAIL, "lims-10.csv"),)),
    ]
    store.add_decisions(writes)
    store.finish_night(night, files_received=1, files_archived=0, files_quarantined=1, lots_decided=len(writes))
    (root / "reports" / "LLC-9000-001_r1_batch-report.pdf").write_bytes(b"%PDF-1.4 test\n")
    for role in DeskRole:
        p12 = None
        passphrase_file = None
        if role in REGISTERED:
            p12, passphrase_file = trust.identity_of(REGISTERED[role].person)
        create_account(ws, store, re.sub("[^a-z]", "", role.value), role, PASSWORDS[role], p12=p12,
                       p12_passphrase_file=passphrase_file, by="test administrator")
    return DeskWorkspace(root, Desk(ws, store, DeskSettings()))


def login_name(role: DeskRole) -> str:
    return re.sub("[^a-z]", "", role.value)
