"""Signing identities, PAdES signatures on certificates of analysis, and their verification.

Four steps, each a plain function:

* ``create_demo_identity`` writes a demo plant root CA and a QA signer certificate issued by it
  (``signer.p12`` + ``signer.passphrase``, both 0600, and the public ``root-ca.pem``).
  Everything it makes is labelled DEMO; a real plant brings its own PKCS#12 from its own CA.
* ``load_identity`` opens a PKCS#12 file and refuses anything unsafe or unusable: files readable
  by group or others, a wrong passphrase, a certificate outside its validity period.
* ``sign_pdf`` adds an embedded PAdES signature (``/ETSI.CAdES.detached``, SHA-256) to PDF bytes.
* ``verify_pdf`` checks the signatures of a PDF with pyHanko's validator, offline, and says in
  one line what it found; ``pdfsig_report`` asks poppler's ``pdfsig`` for a second opinion.
"""

from __future__ import annotations

import os
import secrets
import shutil
import subprocess
from dataclasses import dataclass
from datetime import UTC, datetime, timedelta
from io import BytesIO
from pathlib import Path
from typing import Any

from asn1crypto import x509 as asn1_x509
from cryptography import x509
from cryptography.hazmat.primitives import hashes, serialization
from cryptography.hazmat.primitives.asymmetric import ec
from cryptography.hazmat.primitives.serialization import pkcs12
from cryptography.x509.oid import NameOID
from pyhanko.pdf_utils.incremental_writer import IncrementalPdfFileWriter
from pyhanko.pdf_utils.reader import PdfFileReader
from pyhanko.sign import fields, signers
from pyhanko.sign.signers.pdf_signer import PdfSigningSession
from pyhanko.sign.validation import validate_pdf_signature
from pyhanko.sign.validation.status import PdfSignatureStatus, SignatureCoverageLevel
from pyhanko_certvalidator import ValidationContext

from pipeline.errors import SigningError

P12_NAME = "signer.p12"
PASSPHRASE_NAME = "signer.passphrase"
ROOT_CA_NAME = "root-ca.pem"
DEFAULT_PASSPHRASE_ENV = "LOTGATE_SIGNING_PASSPHRASE"
SIGNATURE_BYTES_RESERVED = 8192
PDFSIG_VALID_LINE = "Signature is Valid."


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


# --------------------------------------------------------------------------- loading


@dataclass(frozen=True)
class SigningIdentity:
    """A loaded signer: the pyHanko signer object and what an analyst needs to know about it."""

    signer: signers.SimpleSigner
    signer_name: str
    fingerprint_sha256: str
    not_before: datetime
    not_after: datetime

    def to_dict(self) -> dict[str, Any]:
        return {
            "signer_name": self.signer_name,
            "fingerprint_sha256": self.fingerprint_sha256,
            "not_before": self.not_before.isoformat(),
            "not_after": self.not_after.isoformat(),
        }


def _refuse_if_shared(path: Path, what: str) -> None:
    mode = path.stat().st_mode & 0o777
    if mode & 0o077:
        raise SigningError(
            f"{what} {path} has mode {mode:04o}: it can be read by other users. Allowed: "
            f"owner only (e.g. chmod 600 {path})."
        )


def _read_passphrase(
    passphrase: bytes | None, passphrase_env: str, passphrase_file: Path | None
) -> bytes:
    if passphrase is not None:
        if not isinstance(passphrase, bytes):
            raise SigningError(
                f"the passphrase must be bytes; received {type(passphrase).__name__}"
            )
        return passphrase
    from_env = os.environ.get(passphrase_env) if passphrase_env else None
    if from_env:
        return from_env.encode("utf-8")
    if passphrase_file is not None:
        passphrase_file = Path(passphrase_file)
        if not passphrase_file.is_file():
            raise SigningError(f"passphrase file {passphrase_file} does not exist")
        _refuse_if_shared(passphrase_file, "passphrase file")
        return passphrase_file.read_bytes().rstrip(b"\r\n")
    raise SigningError(
        f"no passphrase for the signing key: pass one, set the environment variable "
        f"{passphrase_env or '(none configured)'}, or give a passphrase file"
    )


def _common_name(cert: asn1_x509.Certificate) -> str:
    name = cert.subject.native.get("common_name")
    if isinstance(name, list):
        name = name[0]
    return str(name) if name else cert.subject.human_friendly


