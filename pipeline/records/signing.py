"""Signing identities: loading them, PAdES signatures on certificates of analysis, signed records.

Each step a plain function (a DEMO identity is made by ``pipeline.records.demo_identity``, and
signed PDFs are checked by ``pipeline.records.pdf_verification``):

* ``load_identity`` opens a PKCS#12 file and refuses anything unsafe or unusable: files readable
  by group or others, a wrong passphrase, a certificate outside its validity period.
* ``sign_pdf`` adds an embedded PAdES signature (``/ETSI.CAdES.detached``, SHA-256) to PDF bytes,
  with a visible stamp when it fills a reserved field (``pipeline.records.signature_stamps``).
* ``sign_record`` and ``verify_record`` sign a decision record's canonical JSON.
"""

from __future__ import annotations

import os
from dataclasses import dataclass
from datetime import UTC, datetime
from io import BytesIO
from pathlib import Path
from typing import Any

from asn1crypto import x509 as asn1_x509
from cryptography import x509
from cryptography.hazmat.primitives import hashes, serialization
from cryptography.hazmat.primitives.asymmetric import ec
from pyhanko.pdf_utils.incremental_writer import IncrementalPdfFileWriter
from pyhanko.sign import fields, signers
from pyhanko.sign.signers.pdf_signer import PdfSigningSession

from pipeline.errors import SigningError
from pipeline.records.signature_stamps import approval_stamp, reserve_field
from pipeline.release.signature import SignatureSlot

P12_NAME = "signer.p12"
PASSPHRASE_NAME = "signer.passphrase"
ROOT_CA_NAME = "root-ca.pem"
DEFAULT_PASSPHRASE_ENV = "LOTGATE_SIGNING_PASSPHRASE"
SIGNATURE_BYTES_RESERVED = 8192


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


_TAKEN: dict[str, bytes] = {}  # passphrases taken out of this process's environment, by variable


def take_passphrase(passphrase_env: str = DEFAULT_PASSPHRASE_ENV) -> bytes | None:
    """The passphrase in the environment variable ``passphrase_env``, read once.

    The variable is removed from ``os.environ`` (and so from the environment of every child
    process started later: Prefect's server, the fork server of the workers); later calls in
    this process return the value taken first. None when the variable was never set.
    """
    value = os.environ.pop(passphrase_env, None)
    if value:
        _TAKEN[passphrase_env] = value.encode("utf-8")
    return _TAKEN.get(passphrase_env)


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
        try:
            return passphrase_file.read_bytes().rstrip(b"\r\n")
        except OSError as exc:
            raise SigningError(f"passphrase file {passphrase_file} cannot be read ({exc.strerror})") from exc
    raise SigningError(
        f"no passphrase for the signing key: pass one, set the environment variable "
        f"{passphrase_env or '(none configured)'}, or give a passphrase file"
    )


def _first_cause(exc: BaseException) -> str:
    """The innermost error's own words (pyHanko re-raises the cryptography library's error)."""
    while (exc.__cause__ or exc.__context__) is not None:
        exc = exc.__cause__ or exc.__context__  # type: ignore[assignment]
    return f"{exc.__class__.__name__}: {exc}"


def common_name(cert: asn1_x509.Certificate) -> str:
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
            f"file ({_first_cause(exc)})"
        ) from exc
    if signer is None or signer.signing_cert is None:
        raise SigningError(f"signing identity {p12_path} holds no usable key and certificate")
    cert = signer.signing_cert
    not_before = cert.not_valid_before
    not_after = cert.not_valid_after
    name = common_name(cert)
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
        stamp_style: Any = None,
    ) -> None:
        super().__init__(signature_meta, signer, stamp_style=stamp_style)
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
    reserve: SignatureSlot | None = None,
    stamp_lines: tuple[str, ...] | None = None,
) -> bytes:
    """Return ``pdf_bytes`` with an embedded PAdES signature (SHA-256) appended in an incremental update.

    ``reason`` states the meaning of the signature (e.g. "Lot released for sale"); the
    signature's /Name is the signer's certificate name. ``signed_at`` must carry a time zone
    and lie inside the certificate's validity period.

    The signature is invisible, except when ``field_name`` is an empty signature field the
    document already holds with a box (one an earlier signer reserved): ``stamp_lines`` are then
    drawn in that box as the signature's visible stamp. ``reserve`` adds, in the same update and
    so under this signature, an empty field for a later signer (``signature_stamps.reserve_field``).
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
    style, text_params = approval_stamp(stamp_lines) if stamp_lines else (None, None)
    try:
        writer = IncrementalPdfFileWriter(BytesIO(pdf_bytes))
        if reserve is not None:
            reserve_field(writer, reserve)
        out = BytesIO()
        _FixedTimePdfSigner(meta, identity.signer, signed_at, style).sign_pdf(
            writer, bytes_reserved=SIGNATURE_BYTES_RESERVED, output=out, appearance_text_params=text_params
        )
    except Exception as exc:
        raise SigningError(f"could not sign the PDF for {identity.signer_name}: {exc}") from exc
    return out.getvalue()


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

    from cryptography.hazmat.primitives.asymmetric import padding, rsa

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

    from cryptography.exceptions import InvalidSignature
    from cryptography.hazmat.primitives.asymmetric import padding, rsa

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
