"""DEMO signing identities: a plant root CA, the system identity and people, for trying lotgate only.

``create_demo_identity`` writes ``signer.p12`` and ``signer.passphrase`` (both mode 0600) and the
public ``root-ca.pem`` of a new root CA: a person's identity, or with ``system=True`` the
installation's system identity (its subject says so in an organizationalUnit). ``create_demo_trust``
(in ``pipeline.records.demo_trust``) builds a whole demo workspace's set from one CA. Everything
made here is labelled DEMO; a real plant brings its own PKCS#12 files from its own CA.
"""

from __future__ import annotations

import os
import secrets
from dataclasses import dataclass
from datetime import UTC, datetime, timedelta
from pathlib import Path
from typing import Any

from cryptography import x509
from cryptography.hazmat.primitives import hashes, serialization
from cryptography.hazmat.primitives.asymmetric import ec
from cryptography.hazmat.primitives.serialization import pkcs12
from cryptography.x509.oid import NameOID

from pipeline.errors import SigningError
from pipeline.records.signing import P12_NAME, PASSPHRASE_NAME, ROOT_CA_NAME, load_identity

# --------------------------------------------------------------------------- demo identity


@dataclass(frozen=True)
class DemoIdentity:
    """Where a demo signing identity lives on disk, and whose it is."""

    p12_path: Path
    passphrase_path: Path
    root_ca_path: Path
    signer_name: str

    def to_dict(self) -> dict[str, Any]:
        return {
            "p12_path": str(self.p12_path),
            "passphrase_path": str(self.passphrase_path),
            "root_ca_path": str(self.root_ca_path),
            "signer_name": self.signer_name,
        }


NAME_LIMIT = 64  # RFC 5280 upper bounds: ub-common-name and ub-organization-name are 64 characters


def fitted(text: str, limit: int = NAME_LIMIT) -> str:
    """``text`` cut to ``limit`` (counted in UTF-8 bytes, as certificates count them) where a long plant
    name makes it longer, keeping its end (the "(DEMO)" mark, the "Root CA" words) and marking the cut
    with an ellipsis."""
    if len(text.encode("utf-8")) <= limit:
        return text
    tail = next((t for t in (" (DEMO)", " DEMO Root CA") if text.endswith(t)), "")
    head = text[: len(text) - len(tail)]
    while head and len((head.rstrip() + "\u2026" + tail).encode("utf-8")) > limit:
        head = head[:-1]
    return head.rstrip() + "\u2026" + tail


def _name(common_name: str, organisation: str, unit: str | None = None) -> x509.Name:
    attributes = [x509.NameAttribute(NameOID.COMMON_NAME, fitted(common_name)),
                  x509.NameAttribute(NameOID.ORGANIZATION_NAME, fitted(organisation))]
    if unit is not None:
        attributes.append(x509.NameAttribute(NameOID.ORGANIZATIONAL_UNIT_NAME, unit))
    return x509.Name(attributes)


def system_common_name(plant_name: str) -> str:
    """The system identity's printed name: the lotgate installation of the plant, never a person."""
    return f"lotgate system \u2014 {plant_name}" + ("" if "demo" in plant_name.lower() else " (DEMO)")


def _key_usage(*, signer: bool) -> x509.KeyUsage:
    return x509.KeyUsage(
        digital_signature=signer,
        content_commitment=signer,  # nonRepudiation
        key_encipherment=False,
        data_encipherment=False,
        key_agreement=False,
        key_cert_sign=not signer,
        crl_sign=not signer,
        encipher_only=False,
        decipher_only=False,
    )


def _write_private(path: Path, data: bytes, mode: int) -> None:
    """Create ``path`` (it must not exist) with ``mode`` whatever the umask, and write ``data``."""
    fd = os.open(path, os.O_WRONLY | os.O_CREAT | os.O_EXCL, mode)
    try:
        os.fchmod(fd, mode)
        os.write(fd, data)
    finally:
        os.close(fd)


