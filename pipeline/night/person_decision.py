"""An authorised person's disposition of a lot (adapter): a new, signed revision.

The person's identity (PKCS#12 plus its passphrase: an ID and a secret, 21 CFR 11.200) signs
the decision record itself, so the signature is linked to that record (§11.70); a release also
re-issues the certificate, signed with the same identity. The nightly job never overrides it.
"""

from __future__ import annotations

import datetime as dt
import hashlib
import json
from dataclasses import dataclass
from typing import Any

from pipeline.errors import InputError
from pipeline.records import audit, ledger
from pipeline.records.signing import SigningIdentity, sign_pdf, sign_record
from pipeline.records.store import Store
from pipeline.records.workspace import Workspace, atomic_write
from pipeline.release.dossier import local_time_text
from pipeline.vocabulary import Disposition, Verdict

RELEASE_MEANING = ("Release of the lot by an authorised person: I have reviewed the lot's results, its hold "
                   "and its investigation, and I approve its release against the stated specification")
REJECT_MEANING = "Rejection of the lot by an authorised person: the lot must not be released"


@dataclass(frozen=True)
class PersonOutcome:
    lot_id: str
    revision: int
    disposition: str
    certificate: str | None
    report: str | None


def _blocking_results(record: dict[str, Any]) -> list[str]:
    """Results that leave nothing to certify: missing or invalid ones with a limit."""
    return [r["code"] for r in record.get("results", [])
            if r.get("verdict") not in (Verdict.PASS, Verdict.FAIL, Verdict.REPORTED)]


def decide_lot(ws: Workspace, store: Store, lot_id: str, *, release: bool, reason: str,
               identity: SigningIdentity) -> PersonOutcome:
    reason = (reason or "").strip()
    if not reason:
        raise InputError("a person's decision needs a reason (--reason TEXT): say what was reviewed and why")
    latest = store.latest_decision(lot_id)
    if latest is None:
        raise InputError(f"lot {lot_id} has no decision in the store at {ws.root}; nothing to review")
    base = dict(latest.record)
    if release and _blocking_results(base):
        missing = ", ".join(_blocking_results(base))
        raise InputError(f"lot {lot_id} cannot be released: no valid result for {missing}; a certificate needs every "
                         "result. Re-assay first, or reject the lot.")
    decided_at = dt.datetime.now(dt.UTC).replace(microsecond=0)
    revision = latest.revision + 1
    disposition = Disposition.RELEASED if release else Disposition.REJECTED
    meaning = RELEASE_MEANING if release else REJECT_MEANING
    label = f"{disposition} by {identity.signer_name}"
    record = {**{k: v for k, v in base.items() if k not in ("certificate", "report", "person_signature")},
              "disposition": disposition, "label": label, "hold_categories": [],
              "reasons": [f"decision of {identity.signer_name}: {reason}"],
              "earlier_decision": {"revision": latest.revision, "label": base.get("label"),
                                   "reasons": base.get("reasons", [])},
              "revision": revision, "decided_at_utc": decided_at.isoformat(),
              "decided_by": identity.signer_name, "meaning": meaning}
    record["fingerprint"] = hashlib.sha256(
        f"{base.get('fingerprint')}|{disposition}|{identity.fingerprint_sha256}|{decided_at.isoformat()}".encode()).hexdigest()
    certificate = report = None
    dossier_path = ws.reports / f"{lot_id}_r{latest.revision}_dossier.json"
    stem = f"{lot_id}_r{revision}"
    if dossier_path.exists():
        dossier = json.loads(dossier_path.read_text(encoding="utf-8"))
        dossier["decision"].update(disposition=disposition, label=label, hold_categories=[],
                                   reasons=record["reasons"], revision=revision,
                                   decided_at_utc=decided_at.isoformat(),
                                   decided_at_local=local_time_text(decided_at, ws.time_zone))
        from pipeline.documents.report import render_batch_report

        report_bytes = render_batch_report(dossier)
        atomic_write(ws.reports / f"{stem}_batch-report.pdf", report_bytes)
        atomic_write(ws.reports / f"{stem}_dossier.json", json.dumps(dossier, ensure_ascii=False, sort_keys=True).encode())
        report = {"file": f"{stem}_batch-report.pdf", "sha256": hashlib.sha256(report_bytes).hexdigest()}
        if release:
            from pipeline.documents.certificate import render_certificate

            signature = {"signer_name": identity.signer_name, "signed_at_local": local_time_text(decided_at, ws.time_zone),
                         "signed_at_utc": decided_at.isoformat(), "meaning": meaning,
                         "certificate_fingerprint": identity.fingerprint_sha256}
            signed = sign_pdf(render_certificate(dossier, signature), identity, reason=meaning,
                              location=ws.plant_name, signed_at=decided_at)
            atomic_write(ws.certificates / f"{stem}_certificate.pdf", signed)
            certificate = {"file": f"{stem}_certificate.pdf", "sha256": hashlib.sha256(signed).hexdigest(),
                           "signer": identity.signer_name, "signed_at_utc": decided_at.isoformat(), "meaning": meaning}
    elif release:
        raise InputError(f"the dossier of lot {lot_id} revision {latest.revision} ({dossier_path.name}) is missing; "
                         "the certificate cannot be re-issued")
    record["certificate"], record["report"] = certificate, report
    record["person_signature"] = sign_record(identity, ledger.canonical_json(record).encode("utf-8")).to_dict()
    events = [audit.event("person-disposition", time_zone=ws.time_zone, lot_id=lot_id, disposition=disposition,
                          by=identity.signer_name, reason=reason, meaning=meaning,
                          signer_certificate_sha256=identity.fingerprint_sha256,
                          record_sha256=hashlib.sha256(ledger.canonical_json(record).encode()).hexdigest())]
    if certificate is not None:
        events.append(audit.event("certificate-signed", time_zone=ws.time_zone, lot_id=lot_id, **certificate))
    store.add_decision(lot_id=lot_id, product_code=str(base.get("product")), manufactured_on=None, night_id=None,
                       decision=record, results=record.get("results", []), chart_values={}, decided_by=identity.signer_name,
                       change_note=f"{label}: {reason}", events=events)
    audit.sync_log(store, ws.log)
    return PersonOutcome(lot_id, revision, disposition,
                         None if certificate is None else f"certificates/{certificate['file']}",
                         None if report is None else f"reports/{report['file']}")
