"""Does a certificate of analysis mean what it says? Every check in words, pyHanko deciding the PDF ones.

``check_certificate`` answers, for one PDF and the workspace that issued it:

1. each embedded signature: intact, chained to the workspace's CONFIGURED trust anchor (never a
   certificate found beside the file), with digitalSignature + nonRepudiation key usage, and
   valid at its signing time — pyHanko's validator with that anchor as its only trust root;
2. each signer: the installation's system identity (first signature only), or a person who held
   'release approval' in the register of authorised signers at that signing time;
3. nothing appended after the last signature, and between signatures only the addition of
   further signatures (pyHanko's modification analysis: coverage and ``diff_result``);
4. the document matches its record in the store: a certificate with this SHA-256 was recorded,
   for the lot and revision the file name says, and that revision is the lot's CURRENT one and
   released (superseded, rejected, held or still awaiting approval: reported, and a failure).

The verdict holds only when every check holds. Nothing is written.
"""

from __future__ import annotations

import datetime as dt
import hashlib
import re
from dataclasses import dataclass
from io import BytesIO
from pathlib import Path

from pyhanko.pdf_utils.reader import PdfFileReader
from pyhanko.sign.diff_analysis import ModificationLevel
from pyhanko.sign.validation import validate_pdf_signature
from pyhanko.sign.validation.settings import KeyUsageConstraints
from pyhanko.sign.validation.status import PdfSignatureStatus, SignatureCoverageLevel
from pyhanko_certvalidator import ValidationContext

from pipeline.controlled.signer_register import SignerRegister, authorisation
from pipeline.errors import LotgateError
from pipeline.records.signer_check import facts, is_system_certificate, load_anchor
from pipeline.records.signer_register import read_register
from pipeline.records.signing import common_name
from pipeline.records.store import Store
from pipeline.records.stored import StoredDecision
from pipeline.records.workspace import Workspace
from pipeline.vocabulary import Disposition, SignerRole

KEY_USAGE = KeyUsageConstraints(key_usage={"digital_signature", "non_repudiation"}, match_all_key_usages=True)
_NAME = re.compile(r"(?P<lot>.+)_r(?P<revision>[0-9]+)_certificate\.pdf")


@dataclass(frozen=True)
class Check:
    """One thing verified, whether it holds, and what was found, in words."""

    what: str
    holds: bool
    found: str


@dataclass(frozen=True)
class CertificateVerdict:
    path: str
    checks: tuple[Check, ...]

    @property
    def holds(self) -> bool:
        return bool(self.checks) and all(c.holds for c in self.checks)

    def failed(self) -> tuple[Check, ...]:
        return tuple(c for c in self.checks if not c.holds)


def _trust_words(status: PdfSignatureStatus) -> str:
    if status.trusted:
        return "chains to the plant's configured trust anchor; key usage allows signing; valid at its signing time"
    problem = status.trust_problem_indic
    words = {"NO_CERTIFICATE_CHAIN_FOUND": "does not chain to the plant's configured trust anchor",
             "EXPIRED": "the signer's certificate had expired at the signing time",
             "OUT_OF_BOUNDS_NO_POE": "the signer's certificate was outside its validity period at the signing time "
                                     "(expired or not yet valid)",
             "NOT_YET_VALID": "the signer's certificate was not yet valid at the signing time",
             "CHAIN_CONSTRAINTS_FAILURE": "the certificate path breaks a constraint (key usage or CA limits)",
             "REVOKED_NO_POE": "the signer's certificate is revoked",
             "SIG_CONSTRAINTS_FAILURE": "the signer's key usage does not allow signing (digitalSignature and "
                                        "nonRepudiation required)"}
    name = getattr(problem, "name", str(problem))
    return words.get(name, f"not trusted ({name})")


def _signer_words(status: PdfSignatureStatus, index: int, register: SignerRegister | None,
                  register_problem: str | None, at: dt.datetime | None) -> Check:
    cert = status.signing_cert
    name = common_name(cert) if cert is not None else "unknown"
    what = f"signature {index + 1}: who signed, and for what"
    if cert is None:
        return Check(what, False, "no signer certificate in the signature")
    if is_system_certificate(cert):
        if index == 0:
            return Check(what, True, f"the installation's system identity ({name}): attests what the system did, "
                                     "never a person's approval")
        return Check(what, False, f"the system identity ({name}) signed after another signature: the system never "
                                  "signs for a person")
    if register is None:
        return Check(what, False, f"{name} is a person, and the register of authorised signers cannot be read "
                                  f"({register_problem})")
    if at is None:
        return Check(what, False, f"{name}: the signature carries no signing time to check the register at")
    answer = authorisation(register, facts(cert), SignerRole.RELEASE_APPROVAL, at)
    return Check(what, answer.allowed, answer.reason)


