"""The one writer of a lot's documents: batch report, dossier and (released) signed certificate.

The nightly publish and an authorised person's decision both render and write through here,
so a lot's documents are named, written and described the same way whoever decides it. They
are written into the workspace's staging folder (``.staging/reports/``,
``.staging/certificates/``) and moved into place only once the decision naming them is
committed (``place_documents``): ``certificates/`` never holds a certificate without its decision.
"""

from __future__ import annotations

import datetime as dt
import hashlib
import json
import os
import re
from dataclasses import dataclass
from pathlib import Path
from typing import Any

from pipeline.night.open import CertificateSigner
from pipeline.records.workspace import Workspace, atomic_write
from pipeline.release.records import CertificateFile, DecisionRecord, DocumentFile

STAGING = ".staging"
_DOCUMENT_NAME = re.compile(r"(?P<lot>.+)_r(?P<revision>[0-9]+)_(batch-report\.pdf|dossier\.json|certificate\.pdf)")


def staging_folder(ws: Workspace) -> Path:
    return ws.root / STAGING


def lot_of_document(name: str) -> str | None:
    """The lot a document's file name (``LOT_rN_batch-report.pdf``, ...) belongs to; None for another file."""
    match = _DOCUMENT_NAME.fullmatch(name)
    return None if match is None else match.group("lot")


def _dossier_of(report_file: str) -> str:
    return f"{report_file.removesuffix('_batch-report.pdf')}_dossier.json"


def documents_named(record: DecisionRecord) -> dict[str, str | None]:
    """The documents a decision names (paths relative to the workspace) and their SHA-256 (None: the dossier)."""
    named: dict[str, str | None] = {}
    if record.report is not None:
        named[f"reports/{record.report.file}"] = record.report.sha256
        named[f"reports/{_dossier_of(record.report.file)}"] = None
    if record.certificate is not None:
        named[f"certificates/{record.certificate.file}"] = record.certificate.sha256
    return named


def render_documents(dossier: dict[str, Any], signature: dict[str, str] | None, signer: CertificateSigner | None,
                     location: str) -> tuple[bytes, bytes | None]:
    """Batch report, and for a signature block the certificate, rendered and signed (bytes only).

    A certificate awaiting approval is signed with the empty signature field over the box its
    layout keeps for the approval's stamp.
    """
    from pipeline.documents.certificate import render_certificate_with_slot
    from pipeline.documents.report import render_batch_report

    report = render_batch_report(dossier)
    if signature is None or signer is None:
        return report, None
    signed_at = dt.datetime.fromisoformat(signature["signed_at_utc"])
    unsigned, approval_slot = render_certificate_with_slot(dossier, signature)
    certificate = signer.sign(unsigned, signed_at=signed_at, reason=signature["meaning"], location=location,
                              reserve=approval_slot)
    return report, certificate


@dataclass(frozen=True)
class WrittenDocuments:
    report: DocumentFile
    certificate: CertificateFile | None

    def files(self) -> list[str]:
        """The documents, relative to the workspace (and to the staging folder)."""
        names = [f"reports/{self.report.file}", f"reports/{_dossier_of(self.report.file)}"]
        return names + ([f"certificates/{self.certificate.file}"] if self.certificate is not None else [])


def write_documents(ws: Workspace, stem: str, dossier: dict[str, Any], report_bytes: bytes,
                    certificate_bytes: bytes | None, signature: dict[str, str] | None,
                    signer: CertificateSigner) -> WrittenDocuments:
    """Stage the report, the dossier it was drawn from and the certificate (atomic); describe them.

    The report and dossier can be drawn again from the store; the certificate is synced to disk.
    """
    staged = staging_folder(ws)
    report_name = f"{stem}_batch-report.pdf"
    atomic_write(staged / "reports" / report_name, report_bytes, durable=False)
    atomic_write(staged / "reports" / f"{stem}_dossier.json",
                 json.dumps(dossier, ensure_ascii=False, sort_keys=True).encode("utf-8"), durable=False)
    certificate = None
    if certificate_bytes is not None and signature is not None:
        name = f"{stem}_certificate.pdf"
        atomic_write(staged / "certificates" / name, certificate_bytes)
        certificate = CertificateFile(name, hashlib.sha256(certificate_bytes).hexdigest(), signer.signer_name,
                                      signature["signed_at_utc"], signature["meaning"], signer.fingerprint_sha256)
    return WrittenDocuments(DocumentFile(report_name, hashlib.sha256(report_bytes).hexdigest()), certificate)


def place_document(ws: Workspace, relative: str) -> None:
    """Move one staged document into place (a rename within the workspace)."""
    target = ws.root / relative
    target.parent.mkdir(parents=True, exist_ok=True)
    os.replace(staging_folder(ws) / relative, target)


def place_documents(ws: Workspace, documents: list[WrittenDocuments]) -> None:
    """Move documents whose decisions are committed from the staging folder into place.

    The certificates' folder is synced, so a certificate in place stays there after a power cut.
    """
    for written in documents:
        for relative in written.files():
            place_document(ws, relative)
    if any(written.certificate is not None for written in documents):
        folder = os.open(ws.certificates, os.O_RDONLY)
        try:
            os.fsync(folder)
        finally:
            os.close(folder)
