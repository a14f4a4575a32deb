"""The register of authorised signers: who may sign what, with which certificate, when (pure).

A controlled YAML file (version, approver, one entry per person) checked against its declared
schema; ``parse_register`` builds a frozen ``SignerRegister``, and ``authorisation`` answers,
for one certificate, one meaning and one moment, whether the register allows the signature,
with the reason in words when it does not. Loading the file and recording its version in the
audit trail is done by ``pipeline.records.signer_register``.
"""

from __future__ import annotations

import datetime as dt
import re
from dataclasses import dataclass
from typing import Any

from pydantic import Field, model_validator

from pipeline.controlled.strict import IsoDate, Strict, Text, checked
from pipeline.errors import SpecificationError
from pipeline.vocabulary import SignerRole

_SHA256 = re.compile(r"[0-9a-f]{64}")
ROLE_WORDS = ", ".join(f"'{r.value}'" for r in SignerRole)


class SignerEntryFile(Strict):
    person: Text = Field(description="a short identifier of the person, e.g. mira.castellan")
    printed_name: Text
    certificate_sha256: Text | None = Field(None, description="the SHA-256 of the person's certificate (64 hex digits)")
    subject: Text | None = Field(None, description="the certificate's subject, RFC 4514 (with issuer)")
    issuer: Text | None = Field(None, description="the certificate's issuer, RFC 4514 (with subject)")
    roles: list[Text] = Field(min_length=1, description=f"a list of roles among {ROLE_WORDS}")
    valid_from: IsoDate
    valid_to: IsoDate

    @model_validator(mode="after")
    def _identified_once(self) -> SignerEntryFile:
        by_name = self.subject is not None or self.issuer is not None
        if self.certificate_sha256 is None and not (self.subject and self.issuer):
            raise ValueError("needs certificate_sha256, or both subject and issuer")
        if self.certificate_sha256 is not None and by_name:
            raise ValueError("gives certificate_sha256 and subject/issuer: give one way of naming the certificate")
        if self.certificate_sha256 is not None and not _SHA256.fullmatch(self.certificate_sha256.lower()):
            raise ValueError(f"certificate_sha256 must be 64 hexadecimal digits, found {self.certificate_sha256!r}")
        unknown = [r for r in self.roles if r not in {role.value for role in SignerRole}]
        if unknown:
            raise ValueError(f"names unknown roles {unknown}; allowed: {ROLE_WORDS}")
        if self.valid_to < self.valid_from:
            raise ValueError(f"valid_to {self.valid_to} is before valid_from {self.valid_from}")
        return self


class SignerRegisterFile(Strict):
    kind: Text = Field(description="'signer-register'")
    version: Text = Field(description="a version written as text, e.g. \"4\" (quoted)")
    approved_by: Text
    signers: list[SignerEntryFile] = Field(min_length=1)


@dataclass(frozen=True)
class SignerEntry:
    person: str
    printed_name: str
    certificate_sha256: str | None
    subject: str | None
    issuer: str | None
    roles: frozenset[SignerRole]
    valid_from: dt.date
    valid_to: dt.date


@dataclass(frozen=True)
class SignerRegister:
    """The register in force: its version, approver, file SHA-256 and entries."""

    version: str
    approved_by: str
    sha256: str
    source: str
    entries: tuple[SignerEntry, ...]


def parse_register(raw: Any, where: str, sha256: str) -> SignerRegister:
    """The register from a parsed YAML mapping; SpecificationError naming ``where`` and the field otherwise."""
    model = checked(SignerRegisterFile, raw, where)
    if model.kind != "signer-register":
        raise SpecificationError(f"{where}: 'kind' must be 'signer-register', found {model.kind!r}")
    entries = tuple(SignerEntry(e.person, e.printed_name, e.certificate_sha256.lower() if e.certificate_sha256 else None,
                                e.subject, e.issuer, frozenset(SignerRole(r) for r in e.roles), e.valid_from,
                                e.valid_to) for e in model.signers)
    people = [e.person for e in entries]
    repeated = sorted({p for p in people if people.count(p) > 1})
    if repeated:
        raise SpecificationError(f"{where}: 'signers' lists the person {repeated[0]!r} more than once")
    return SignerRegister(model.version, model.approved_by, sha256, where, entries)


@dataclass(frozen=True)
class CertificateFacts:
    """What the register needs to know of a signer's certificate."""

    sha256: str
    subject: str  # RFC 4514
    issuer: str  # RFC 4514


@dataclass(frozen=True)
class Authorisation:
    """The register's answer: allowed (with the entry) or refused (with the reason in words)."""

    allowed: bool
    reason: str
    entry: SignerEntry | None = None
    register_version: str | None = None
    register_sha256: str | None = None


def entry_of(register: SignerRegister, cert: CertificateFacts) -> SignerEntry | None:
    """The register's entry naming this certificate (by fingerprint, or by subject and issuer)."""
    for entry in register.entries:
        if entry.certificate_sha256 is not None and entry.certificate_sha256 == cert.sha256.lower():
            return entry
        if entry.certificate_sha256 is None and (entry.subject, entry.issuer) == (cert.subject, cert.issuer):
            return entry
    return None


def authorisation(register: SignerRegister, cert: CertificateFacts, role: SignerRole,
                  at: dt.datetime) -> Authorisation:
    """May the holder of ``cert`` sign with the meaning of ``role`` at ``at`` (UTC), by the register?"""
    where = f"register of authorised signers version {register.version}"
    entry = entry_of(register, cert)
    if entry is None:
        return Authorisation(False, f"the certificate {cert.sha256[:16]}… ({cert.subject}) is not in the {where}")
    if role not in entry.roles:
        held = ", ".join(sorted(r.value for r in entry.roles))
        return Authorisation(False, f"{entry.printed_name} does not hold the role '{role.value}' in the {where} "
                                    f"(holds: {held})", entry)
    day = at.astimezone(dt.UTC).date()
    if not entry.valid_from <= day <= entry.valid_to:
        return Authorisation(False, f"{entry.printed_name} is authorised in the {where} only from {entry.valid_from} "
                                    f"to {entry.valid_to}, not on {day}", entry)
    return Authorisation(True, f"{entry.printed_name} holds '{role.value}' in the {where} ({entry.valid_from} to "
                               f"{entry.valid_to})", entry, register.version, register.sha256)