def load_identity(
    p12_path: Path,
    passphrase: bytes | None = None,
    passphrase_env: str = DEFAULT_PASSPHRASE_ENV,
    passphrase_file: Path | None = None,
    now: datetime | None = None,
    *,
    check_validity: bool = True,
) -> SigningIdentity:
    """Open a PKCS#12 signing identity; the passphrase comes from the argument, else the
    environment variable ``passphrase_env``, else ``passphrase_file``.

    Refused with SigningError: a missing file, a .p12 or passphrase file readable by group or
    others, a wrong passphrase, a certificate not valid at ``now`` (default: the current time).
    """
    p12_path = Path(p12_path)
    if not p12_path.is_file():
        raise SigningError(f"signing identity {p12_path} does not exist")
    _refuse_if_shared(p12_path, "signing identity")
    secret = _read_passphrase(passphrase, passphrase_env, passphrase_file)
    try:
        signer = signers.SimpleSigner.load_pkcs12_data(
            p12_path.read_bytes(), other_certs=None, passphrase=secret
        )
    except Exception as exc:  # wrong passphrase, damaged file, no key inside
        raise SigningError(
            f"cannot open signing identity {p12_path}: wrong passphrase or damaged PKCS#12 "
            f"file ({exc})"
        ) from exc
    if signer is None or signer.signing_cert is None:
        raise SigningError(f"signing identity {p12_path} holds no usable key and certificate")
    cert = signer.signing_cert
    not_before = cert.not_valid_before
    not_after = cert.not_valid_after
    name = _common_name(cert)
    if check_validity:
        at = now or datetime.now(UTC)
        if at.tzinfo is None:
            raise SigningError(f"the check time must carry a time zone; received {at}")
        period = f"valid from {not_before:%Y-%m-%d %H:%M:%S %Z} to {not_after:%Y-%m-%d %H:%M:%S %Z}"
        if at < not_before:
            raise SigningError(
                f"signing certificate of {name} is not yet valid at {at:%Y-%m-%d %H:%M:%S %Z}: "
                f"it is {period}"
            )
        if at > not_after:
            raise SigningError(
                f"signing certificate of {name} expired before {at:%Y-%m-%d %H:%M:%S %Z}: "
                f"it was {period}"
            )
    return SigningIdentity(
        signer=signer,
        signer_name=name,
        fingerprint_sha256=cert.sha256.hex(),
        not_before=not_before,
        not_after=not_after,
    )


# --------------------------------------------------------------------------- signing


class _FixedTimePdfSigner(signers.PdfSigner):
    """A PdfSigner that records the caller's signing time instead of the clock's.

    The time goes into both the CMS signingTime attribute and the signature dictionary's /M.
    """

    def __init__(
        self,
        signature_meta: signers.PdfSignatureMetadata,
        signer: signers.Signer,
        signed_at: datetime,
    ) -> None:
        super().__init__(signature_meta, signer)
        self._signed_at = signed_at

    def init_signing_session(
        self, pdf_out: Any, existing_fields_only: bool = False
    ) -> PdfSigningSession:
        session = super().init_signing_session(pdf_out, existing_fields_only)
        session.system_time = self._signed_at
        return session


def sign_pdf(
    pdf_bytes: bytes,
    identity: SigningIdentity,
    *,
    reason: str,
    location: str,
    signed_at: datetime,
    field_name: str = "QA-Release",
) -> bytes:
    """Return ``pdf_bytes`` with an invisible embedded PAdES signature (SHA-256) appended.

    ``reason`` states the meaning of the signature (e.g. "Lot released for sale"); the
    signature's /Name is the signer's certificate name. ``signed_at`` must carry a time zone
    and lie inside the certificate's validity period.
    """
    if not reason.strip():
        raise SigningError("a signature needs a reason stating what it means; received none")
    if signed_at.tzinfo is None:
        raise SigningError(f"the signing time must carry a time zone; received {signed_at}")
    if not identity.not_before <= signed_at <= identity.not_after:
        raise SigningError(
            f"signing time {signed_at.isoformat()} is outside the validity of the certificate "
            f"of {identity.signer_name} ({identity.not_before.isoformat()} to "
            f"{identity.not_after.isoformat()})"
        )
    meta = signers.PdfSignatureMetadata(
        field_name=field_name,
        reason=reason,
        location=location,
        name=identity.signer_name,
        subfilter=fields.SigSeedSubFilter.PADES,
        md_algorithm="sha256",
    )
    try:
        writer = IncrementalPdfFileWriter(BytesIO(pdf_bytes))
        out = BytesIO()
        _FixedTimePdfSigner(meta, identity.signer, signed_at).sign_pdf(
            writer, bytes_reserved=SIGNATURE_BYTES_RESERVED, output=out
        )
    except Exception as exc:
        raise SigningError(f"could not sign the PDF for {identity.signer_name}: {exc}") from exc
    return out.getvalue()


