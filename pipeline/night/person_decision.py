"""An authorised person's disposition of a lot: a new, signed revision.

The person's identity (PKCS#12 plus its passphrase: an ID and a secret, 21 CFR 11.200) signs
the decision record itself, so the signature is linked to that record (§11.70); a release also
re-issues the certificate, signed with the same identity. The nightly job never overrides it.
A person may not release what the nightly job may not: a lot whose current revision holds an
out-of-specification result stays unreleasable until its investigation outcome invalidates the
result and the retest's revision shows a result in specification (``release_check``).
"""

from __future__ import annotations

import dataclasses
import datetime as dt
import hashlib
import json
from dataclasses import dataclass

from pipeline.errors import InputError
from pipeline.night.lot_documents import (
    WrittenDocuments,
    place_documents,
    render_documents,
    write_documents,
)
from pipeline.night.open import IdentitySigner
from pipeline.night.release_check import check_release
from pipeline.night.seal import seal_after_act
from pipeline.night.site_lots import latest_of_site
from pipeline.records import audit, ledger
from pipeline.records.signer_check import authorise_person
from pipeline.records.signer_register import register_in_force
from pipeline.records.signing import SigningIdentity, sign_record
from pipeline.records.store import Store
from pipeline.records.stored import DecisionWrite
from pipeline.records.workspace import Workspace
from pipeline.release.dossier import local_time_text
from pipeline.release.records import DecisionRecord, EarlierDecision
from pipeline.release.signature import (
    PERSON_REJECT_MEANING,
    PERSON_RELEASE_MEANING,
    checked_reason,
    signature_block,
)
from pipeline.vocabulary import Disposition, SignerRole


@dataclass(frozen=True)
class PersonOutcome:
    lot_id: str
    revision: int
    disposition: str
    certificate: str | None
    report: str | None


def _reissue(ws: Workspace, record: DecisionRecord, earlier_revision: int, decided_at: dt.datetime,
             signer: IdentitySigner, release: bool) -> WrittenDocuments | None:
    """The earlier revision's dossier under the new decision: report re-drawn, certificate re-signed (release)."""
    dossier_path = ws.reports / f"{record.lot_id}_r{earlier_revision}_dossier.json"
    if not dossier_path.exists():
        if release:
            raise InputError(f"the dossier of lot {record.lot_id} revision {earlier_revision} ({dossier_path.name}) "
                             "is missing; the certificate cannot be re-issued")
        return None
    dossier = json.loads(dossier_path.read_text(encoding="utf-8"))
    dossier["decision"].update(disposition=record.disposition, label=record.label, hold_categories=[],
                               reasons=list(record.reasons), revision=record.revision,
                               decided_at_utc=decided_at.isoformat(),
                               decided_at_local=local_time_text(decided_at, ws.time_zone))
    signature = signature_block(signer.signer_name, signer.fingerprint_sha256, decided_at, ws.time_zone,
                                str(record.meaning)) if release else None
    report, certificate = render_documents(dossier, signature, signer, ws.plant_name)
    return write_documents(ws, f"{record.lot_id}_r{record.revision}", dossier, report, certificate, signature, signer)


def decide_lot(ws: Workspace, store: Store, lot_id: str, *, release: bool, reason: str,
               identity: SigningIdentity) -> PersonOutcome:
    """Record a person's release or rejection of a lot as its next revision, signed with their identity.

    Refused before anything is written: a reason that says nothing; a release while a result of the
    lot's current revision does not show it meets its specification (an out-of-specification result
    without an investigation outcome invalidating it and its retest decided, a confirmed one, an
    undecided, missing or invalid result: ``release_check``; a rejection is always possible); or an
    identity that the register of authorised signers does not allow to release (or reject) at this moment.
    """
    reason = checked_reason(reason, ws.reason_pattern)
    latest = latest_of_site(ws, store, lot_id)
    if latest is None:
        raise InputError(f"lot {lot_id} has no decision in the store at {ws.root}; nothing to review")
    base = latest.record
    if release:
        check_release(ws, store, latest)
    decided_at = dt.datetime.now(dt.UTC).replace(microsecond=0)
    register, register_events = register_in_force(ws, store)
    check = authorise_person(identity, SignerRole.RELEASE_APPROVAL if release else SignerRole.REJECTION,
                             anchor_path=ws.trust_root, register=register, at=decided_at)
    disposition = Disposition.RELEASED if release else Disposition.REJECTED
    signer = IdentitySigner(identity)
    record = dataclasses.replace(
        base, disposition=disposition, label=f"{disposition} by {identity.signer_name}", hold_categories=(),
        reasons=(f"decision of {identity.signer_name}: {reason}",),
        earlier_decision=EarlierDecision(latest.revision, base.label, base.reasons),
        revision=latest.revision + 1, decided_at_utc=decided_at.isoformat(), decided_by=identity.signer_name,
        meaning=PERSON_RELEASE_MEANING if release else PERSON_REJECT_MEANING, certificate=None, report=None,
        person_signature=None,
        fingerprint=hashlib.sha256(f"{base.fingerprint}|{disposition}|{identity.fingerprint_sha256}|"
                                   f"{decided_at.isoformat()}".encode()).hexdigest())
    written = _reissue(ws, record, latest.revision, decided_at, signer, release)
    if written is not None:
        record = dataclasses.replace(record, certificate=written.certificate, report=written.report)
    signed = ledger.canonical_json(record.to_json()).encode("utf-8")
    record = dataclasses.replace(record, person_signature=sign_record(identity, signed).to_dict())
    events = [*register_events,
              audit.event("person-disposition", time_zone=ws.time_zone, lot_id=lot_id, disposition=disposition,
                          by=identity.signer_name, reason=reason, meaning=record.meaning,
                          signer_certificate_sha256=identity.fingerprint_sha256, person=check.person,
                          role=check.role.value, register_version=check.register_version,
                          register_sha256=check.register_sha256,
                          record_sha256=hashlib.sha256(ledger.canonical_json(record.to_json()).encode()).hexdigest())]
    if record.certificate is not None:
        events.append(audit.event("certificate-signed", time_zone=ws.time_zone, lot_id=lot_id,
                                  **vars(record.certificate)))
    store.add_decisions([DecisionWrite(record, identity.signer_name, change_note=f"{record.label}: {reason}",
                                       events=tuple(events))])
    place_documents(ws, [] if written is None else [written])
    audit.sync_log(store, ws.log)
    seal_after_act(ws, store, f"person-disposition {lot_id}")
    return PersonOutcome(lot_id, record.revision, disposition,
                         None if record.certificate is None else f"certificates/{record.certificate.file}",
                         None if record.report is None else f"reports/{record.report.file}")
