"""``lotgate verify`` for certificates: every check in words, against the workspace that issued them."""

from __future__ import annotations

from pathlib import Path
from typing import Any

from pipeline.errors import InputError


def open_for_verify(workspace: str | None) -> tuple[Any, Any]:
    """The issuing workspace and its store; the trust anchor and register come only from its settings."""
    from pipeline.night.open import open_records

    if not workspace:
        raise InputError("verifying a certificate needs the workspace that issued it (--workspace DIR): its configured "
                         "trust anchor, register of signers and store decide; nothing found beside the file is trusted")
    return open_records(Path(workspace))


def verify_certificate_text(path: Path, opened: tuple[Any, Any], console: Any) -> bool:
    """Print each check of one certificate; True when all hold."""
    from pipeline.records.certificate_check import check_certificate

    ws, store = opened
    verdict = check_certificate(path, ws, store)
    console.print(f"{'VALID' if verdict.holds else 'INVALID'} {path}")
    for check in verdict.checks:
        console.print(f"  {'ok  ' if check.holds else 'FAIL'} {check.what}: {check.found}")
    return verdict.holds
