"""Every signing act of the desk, in one place: password again, key unsealed, the command line's use case.

Each act (21 CFR 11.50, 11.100, 11.200):
1. checks the person's role on the server;
2. checks the password typed at signing (Argon2) — a wrong one refuses the act and writes nothing
   but the failed attempt (an account event and a ``desk-signature-refused`` audit event; the
   account locks at the limit);
3. opens the person's sealed signing identity with that password;
4. calls the SAME use case as the command line (``decide_lot`` for release and reject, under the
   run lock like ``lotgate decide``; ``rebaseline`` like ``lotgate rebaseline``), which writes the
   records, audit events and PDF signature;
5. records a ``desk-signature`` audit event linking the desk account to the act, and returns the
   manifestation read back from what was stored (printed name, date and time with zone, meaning).

When the trust and investigation use cases land (``approve``, ``investigate``), each is one more
function here calling them in the same frame (``_signing``); the pages already offer the acts by role.
"""

from __future__ import annotations

import datetime as dt
from collections.abc import Iterator
from contextlib import contextmanager
from dataclasses import dataclass

from flows.desk.accounts import Desk, desk_write, password_matches, record_failure
from flows.desk.keystore import unseal_identity
from flows.desk.roles import DeskAct, may
from flows.desk.sessions import Session
from pipeline.controlled.specs import Attribute
from pipeline.errors import LotgateError
from pipeline.night.person_decision import decide_lot
from pipeline.night.rebaseline import rebaseline
from pipeline.records import audit
from pipeline.records import desk_accounts as accounts
from pipeline.records.signing import SigningIdentity
from pipeline.release.dossier import local_time_text
from pipeline.release.signature import (
    PERSON_APPROVAL_MEANING,
    PERSON_REJECT_MEANING,
    PERSON_RELEASE_MEANING,
)

MAX_REASON = 2000
REBASELINE_MEANING = ("Re-baseline of a control chart by its owner: I have reviewed the chosen released lots and "
                      "approve the new control limits for judging the next lots")


class ActRefused(LotgateError):
    """The act was not done: role, password, key or the use case refused it (nothing recorded but the refusal)."""


@dataclass(frozen=True)
class Manifestation:
    """What the page shows after a signature: who, when (UTC and plant time), what it means, what was signed."""

    printed_name: str
    account: str
    signed_at_utc: str
    signed_at_local: str
    meaning: str
    signed_what: str
    document: str | None = None


def meaning_of(act: DeskAct) -> str:
    return {DeskAct.APPROVE: PERSON_APPROVAL_MEANING, DeskAct.RELEASE: PERSON_RELEASE_MEANING,
            DeskAct.REJECT: PERSON_REJECT_MEANING, DeskAct.REBASELINE: REBASELINE_MEANING,
            DeskAct.INVALIDATE: INVESTIGATION_MEANING}.get(act, "")


@contextmanager
def _signing(desk: Desk, session: Session, act: DeskAct, password: str, what: str,
             reason: str) -> Iterator[SigningIdentity]:
    """Steps 1–3 inside one desk write; yields the unsealed identity for the use case."""
    if not may(session.role, act):
        raise ActRefused(f"your role ({session.role}) does not allow this act ({act})")
    if len(reason) > MAX_REASON:
        raise ActRefused(f"a reason is at most {MAX_REASON} characters, received {len(reason)}; nothing was signed")
    with desk_write(desk):
        user = accounts.user_by_id(desk.store, session.user_id)
        if user is None or user.key_file is None or user.key_sha256 is None or user.signer_certificate_sha256 is None:
            raise ActRefused("this account is not linked to a signing identity" + (
                " since its password was reset; the administrator imports it again with your PKCS#12 "
                "(lotgate users reset-password --signer-p12)" if user is not None and user.credentials_version
                else ""))
        standing = accounts.account_standing(desk.store, user.id)
        if standing.locked:
            raise ActRefused("this account is locked; ask the administrator to unlock it")
        if not password_matches(user.password_hash, password or ""):
            locked = record_failure(desk, user, accounts.SIGNING_PASSWORD_FAILED, "desk-signature-refused",
                                    act=str(act), signed_what=what, why="wrong password")
            raise ActRefused("the password is not right: nothing was signed"
                             + ("; the account is now locked" if locked else ""))
        yield unseal_identity(desk.ws.root, user.key_file, user.key_sha256, user.signer_certificate_sha256,
                              password)


