"""The example dossier and visible signature block the document tests render (invented demo data)."""

import json
from pathlib import Path
from typing import Any

FIXTURE = Path(__file__).parent / "fixtures" / "dossier_example.json"

SIGNATURE = {
    "signer_name": "Mira Castellan",
    "signed_at_local": "2026-11-27 23:14:05 CET (UTC+01:00)",
    "signed_at_utc": "2026-11-27 22:14:05 UTC",
    "meaning": "Released for sale: I have reviewed the results and the assay validity of this lot and approve its release",
    "certificate_fingerprint": "3f9a0c7d1b2e4f5061728394a5b6c7d8e9f00112233445566778899aabbccdd",
}


def example_dossier() -> dict[str, Any]:
    return json.loads(FIXTURE.read_text(encoding="utf-8"))
