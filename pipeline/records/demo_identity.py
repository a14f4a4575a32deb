"""A DEMO signing identity: a plant root CA and a QA signer issued by it, for trying lotgate only.

``create_demo_identity`` writes ``signer.p12`` and ``signer.passphrase`` (both mode 0600) and the
public ``root-ca.pem``. Everything it makes is labelled DEMO; a real plant brings its own PKCS#12
from its own CA.
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


def _name(common_name: str, organisation: str) -> x509.Name:
    return x509.Name(
        [
            x509.NameAttribute(NameOID.COMMON_NAME, common_name),
            x509.NameAttribute(NameOID.ORGANIZATION_NAME, organisation),
        ]
    )


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
) -> DemoIdentity:
    """Write a demo plant root CA and a QA signer certificate issued by it into ``directory``.

    Root CA: CN "<plant_name> DEMO Root CA", CA:true (path length 0), keyCertSign + cRLSign.
    Signer: CN "<signer_name> (DEMO)", ECDSA P-256, digitalSignature + nonRepudiation, with
    subject and authority key identifiers. Both are valid from ``now`` for ``valid_days`` days.

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
    end = start + timedelta(days=valid_days)
    ca_key = ec.generate_private_key(ec.SECP256R1())
    signer_key = ec.generate_private_key(ec.SECP256R1())
    org = f"{plant_name} (DEMO)"
    ca_name = _name(f"{plant_name} DEMO Root CA", org)
    ca_ski = x509.SubjectKeyIdentifier.from_public_key(ca_key.public_key())
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
        .add_extension(ca_ski, critical=False)
        .sign(ca_key, hashes.SHA256())
    )
    signer_cert = (
        x509.CertificateBuilder()
        .subject_name(_name(f"{signer_name} (DEMO)", org))
        .issuer_name(ca_name)
        .public_key(signer_key.public_key())
        .serial_number(x509.random_serial_number())
        .not_valid_before(start)
        .not_valid_after(end)
        .add_extension(x509.BasicConstraints(ca=False, path_length=None), critical=True)
        .add_extension(_key_usage(signer=True), critical=True)
        .add_extension(
            x509.SubjectKeyIdentifier.from_public_key(signer_key.public_key()), critical=False
        )
        .add_extension(
            x509.AuthorityKeyIdentifier.from_issuer_subject_key_identifier(ca_ski), critical=False
        )
        .sign(ca_key, hashes.SHA256())
    )
    passphrase = secrets.token_urlsafe(32).encode("ascii")
    p12 = pkcs12.serialize_key_and_certificates(
        name=f"{signer_name} (DEMO)".encode(),
        key=signer_key,
        cert=signer_cert,
        cas=[ca_cert],
        encryption_algorithm=serialization.BestAvailableEncryption(passphrase),
    )
    directory.mkdir(parents=True, exist_ok=True)
    _write_private(pass_path, passphrase, 0o600)
    _write_private(p12_path, p12, 0o600)
    _write_private(ca_path, ca_cert.public_bytes(serialization.Encoding.PEM), 0o644)
    return DemoIdentity(p12_path, pass_path, ca_path, f"{signer_name} (DEMO)")