# --------------------------------------------------------------------------- verification


@dataclass(frozen=True)
class PdfVerification:
    """What the signatures of one PDF say.

    ``valid``: every signature is intact and the newest one covers the whole file, i.e. nothing
    was changed after signing. ``trusted``: every signer chains to one of the given roots.
    """

    valid: bool
    trusted: bool
    signer_name: str | None
    signed_at: datetime | None
    reason: str | None
    signature_count: int
    summary: str

    def to_dict(self) -> dict[str, Any]:
        return {
            "valid": self.valid,
            "trusted": self.trusted,
            "signer_name": self.signer_name,
            "signed_at": self.signed_at.isoformat() if self.signed_at else None,
            "reason": self.reason,
            "signature_count": self.signature_count,
            "summary": self.summary,
        }


def _not_valid(summary: str, count: int = 0) -> PdfVerification:
    return PdfVerification(False, False, None, None, None, count, summary)


def _load_roots(trust_roots: list[Path] | None) -> list[asn1_x509.Certificate]:
    roots = []
    for path in trust_roots or []:
        try:
            cert = x509.load_pem_x509_certificate(Path(path).read_bytes())
        except (OSError, ValueError) as exc:
            raise SigningError(f"cannot read trust root {path}: {exc}") from exc
        roots.append(asn1_x509.Certificate.load(cert.public_bytes(serialization.Encoding.DER)))
    return roots


def _describe(status: PdfSignatureStatus, whole_file: bool, signer: str | None) -> str:
    if not status.intact:
        state = "signature broken: the signed bytes were changed after signing"
    elif not status.valid:
        state = "signature broken: the signature value does not match the signer's key"
    elif not whole_file:
        state = "signature intact, but the document was changed after signing"
    else:
        state = "signature intact, document unchanged since signing"
    trust = "issuer trusted" if status.trusted else "issuer not in trust store"
    return f"{state}; signer {signer or 'unknown'}; {trust}"


def verify_pdf(
    path_or_bytes: Path | str | bytes, trust_roots: list[Path] | None = None
) -> PdfVerification:
    """Check every embedded signature of a PDF offline (no fetching of revocation data).

    A file that is no PDF, has no signature, or was altered gives ``valid=False`` with the
    reason in ``summary``; only a missing file (or an unreadable trust root) raises SigningError.
    """
    if isinstance(path_or_bytes, bytes):
        data = path_or_bytes
    else:
        path = Path(path_or_bytes)
        if not path.is_file():
            raise SigningError(f"PDF to verify {path} does not exist")
        data = path.read_bytes()
    roots = _load_roots(trust_roots)
    try:
        reader = PdfFileReader(BytesIO(data), strict=False)
        embedded = list(reader.embedded_signatures)
    except Exception as exc:
        return _not_valid(f"not a readable PDF: {exc}")
    if not embedded:
        return _not_valid("no signature found in the PDF")

    statuses: list[PdfSignatureStatus] = []
    try:
        for sig in embedded:
            context = ValidationContext(trust_roots=roots, allow_fetching=False)
            statuses.append(validate_pdf_signature(sig, context))
    except Exception as exc:
        return _not_valid(f"signature cannot be checked: {exc}", len(embedded))

    newest, newest_status = embedded[-1], statuses[-1]
    whole_file = newest_status.coverage == SignatureCoverageLevel.ENTIRE_FILE
    valid = whole_file and all(s.intact and s.valid for s in statuses)
    trusted = all(s.trusted for s in statuses)
    cert = newest_status.signing_cert
    signer = _common_name(cert) if cert is not None else None
    reason = newest.sig_object.get("/Reason")
    summary = _describe(newest_status, whole_file, signer)
    if len(embedded) > 1:
        broken = sum(not (s.intact and s.valid) for s in statuses)
        summary += f"; {len(embedded)} signatures, {broken} broken"
    return PdfVerification(
        valid=valid,
        trusted=trusted,
        signer_name=signer,
        signed_at=newest_status.signer_reported_dt,
        reason=str(reason) if reason is not None else None,
        signature_count=len(embedded),
        summary=summary,
    )


