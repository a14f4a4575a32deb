"""Checking the signatures of a PDF: pyHanko's validator offline, and poppler's ``pdfsig`` as a second opinion.

``verify_pdf`` checks integrity and chaining to the roots it is given, nothing more; ``lotgate
verify`` uses ``pipeline.records.certificate_check`` (configured anchor only, key usage, signers
by the register, modifications between signatures, the record and the lot's current status).
"""

from __future__ import annotations

import shutil
import subprocess
from dataclasses import dataclass
from datetime import datetime
from io import BytesIO
from pathlib import Path
from typing import Any

from asn1crypto import x509 as asn1_x509
from cryptography import x509
from cryptography.hazmat.primitives import serialization
from pyhanko.pdf_utils.reader import PdfFileReader
from pyhanko.sign.validation import validate_pdf_signature
from pyhanko.sign.validation.status import PdfSignatureStatus, SignatureCoverageLevel
from pyhanko_certvalidator import ValidationContext

from pipeline.errors import SigningError
from pipeline.records.signing import common_name

PDFSIG_VALID_LINE = "Signature is Valid."


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
    signer = common_name(cert) if cert is not None else None
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
