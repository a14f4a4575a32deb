"""What a signature on a lot's certificate or decision means, and its visible block (pure)."""

from __future__ import annotations

import datetime as dt

from pipeline.release.dossier import local_time_text

NIGHTLY_RELEASE_MEANING = ("Release of the lot: I have reviewed its results and the validity of the assays "
                           "behind them, and I approve its release against the stated specification")
PERSON_RELEASE_MEANING = ("Release of the lot by an authorised person: I have reviewed the lot's results, its hold "
                          "and its investigation, and I approve its release against the stated specification")
PERSON_REJECT_MEANING = "Rejection of the lot by an authorised person: the lot must not be released"


def signature_block(signer_name: str, certificate_fingerprint: str, signed_at: dt.datetime, time_zone: str,
                    meaning: str) -> dict[str, str]:
    """The signature block a certificate shows: who, when (plant time and UTC), meaning, certificate."""
    return {"signer_name": signer_name, "signed_at_local": local_time_text(signed_at, time_zone),
            "signed_at_utc": signed_at.isoformat(), "meaning": meaning,
            "certificate_fingerprint": certificate_fingerprint}
