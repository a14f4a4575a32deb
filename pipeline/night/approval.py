"""An authorised person approves a lot that is ready for release: their signature joins the system's.

The night prepared the lot's certificate and signed it with the SYSTEM identity ("every release
criterion met; NOT released until approved"). Approval, by a person holding the role
'release approval' in the register at the moment of signing, adds the person's own PAdES
signature to that same certificate in an incremental update (the system's signature stays
intact and covers its revision) — visible: it fills the empty signature field the system left over
the box the certificate keeps for it, with a stamp naming the person, the meaning, the plant's local
time and the certificate's fingerprint (a certificate prepared before that box existed gets an
invisible signature, as before) — and records the lot's next revision: released, decided by the
person, the record itself signed with the person's identity. Nothing is written when any check
fails: the identity, the register, the reason, the lot's current state or the certificate on disk.
"""

from __future__ import annotations

import dataclasses
import datetime as dt
import hashlib
from dataclasses import dataclass

from pipeline.errors import InputError, NotFound, SigningError
from pipeline.night.lot_documents import place_document, staging_folder
from pipeline.night.seal import seal_after_act
from pipeline.night.site_lots import latest_of_site
from pipeline.records import audit, ledger
from pipeline.records.desk_queries import current_decisions
from pipeline.records.signer_check import PersonCheck, authorise_person
from pipeline.records.signer_register import register_in_force
from pipeline.records.signing import SigningIdentity, sign_pdf, sign_record
from pipeline.records.store import Store
from pipeline.records.stored import DecisionWrite, StoredDecision
from pipeline.records.workspace import Workspace, atomic_write
from pipeline.release.records import CertificateFile, EarlierDecision
from pipeline.release.signature import (
    APPROVAL_FIELD,
    PERSON_APPROVAL_MEANING,
    approval_stamp_lines,
    checked_reason,
)
from pipeline.vocabulary import Disposition, SignerRole


@dataclass(frozen=True)
class Approved:
    lot_id: str
    revision: int
    certificate: str  # relative to the workspace
    approved_by: str
    signed_at_utc: str


def lots_ready(store: Store, *, night_id: int | None = None, lots: tuple[str, ...] = (),
               site_id: str | None = None) -> list[str]:
    """The lots to approve: the named ones, else those of the site ``site_id`` (None: every lot) ready for
    release of one night (of every night: None)."""
    if lots:
        return list(dict.fromkeys(lots))
    current = [d for d in current_decisions(store, site_id=site_id)  # each lot's latest revision, found in the database
               if d.disposition == Disposition.READY_FOR_RELEASE and night_id in (None, d.record.night_id)]
    return [d.lot_id for d in current]


def _current(ws: Workspace, store: Store, lot_id: str) -> StoredDecision:
    latest = latest_of_site(ws, store, lot_id)
    if latest is None:
        raise NotFound(f"lot {lot_id} has no decision in the store; nothing to approve")
    if latest.disposition != Disposition.READY_FOR_RELEASE:
        raise InputError(f"lot {lot_id} revision {latest.revision} is {latest.record.label}, not ready for release; "
                         "only a lot the night found ready for release is approved (a held lot is decided with "
                         "lotgate decide)")
    if latest.record.certificate is None:
        raise InputError(f"lot {lot_id} revision {latest.revision} names no certificate to approve")
    return latest


