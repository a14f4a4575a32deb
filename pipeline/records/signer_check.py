"""May this identity sign this act now? Chain, key usage, validity, system or person, register (adapter).

Every human act (a person's decision, an approval, a re-baseline) calls ``authorise_person``
before anything is written. It refuses, with one line, an identity that:

* does not chain to the workspace's configured trust anchor (never one found beside a file),
  or lacks digitalSignature + nonRepudiation key usage, or is outside its validity (pyHanko's
  certificate validator decides all three, at the moment of signing);
* is the installation's system identity, or is named like the nightly job;
* is not in the register of authorised signers, lacks the role of this act, or is outside the
  register entry's dates.

``system_identity_problem`` checks the other way round: the system identity must say it is the
system and never be a person's.
"""

from __future__ import annotations

import asyncio
import datetime as dt
from dataclasses import dataclass
from pathlib import Path

from asn1crypto import x509 as asn1_x509
from cryptography import x509
from cryptography.hazmat.primitives import serialization
from pyhanko_certvalidator import CertificateValidator, ValidationContext

from pipeline.controlled.signer_register import (
    Authorisation,
    CertificateFacts,
    SignerRegister,
    authorisation,
)
from pipeline.errors import SigningError
from pipeline.records.signing import SigningIdentity
from pipeline.vocabulary import SignerRole

SYSTEM_UNIT = "lotgate system identity (not a person)"  # the organizationalUnit marking the system certificate
PERSON_KEY_USAGE = frozenset({"digital_signature", "non_repudiation"})


@dataclass(frozen=True)
class PersonCheck:
    """A person allowed to sign one act: their register entry and the register's version."""

    person: str
    printed_name: str
    certificate_sha256: str
    role: SignerRole
    register_version: str
    register_sha256: str
    summary: str


def load_anchor(path: Path | None) -> asn1_x509.Certificate:
    """The plant's configured root CA (PEM); SigningError when none is configured or it cannot be read."""
    if path is None:
        raise SigningError("no trust anchor is configured: set 'trust: {root_ca: FILE}' in workspace.yaml "
                           "(the plant's own root CA; a certificate found beside a document is never trusted)")
    try:
        cert = x509.load_pem_x509_certificate(Path(path).read_bytes())
    except (OSError, ValueError) as exc:
        raise SigningError(f"the trust anchor {path} cannot be read as a PEM certificate ({exc})") from exc
    return asn1_x509.Certificate.load(cert.public_bytes(serialization.Encoding.DER))


def facts(cert: asn1_x509.Certificate) -> CertificateFacts:
    as_crypto = x509.load_der_x509_certificate(cert.dump())
    return CertificateFacts(cert.sha256.hex(), as_crypto.subject.rfc4514_string(), as_crypto.issuer.rfc4514_string())


def organisational_units(cert: asn1_x509.Certificate) -> list[str]:
    units = cert.subject.native.get("organizational_unit_name") or []
    return [str(u) for u in (units if isinstance(units, list) else [units])]


def is_system_certificate(cert: asn1_x509.Certificate) -> bool:
    return SYSTEM_UNIT in organisational_units(cert)


def chain_problem(cert: asn1_x509.Certificate, anchor: asn1_x509.Certificate, at: dt.datetime,
                  intermediates: list[asn1_x509.Certificate] | None = None,
                  key_usage: frozenset[str] = PERSON_KEY_USAGE) -> str | None:
    """None when ``cert`` chains to ``anchor``, is valid at ``at`` and allows ``key_usage``; else why not."""
    context = ValidationContext(trust_roots=[anchor], moment=at, allow_fetching=False,
                                revocation_mode="soft-fail", best_signature_time=at)
    validator = CertificateValidator(cert, intermediate_certs=intermediates or [], validation_context=context)
    try:
        asyncio.run(validator.async_validate_usage(set(key_usage)))
    except Exception as exc:  # PathBuildingError, PathValidationError, InvalidCertificateError …
        text = " ".join(str(exc).split()) or exc.__class__.__name__
        return f"{exc.__class__.__name__}: {text}"
    return None


def authorise_person(identity: SigningIdentity, role: SignerRole, *, anchor_path: Path | None,
                     register: SignerRegister, at: dt.datetime | None = None) -> PersonCheck:
    """The person behind ``identity`` may sign an act of ``role`` at ``at``; SigningError in one line otherwise."""
    at = at or dt.datetime.now(dt.UTC)
    cert = identity.signer.signing_cert
    name = identity.signer_name
    if is_system_certificate(cert) or name.lower().startswith("lotgate"):
        raise SigningError(f"refused: {name} is the lotgate system's identity, not a person's; a person signs "
                           "with their own PKCS#12 from the plant's CA")
    anchor = load_anchor(anchor_path)
    others = list(identity.signer.cert_registry) if identity.signer.cert_registry else []
    problem = chain_problem(cert, anchor, at, [c for c in others if c.sha256 != cert.sha256])
    if problem is not None:
        raise SigningError(f"refused: the certificate of {name} does not hold for signing at {at:%Y-%m-%d %H:%M} UTC "
                           f"against the plant's trust anchor (chain, key usage, validity): {problem}")
    answer: Authorisation = authorisation(register, facts(cert), role, at)
    if not answer.allowed or answer.entry is None:
        raise SigningError(f"refused: {answer.reason}")
    entry = answer.entry
    return PersonCheck(entry.person, entry.printed_name, cert.sha256.hex(), role, register.version, register.sha256,
                       answer.reason)


def system_identity_problem(identity: SigningIdentity, anchor_path: Path | None,
                            at: dt.datetime | None = None) -> str | None:
    """Why ``identity`` cannot serve as the installation's system identity (None: it can)."""
    cert = identity.signer.signing_cert
    if not is_system_certificate(cert):
        return (f"the signing identity {identity.signer_name} does not say it is the lotgate system (its subject has "
                f"no organizationalUnit '{SYSTEM_UNIT}'); a person's certificate never signs for the system")
    if anchor_path is None:
        return None
    others = list(identity.signer.cert_registry) if identity.signer.cert_registry else []
    return chain_problem(cert, load_anchor(anchor_path), at or dt.datetime.now(dt.UTC),
                         [c for c in others if c.sha256 != cert.sha256], frozenset({"digital_signature"}))