def _modification_words(status: PdfSignatureStatus, index: int, last: bool) -> Check:
    what = f"signature {index + 1}: what was added after it"
    if last:
        whole = status.coverage == SignatureCoverageLevel.ENTIRE_FILE
        return Check(what, whole, "nothing: it covers the whole file" if whole else
                     "bytes were appended after the last signature (an unsigned change to the document)")
    level = status.modification_level
    if status.coverage != SignatureCoverageLevel.ENTIRE_REVISION or level is None:
        return Check(what, False, "its coverage of the document cannot be established")
    if level <= ModificationLevel.FORM_FILLING and status.docmdp_ok:
        return Check(what, True, "only further signatures were added after it")
    return Check(what, False, f"the document was changed after it beyond adding signatures "
                              f"({level.name.lower().replace('_', ' ')}): the content a later signer signed is not the "
                              "content this signer signed")


def _signature_checks(data: bytes, ws: Workspace) -> list[Check]:
    try:
        embedded = list(PdfFileReader(BytesIO(data), strict=False).embedded_signatures)
    except Exception as exc:
        return [Check("the file is a readable PDF", False, f"not a readable PDF ({exc.__class__.__name__})")]
    if not embedded:
        return [Check("the file is signed", False, "no digital signature in the PDF")]
    anchor = load_anchor(ws.trust_root)
    register: SignerRegister | None = None
    register_problem = None
    try:
        register = read_register(ws.signer_register, ws.root)
    except LotgateError as exc:
        register_problem = str(exc)
    checks = []
    for index, sig in enumerate(embedded):
        claimed = sig.self_reported_timestamp
        context = ValidationContext(trust_roots=[anchor], allow_fetching=False, revocation_mode="soft-fail",
                                    moment=claimed, best_signature_time=claimed)
        what = f"signature {index + 1} ({sig.field_name})"
        try:
            status = validate_pdf_signature(sig, context, key_usage_settings=KEY_USAGE)
        except Exception as exc:  # a malformed signature dictionary or CMS blob
            checks.append(Check(what, False, f"cannot be checked ({exc.__class__.__name__}: {exc})"))
            continue
        at = f" at {claimed:%Y-%m-%d %H:%M:%S %Z}" if claimed else ""
        intact = status.intact and status.valid
        checks.append(Check(f"{what}: signature value", intact, "intact: the signed bytes are unchanged" if intact else
                            "BROKEN: the signed bytes or the signature value do not match"))
        checks.append(Check(f"{what}: certificate{at}", status.trusted, _trust_words(status)))
        checks.append(_signer_words(status, index, register, register_problem, claimed))
        checks.append(_modification_words(status, index, index == len(embedded) - 1))
    return checks


def _find_record(store: Store, lot: str | None, sha256: str) -> StoredDecision | None:
    candidates = store.decisions(lot) if lot else []
    for decision in candidates:
        if decision.record.certificate is not None and decision.record.certificate.sha256 == sha256:
            return decision
    for decision in store.decisions():  # a certificate renamed to another lot's name: still found, then refused
        if decision.record.certificate is not None and decision.record.certificate.sha256 == sha256:
            return decision
    return None


def _record_checks(path: Path, sha256: str, store: Store) -> list[Check]:
    named = _NAME.fullmatch(path.name)
    lot, revision = (named.group("lot"), int(named.group("revision"))) if named else (None, None)
    found = _find_record(store, lot, sha256)
    what = "the document matches its record"
    if found is None:
        return [Check(what, False, f"no certificate with SHA-256 {sha256[:16]}… was ever recorded in this "
                                   "workspace's store: not a document this installation issued as it stands")]
    if (found.lot_id, found.revision) != (lot, revision):
        said = f"lot {lot} revision {revision}" if named else f"the name {path.name}"
        return [Check(what, False, f"the file is named as {said}, but its content is the certificate of lot "
                                   f"{found.lot_id} revision {found.revision} (renamed)")]
    checks = [Check(what, True, f"lot {found.lot_id} revision {found.revision}, SHA-256 {sha256[:16]}… as recorded")]
    latest = store.latest_decision(found.lot_id)
    now = "the lot's current status"
    if latest is not None and latest.id != found.id:
        checks.append(Check(now, False, f"SUPERSEDED: revision {found.revision} was replaced by revision "
                                        f"{latest.revision} ({latest.record.label}, decided by {latest.decided_by})"))
    elif found.disposition == Disposition.READY_FOR_RELEASE:
        checks.append(Check(now, False, "READY FOR RELEASE, NOT RELEASED: prepared by the system and awaiting "
                                        "an authorised person's approval"))
    elif found.disposition != Disposition.RELEASED:
        checks.append(Check(now, False, f"{found.record.label.upper()}: the lot is not released"))
    else:
        checks.append(Check(now, True, f"released ({found.record.label}); this is its current revision"))
    return checks


def check_certificate(path: Path, ws: Workspace, store: Store) -> CertificateVerdict:
    """Every check of one certificate against the workspace ``ws`` and its store."""
    data = Path(path).read_bytes()
    checks = _signature_checks(data, ws)
    checks += _record_checks(Path(path), hashlib.sha256(data).hexdigest(), store)
    return CertificateVerdict(str(path), tuple(checks))