# --------------------------------------------------------------------------- poppler check


def pdfsig_report(path: Path, *, timeout_s: float = 30.0) -> tuple[bool, str] | None:
    """Ask poppler's ``pdfsig`` about a PDF; None if ``pdfsig`` is not installed.

    ``pdfsig`` exits 0 whether or not a signature holds, so its text decides: True iff there is
    at least one signature and every "Signature Validation:" line reads "Signature is Valid.".
    """
    exe = shutil.which("pdfsig")
    if exe is None:
        return None
    try:
        done = subprocess.run(  # noqa: S603 - fixed executable, the path is an argument
            [exe, str(path)], capture_output=True, text=True, timeout=timeout_s, check=False
        )
    except (OSError, subprocess.TimeoutExpired) as exc:
        return False, f"pdfsig could not be run: {exc}"
    text = (done.stdout + done.stderr).strip()
    verdicts = [
        line.split(":", 1)[1].strip()
        for line in text.splitlines()
        if line.strip().lstrip("- ").startswith("Signature Validation:")
    ]
    ok = bool(verdicts) and all(v == PDFSIG_VALID_LINE for v in verdicts)
    return ok, text


# --------------------------------------------------------------------------- record signatures
@dataclass(frozen=True)
class RecordSignature:
    """A signature over one record's canonical bytes, linked to it (21 CFR 11.70)."""

    algorithm: str
    signature_b64: str
    signer_name: str
    certificate_pem: str
    certificate_sha256: str

    def to_dict(self) -> dict[str, Any]:
        return {"algorithm": self.algorithm, "signature_b64": self.signature_b64, "signer_name": self.signer_name,
                "certificate_pem": self.certificate_pem, "certificate_sha256": self.certificate_sha256}


def sign_record(identity: SigningIdentity, data: bytes) -> RecordSignature:
    """Sign ``data`` with the identity's private key: ECDSA or RSA (PKCS#1 v1.5) over SHA-256."""
    import base64

    from cryptography import x509
    from cryptography.hazmat.primitives import hashes, serialization
    from cryptography.hazmat.primitives.asymmetric import ec, padding, rsa

    key = serialization.load_der_private_key(identity.signer.signing_key.dump(), password=None)
    cert = x509.load_der_x509_certificate(identity.signer.signing_cert.dump())
    if isinstance(key, ec.EllipticCurvePrivateKey):
        signature, algorithm = key.sign(data, ec.ECDSA(hashes.SHA256())), "ecdsa-sha256"
    elif isinstance(key, rsa.RSAPrivateKey):
        signature, algorithm = key.sign(data, padding.PKCS1v15(), hashes.SHA256()), "rsa-pkcs1v15-sha256"
    else:  # pragma: no cover - identities are made with EC or RSA keys
        raise SigningError(f"unsupported key type {type(key).__name__} in {identity.signer_name}'s identity")
    pem = cert.public_bytes(serialization.Encoding.PEM).decode("ascii")
    return RecordSignature(algorithm, base64.b64encode(signature).decode("ascii"), identity.signer_name, pem,
                           identity.fingerprint_sha256)


def verify_record(signature: dict[str, Any], data: bytes) -> bool:
    """True when ``signature`` (RecordSignature.to_dict()) is valid for ``data``."""
    import base64

    from cryptography import x509
    from cryptography.exceptions import InvalidSignature
    from cryptography.hazmat.primitives import hashes
    from cryptography.hazmat.primitives.asymmetric import ec, padding, rsa

    try:
        cert = x509.load_pem_x509_certificate(signature["certificate_pem"].encode("ascii"))
        raw = base64.b64decode(signature["signature_b64"])
        key = cert.public_key()
        if isinstance(key, ec.EllipticCurvePublicKey):
            key.verify(raw, data, ec.ECDSA(hashes.SHA256()))
        elif isinstance(key, rsa.RSAPublicKey):
            key.verify(raw, data, padding.PKCS1v15(), hashes.SHA256())
        else:
            return False
    except (InvalidSignature, KeyError, ValueError, TypeError):
        return False
    return True