def approve_lot(ws: Workspace, store: Store, lot_id: str, *, identity: SigningIdentity, reason: str,
                at: dt.datetime | None = None) -> Approved:
    """Approve one ready lot: the person's signature on its certificate, and the released revision."""
    reason = checked_reason(reason, ws.reason_pattern)
    latest = _current(ws, store, lot_id)
    signed_at = (at or dt.datetime.now(dt.UTC)).replace(microsecond=0)
    register, register_events = register_in_force(ws, store)
    check: PersonCheck = authorise_person(identity, SignerRole.RELEASE_APPROVAL, anchor_path=ws.trust_root,
                                          register=register, at=signed_at)
    base = latest.record
    prepared = base.certificate
    assert prepared is not None  # _current refuses a record without one
    source = ws.certificates / prepared.file
    try:
        pdf = source.read_bytes()
    except OSError as exc:
        raise InputError(f"the certificate of lot {lot_id} ({source}) cannot be read ({exc.strerror}); "
                         "nothing approved") from exc
    if hashlib.sha256(pdf).hexdigest() != prepared.sha256:
        raise SigningError(f"the certificate of lot {lot_id} on disk ({source.name}) is not the one recorded "
                           f"(SHA-256 differs); nothing approved: investigate before any release")
    revision = latest.revision + 1
    name = f"{lot_id}_r{revision}_certificate.pdf"
    stamp = approval_stamp_lines(identity.signer_name, identity.fingerprint_sha256, signed_at, ws.time_zone)
    approved_pdf = sign_pdf(pdf, identity, reason=PERSON_APPROVAL_MEANING, location=ws.plant_name,
                            signed_at=signed_at, field_name=APPROVAL_FIELD, stamp_lines=stamp)
    certificate = CertificateFile(name, hashlib.sha256(approved_pdf).hexdigest(), identity.signer_name,
                                  signed_at.isoformat(), PERSON_APPROVAL_MEANING, identity.fingerprint_sha256)
    record = dataclasses.replace(
        base, disposition=Disposition.RELEASED, label=f"{Disposition.RELEASED}: approved by {identity.signer_name}",
        hold_categories=(), reasons=(f"approval of {identity.signer_name}: {reason}",),
        earlier_decision=EarlierDecision(latest.revision, base.label, base.reasons), revision=revision,
        decided_at_utc=signed_at.isoformat(), decided_by=identity.signer_name, meaning=PERSON_APPROVAL_MEANING,
        certificate=certificate, person_signature=None,
        fingerprint=hashlib.sha256(f"{base.fingerprint}|approved as revision {revision}".encode()).hexdigest())
    signed = ledger.canonical_json(record.to_json()).encode("utf-8")
    record = dataclasses.replace(record, person_signature=sign_record(identity, signed).to_dict())
    events = [*register_events,
              audit.event("lot-approved", time_zone=ws.time_zone, lot_id=lot_id, revision=revision,
                          approved_revision=latest.revision, by=identity.signer_name, person=check.person,
                          role=check.role.value, reason=reason, meaning=PERSON_APPROVAL_MEANING,
                          signer_certificate_sha256=identity.fingerprint_sha256,
                          register_version=check.register_version, register_sha256=check.register_sha256,
                          prepared_certificate_sha256=prepared.sha256,
                          record_sha256=hashlib.sha256(ledger.canonical_json(record.to_json()).encode()).hexdigest()),
              audit.event("certificate-signed", time_zone=ws.time_zone, lot_id=lot_id, **vars(certificate))]
    atomic_write(staging_folder(ws) / "certificates" / name, approved_pdf)
    store.add_decisions([DecisionWrite(record, identity.signer_name, change_note=f"{record.label}: {reason}",
                                       events=tuple(events))])
    place_document(ws, f"certificates/{name}")
    audit.sync_log(store, ws.log)
    return Approved(lot_id, revision, f"certificates/{name}", identity.signer_name, signed_at.isoformat())


def approve_lots(ws: Workspace, store: Store, lot_ids: list[str], *, identity: SigningIdentity,
                 reason: str) -> list[Approved]:
    """Approve each lot in turn (each its own revision and transaction); all checks run before the first."""
    checked_reason(reason, ws.reason_pattern)
    register, _ = register_in_force(ws, store)
    authorise_person(identity, SignerRole.RELEASE_APPROVAL, anchor_path=ws.trust_root, register=register)
    for lot_id in lot_ids:
        _current(ws, store, lot_id)
    done = [approve_lot(ws, store, lot_id, identity=identity, reason=reason) for lot_id in lot_ids]
    if done:
        seal_after_act(ws, store, f"release-approved {', '.join(a.lot_id for a in done)}")  # one checkpoint
    return done