def _record_signature(desk: Desk, session: Session, act: DeskAct, what: str, identity: SigningIdentity,
                      signed_at: dt.datetime, **fields: object) -> Manifestation:
    meaning = meaning_of(act)
    accounts.record_account_event(desk.store, session.user_id, accounts.SIGNED, f"{act}: {what}", [audit.event(
        "desk-signature", time_zone=desk.ws.time_zone, account=session.login, printed_name=identity.signer_name,
        act=str(act), meaning=meaning, signed_what=what, signed_at_utc=signed_at.isoformat(),
        signer_certificate_sha256=identity.fingerprint_sha256, **fields)])
    return Manifestation(identity.signer_name, session.login, signed_at.isoformat(),
                         local_time_text(signed_at, desk.ws.time_zone), meaning, what, fields.get("document"))  # type: ignore[arg-type]


def decide(desk: Desk, session: Session, lot_id: str, *, release: bool, reason: str, password: str) -> Manifestation:
    """Release or reject a lot, signed: ``lotgate decide`` through the desk."""
    act = DeskAct.RELEASE if release else DeskAct.REJECT
    what = f"lot {lot_id}: {'release' if release else 'rejection'}"
    with _signing(desk, session, act, password, what, reason or "") as identity:
        outcome = decide_lot(desk.ws, desk.store, lot_id, release=release, reason=reason, identity=identity)
        stored = desk.store.latest_decision(lot_id)
        assert stored is not None and stored.revision == outcome.revision
        signed_at = dt.datetime.fromisoformat(stored.record.decided_at_utc)
        return _record_signature(desk, session, act, f"{what} (revision {outcome.revision})", identity, signed_at,
                                 lot_id=lot_id, revision=outcome.revision, reason=reason,
                                 document=outcome.certificate or outcome.report)


def approve(desk: Desk, session: Session, lot_id: str, *, reason: str, password: str) -> Manifestation:
    """Approve a lot ready for release, signed: ``lotgate approve`` through the desk (the person's
    signature is added to the certificate the system prepared, in an incremental update)."""
    from pipeline.night.approval import approve_lots

    what = f"lot {lot_id}: release approved"
    with _signing(desk, session, DeskAct.APPROVE, password, what, reason or "") as identity:
        (done,) = approve_lots(desk.ws, desk.store, [lot_id], identity=identity, reason=reason)
        signed_at = dt.datetime.fromisoformat(done.signed_at_utc)
        return _record_signature(desk, session, DeskAct.APPROVE, f"{what} (revision {done.revision})", identity,
                                 signed_at, lot_id=lot_id, revision=done.revision, reason=reason,
                                 document=done.certificate)


INVESTIGATION_MEANING = ("Outcome of an out-of-specification investigation, recorded by an authorised person: I "
                         "have reviewed the investigation under the plant's procedure and its outcome is as stated; "
                         "an invalidated result no longer counts, a confirmed one stands")


def investigate(desk: Desk, session: Session, lot_id: str, *, test: str, outcome: str, reference: str, reason: str,
                retest_plan: str, password: str) -> Manifestation:
    """Record an OOS investigation's signed outcome: ``lotgate investigate`` through the desk."""
    from pipeline.night.investigation import record_investigation

    what = f"lot {lot_id}: investigation {reference} of {test}, outcome '{outcome}'"
    with _signing(desk, session, DeskAct.INVALIDATE, password, what, reason or "") as identity:
        done = record_investigation(desk.ws, desk.store, lot_id, test=test, outcome=outcome, reference=reference,
                                    reason=reason, retest_plan=retest_plan or None, identity=identity)
        return _record_signature(desk, session, DeskAct.INVALIDATE, f"{what} ({done.outcome})", identity,
                                 dt.datetime.now(dt.UTC).replace(microsecond=0), lot_id=lot_id, test=test,
                                 outcome=str(done.outcome), reference=reference, reason=reason)


def rebaseline_chart(desk: Desk, session: Session, product: str, attribute: Attribute, *, reason: str,
                     password: str, from_lot: str | None = None, count: int | None = None) -> Manifestation:
    """New control limits, signed by the chart owner: ``lotgate rebaseline`` through the desk."""
    what = f"control limits of {product} {attribute.code}"
    with _signing(desk, session, DeskAct.REBASELINE, password, what, reason or "") as identity:
        pass  # password and key checked; the use case takes the run lock itself
    done = rebaseline(desk.ws, desk.store, product, attribute, identity=identity, reason=reason,
                      from_lot=from_lot, count=count)
    signed_at = dt.datetime.fromisoformat(done.after.frozen_at_utc)
    with desk_write(desk):
        return _record_signature(desk, session, DeskAct.REBASELINE, f"{what}, version {done.after.version}",
                                 identity, signed_at, product=product, attribute=attribute.code,
                                 version=done.after.version, baseline_lots=list(done.baseline_lots), reason=reason)
