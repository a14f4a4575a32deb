"""An authorised person's signed outcome of an out-of-specification investigation (use case).

The investigation itself is the plant's procedure; lotgate records its outcome and enforces
it. "Assignable laboratory cause: result invalidated" gives the OOS result the standing
*invalidated* (a new row; the result stays in the record) so that the next valid result of the
test counts; "confirmed OOS" leaves the result standing and the lot held until an authorised
person rejects it (``lotgate decide --reject``). The outcome, the reason and the retest plan are
signed with the person's identity (PKCS#12 and passphrase, as ``lotgate decide``) and chained in
the audit trail. The outcome itself does not decide the lot: the next night decides it again from
its record, with or without data for it that night (``pipeline.night.decide.lot_records``), or a
person decides it.
"""

from __future__ import annotations

import datetime as dt
import hashlib
import re
from dataclasses import dataclass

from pipeline.errors import InputError, NotFound
from pipeline.night.seal import seal_after_act
from pipeline.night.site_lots import latest_of_site
from pipeline.records import audit, ledger
from pipeline.records.lot_record_store import InvestigationWrite, add_investigation, load_histories
from pipeline.records.signer_check import authorise_person
from pipeline.records.signer_register import register_in_force
from pipeline.records.signing import SigningIdentity, sign_record
from pipeline.records.store import Store
from pipeline.records.workspace import Workspace
from pipeline.release.lot_record import LotResult
from pipeline.release.signature import checked_reason
from pipeline.vocabulary import InvestigationOutcome, ResultStatus, SignerRole, Verdict

REFERENCE = re.compile(r"[A-Za-z0-9][A-Za-z0-9._/-]{1,39}")
OUTCOMES = {"invalidated": InvestigationOutcome.RESULT_INVALIDATED, "confirmed": InvestigationOutcome.CONFIRMED_OOS}


@dataclass(frozen=True)
class RecordedInvestigation:
    lot_id: str
    attribute: str
    outcome: InvestigationOutcome
    reference: str
    result: LotResult


def acting_person(ws: Workspace, store: Store, identity: SigningIdentity, at: dt.datetime):
    """Who performs this act, checked against the register of authorised signers at signing time (the
    role 'result invalidation'); refused in one line, before anything is written, otherwise."""
    register, register_events = register_in_force(ws, store)
    check = authorise_person(identity, SignerRole.RESULT_INVALIDATION, anchor_path=ws.trust_root,
                             register=register, at=at)
    return check, register_events


def _clean(text: str | None, what: str, limit: int = 2000) -> str:
    value = " ".join((text or "").split())
    if not value:
        raise InputError(f"an investigation outcome needs {what}")
    if len(value) > limit:
        raise InputError(f"{what} is {len(value)} characters long; at most {limit} are kept")
    if any(ord(c) < 32 or 0x202A <= ord(c) <= 0x202E or 0x2066 <= ord(c) <= 0x2069 for c in value):
        raise InputError(f"{what} contains a control or text-direction character")
    return value


def standing_oos(results: tuple[LotResult, ...], test: str) -> LotResult | None:
    """The first valid out-of-specification result of ``test`` (attribute code or LIMS test code), if any."""
    mine = [r for r in results if r.attribute == test or r.source == f"LIMS test {test}"]
    return next((r for r in mine if r.status == ResultStatus.VALID and r.verdict == Verdict.FAIL), None)


def record_investigation(ws: Workspace, store: Store, lot_id: str, *, test: str, outcome: str, reference: str,
                         reason: str, retest_plan: str | None, identity: SigningIdentity) -> RecordedInvestigation:
    """Record and sign the outcome of the investigation of lot ``lot_id``'s standing OOS result of ``test``."""
    if outcome not in OUTCOMES:
        raise InputError(f"the outcome must be one of {', '.join(OUTCOMES)}; found '{outcome}'")
    chosen = OUTCOMES[outcome]
    if not REFERENCE.fullmatch(reference or ""):
        raise InputError(f"the investigation reference '{reference}' is not a reference: 2 to 40 letters, digits, "
                         "'.', '_', '/' or '-', e.g. INV-2026-014")
    reason = checked_reason(_clean(reason, "a reason (--reason TEXT)"), ws.reason_pattern)
    plan = _clean(retest_plan, "a retest plan (--retest-plan TEXT)") if chosen == InvestigationOutcome.RESULT_INVALIDATED \
        else _clean(retest_plan or "no retest: the result is confirmed", "a retest plan")
    if latest_of_site(ws, store, lot_id) is None:
        raise NotFound(f"lot {lot_id} has no decision in the store at {ws.root}")
    history = load_histories(store, [lot_id]).get(lot_id)
    result = standing_oos(history.results if history else (), test)
    if result is None or result.result_id is None:
        raise InputError(f"lot {lot_id} has no out-of-specification result of {test} standing in its record; "
                         "an investigation outcome is recorded against such a result")
    earlier = [i for i in (history.investigations if history else ()) if i.result_id == result.result_id]
    if earlier:
        raise InputError(f"the out-of-specification result of {test} of lot {lot_id} already has an investigation "
                         f"outcome ({earlier[0].outcome}, {earlier[0].reference}, by {earlier[0].decided_by})")
    now = dt.datetime.now(dt.UTC).replace(microsecond=0)
    check, register_events = acting_person(ws, store, identity, now)
    person = identity.signer_name
    recorded_at = now.isoformat()
    body = {"lot_id": lot_id, "attribute": result.attribute, "result_id": result.result_id,
            "result": result.reported, "tested_on": result.tested_on, "outcome": str(chosen), "reference": reference,
            "reason": reason, "retest_plan": plan, "decided_by": person, "recorded_at_utc": recorded_at}
    signed = ledger.canonical_json(body).encode("utf-8")
    signature = sign_record(identity, signed).to_dict()
    event = audit.event("investigation-outcome", time_zone=ws.time_zone, **body,
                        signer_certificate_sha256=identity.fingerprint_sha256, person=check.person,
                        role=check.role.value, register_version=check.register_version,
                        register_sha256=check.register_sha256, record_sha256=hashlib.sha256(signed).hexdigest())
    add_investigation(store, InvestigationWrite(lot_id, result.attribute, result.result_id, chosen, reference, reason,
                                                plan, person, {**signature, "signed": body}),
                      [*register_events, event])
    audit.sync_log(store, ws.log)
    seal_after_act(ws, store, f"investigation-outcome {lot_id}")
    return RecordedInvestigation(lot_id, result.attribute, chosen, reference, result)
