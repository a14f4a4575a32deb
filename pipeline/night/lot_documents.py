"""The one writer of a lot's documents: batch report, dossier and (released) signed certificate.

The nightly publish and an authorised person's decision both render and write through here,
so a lot's documents are named, written and described the same way whoever decides it.
"""

from __future__ import annotations

import datetime as dt
import hashlib
import json
from dataclasses import dataclass
from typing import Any

from pipeline.night.open import CertificateSigner
from pipeline.records.workspace import Workspace, atomic_write
from pipeline.release.records import CertificateFile, DocumentFile


def render_documents(dossier: dict[str, Any], signature: dict[str, str] | None, signer: CertificateSigner | None,
                     location: str) -> tuple[bytes, bytes | None]:
    """Batch report, and for a signature block the certificate, rendered and signed (bytes only)."""
    from pipeline.documents.certificate import render_certificate
    from pipeline.documents.report import render_batch_report

    report = render_batch_report(dossier)
    if signature is None or signer is None:
        return report, None
    signed_at = dt.datetime.fromisoformat(signature["signed_at_utc"])
    certificate = signer.sign(render_certificate(dossier, signature), signed_at=signed_at,
                              reason=signature["meaning"], location=location)
    return report, certificate


@dataclass(frozen=True)
class WrittenDocuments:
    report: DocumentFile
    certificate: CertificateFile | None


def write_documents(ws: Workspace, stem: str, dossier: dict[str, Any], report_bytes: bytes,
                    certificate_bytes: bytes | None, signature: dict[str, str] | None,
                    signer: CertificateSigner) -> WrittenDocuments:
    """Write the report, the dossier it was drawn from and the certificate (atomic); describe them.

    The report and dossier can be drawn again from the store; the certificate is synced to disk.
    """
    report_name = f"{stem}_batch-report.pdf"
    atomic_write(ws.reports / report_name, report_bytes, durable=False)
    atomic_write(ws.reports / f"{stem}_dossier.json",
                 json.dumps(dossier, ensure_ascii=False, sort_keys=True).encode("utf-8"), durable=False)
    certificate = None
    if certificate_bytes is not None and signature is not None:
        name = f"{stem}_certificate.pdf"
        atomic_write(ws.certificates / name, certificate_bytes)
        certificate = CertificateFile(name, hashlib.sha256(certificate_bytes).hexdigest(), signer.signer_name,
                                      signature["signed_at_utc"], signature["meaning"], signer.fingerprint_sha256)
    return WrittenDocuments(DocumentFile(report_name, hashlib.sha256(report_bytes).hexdigest()), certificate)