def create_demo_identity(
    directory: Path,
    plant_name: str,
    signer_name: str,
    *,
    valid_days: int = 3650,
    now: datetime | None = None,
    system: bool = False,
) -> DemoIdentity:
    """Write a demo plant root CA and a QA signer certificate issued by it into ``directory``.

    Root CA: CN "<plant_name> DEMO Root CA", CA:true (path length 0), keyCertSign + cRLSign.
    Signer: CN "<signer_name> (DEMO)", ECDSA P-256, digitalSignature + nonRepudiation, with
    subject and authority key identifiers. Both are valid from ``now`` for ``valid_days`` days.
    With ``system``, the signer is the installation's system identity: CN "lotgate system — <plant>
    (DEMO)" and organizationalUnit SYSTEM_UNIT (``signer_name`` is then not used).

    If the three files already exist they are left untouched and their paths returned (the
    signer name is then read from the existing certificate). A partial set is refused rather
    than overwritten, so that no key is ever replaced by accident.
    """
    if not plant_name.strip() or not signer_name.strip():
        raise SigningError(
            f"a demo identity needs a plant name and a signer name; received plant "
            f"{plant_name!r} and signer {signer_name!r}"
        )
    if valid_days < 1:
        raise SigningError(f"valid_days must be at least 1; received {valid_days}")
    directory = Path(directory)
    p12_path = directory / P12_NAME
    pass_path = directory / PASSPHRASE_NAME
    ca_path = directory / ROOT_CA_NAME
    present = [p for p in (p12_path, pass_path, ca_path) if p.exists()]
    if len(present) == 3:
        existing = load_identity(
            p12_path, passphrase_env="", passphrase_file=pass_path, check_validity=False
        )
        return DemoIdentity(p12_path, pass_path, ca_path, existing.signer_name)
    if present:
        raise SigningError(
            f"{directory} holds only part of a signing identity "
            f"({', '.join(p.name for p in present)}); expected all of {P12_NAME}, "
            f"{PASSPHRASE_NAME} and {ROOT_CA_NAME} or none of them. Move the files away "
            f"rather than have a key overwritten."
        )

    start = (now or datetime.now(UTC)).replace(microsecond=0)
    ca = new_demo_ca(plant_name, start, start + timedelta(days=valid_days))
    printed = system_common_name(plant_name) if system else f"{signer_name} (DEMO)"
    directory.mkdir(parents=True, exist_ok=True)
    _write_private(ca_path, ca.cert.public_bytes(serialization.Encoding.PEM), 0o644)
    issue_demo_signer(ca, directory, printed, start, start + timedelta(days=valid_days), system=system)
    return DemoIdentity(p12_path, pass_path, ca_path, printed)


@dataclass(frozen=True)
class DemoCa:
    """A demo root CA held in memory: its key, certificate and organisation."""

    key: ec.EllipticCurvePrivateKey
    cert: x509.Certificate
    organisation: str


def new_demo_ca(plant_name: str, start: datetime, end: datetime) -> DemoCa:
    """A new demo root CA: CN "<plant> DEMO Root CA", CA:true (path length 0), keyCertSign + cRLSign."""
    ca_key = ec.generate_private_key(ec.SECP256R1())
    org = f"{plant_name} (DEMO)"
    ca_name = _name(f"{plant_name} DEMO Root CA", org)
    ca_cert = (
        x509.CertificateBuilder()
        .subject_name(ca_name)
        .issuer_name(ca_name)
        .public_key(ca_key.public_key())
        .serial_number(x509.random_serial_number())
        .not_valid_before(start)
        .not_valid_after(end)
        .add_extension(x509.BasicConstraints(ca=True, path_length=0), critical=True)
        .add_extension(_key_usage(signer=False), critical=True)
        .add_extension(x509.SubjectKeyIdentifier.from_public_key(ca_key.public_key()), critical=False)
        .sign(ca_key, hashes.SHA256())
    )
    return DemoCa(ca_key, ca_cert, org)


def issue_demo_signer(ca: DemoCa, directory: Path, printed_name: str, start: datetime, end: datetime, *,
                      system: bool = False) -> tuple[Path, Path, x509.Certificate]:
    """Issue a signer certificate from ``ca`` into DIR/signer.p12 + DIR/signer.passphrase (mode 0600).

    ECDSA P-256, digitalSignature + nonRepudiation, subject and authority key identifiers; the
    system identity also carries the organizationalUnit that says it is the system.
    """
    from pipeline.records.signer_check import SYSTEM_UNIT

    signer_key = ec.generate_private_key(ec.SECP256R1())
    ca_ski = x509.SubjectKeyIdentifier.from_public_key(ca.key.public_key())
    signer_cert = (
        x509.CertificateBuilder()
        .subject_name(_name(printed_name, ca.organisation, SYSTEM_UNIT if system else None))
        .issuer_name(ca.cert.subject)
        .public_key(signer_key.public_key())
        .serial_number(x509.random_serial_number())
        .not_valid_before(start)
        .not_valid_after(end)
        .add_extension(x509.BasicConstraints(ca=False, path_length=None), critical=True)
        .add_extension(_key_usage(signer=True), critical=True)
        .add_extension(x509.SubjectKeyIdentifier.from_public_key(signer_key.public_key()), critical=False)
        .add_extension(x509.AuthorityKeyIdentifier.from_issuer_subject_key_identifier(ca_ski), critical=False)
        .sign(ca.key, hashes.SHA256())
    )
    passphrase = secrets.token_urlsafe(32).encode("ascii")
    p12 = pkcs12.serialize_key_and_certificates(
        name=printed_name.encode(), key=signer_key, cert=signer_cert, cas=[ca.cert],
        encryption_algorithm=serialization.BestAvailableEncryption(passphrase),
    )
    directory.mkdir(parents=True, exist_ok=True)
    _write_private(directory / PASSPHRASE_NAME, passphrase, 0o600)
    _write_private(directory / P12_NAME, p12, 0o600)
    return directory / P12_NAME, directory / PASSPHRASE_NAME, signer_cert
