"""What a signature on a lot's certificate or decision means, its visible block, and what a reason must say (pure).

Two kinds of signer, never confused: the SYSTEM identity of the installation attests only what
the system itself did (every release criterion met; release by exception under a named
procedure); a PERSON from the register of authorised signers approves, rejects or re-baselines.
"""

from __future__ import annotations

import datetime as dt
import re
import textwrap
from dataclasses import dataclass

from pipeline.errors import InputError
from pipeline.release.dossier import local_time_text
from pipeline.vocabulary import SignerRole

PERSON_RELEASE_MEANING = ("Release of the lot by an authorised person: I have reviewed the lot's results, its hold "
                          "and its investigation, and I approve its release against the stated specification")
PERSON_APPROVAL_MEANING = ("Release of the lot approved by an authorised person: I have reviewed this certificate, "
                           "the lot's results and the validity of the assays behind them, and I approve its release "
                           "against the stated specification")
PERSON_REJECT_MEANING = "Rejection of the lot by an authorised person: the lot must not be released"
MIN_REASON_CHARACTERS = 10
MIN_REASON_WORDS = 2


def system_ready_meaning(plant_name: str, spec_code: str, spec_version: str) -> str:
    """The system's meaning on a certificate that awaits a person's approval (release mode 'approval')."""
    return (f"Prepared by the lotgate system of {plant_name}: every release criterion of specification {spec_code} "
            f"version {spec_version} met. NOT released until approved by an authorised person")


def system_automatic_meaning(plant_name: str, spec_code: str, spec_version: str, procedure: str) -> str:
    """The system's meaning on a certificate released by exception (release mode 'automatic')."""
    return (f"Released by exception by the lotgate system of {plant_name} under the plant's procedure {procedure}: "
            f"every release criterion of specification {spec_code} version {spec_version} met; no person reviewed "
            "this lot before release")


APPROVAL_FIELD = "QA-Approval"  # the signature field a person's approval fills
APPROVAL_SLOT_TITLE = "Approval for release by an authorised person"
APPROVAL_SLOT_CAPTION = ("This certificate is not valid for release until an authorised person has signed in the box "
                         "below (lotgate approve, or the reviewer's desk); lotgate verify names every signature, its signer "
                         "and its meaning.")
APPROVAL_SLOT_EMPTY = ("Approval for release: NOT YET GIVEN",
                       "No authorised person has signed this certificate: the lot is not released.")
STAMP_LINE_CHARACTERS = 88  # the longest line of a stamp: its box holds it in 8 pt Courier, unscaled


@dataclass(frozen=True)
class SignatureSlot:
    """A box a certificate keeps free for a later signature's visible stamp.

    ``page_index`` counts from 0; ``box_pt`` is (left, bottom, right, top) in PDF points from
    the page's lower-left corner; ``empty_lines`` is what the box shows until it is signed.
    """

    field_name: str
    page_index: int
    box_pt: tuple[float, float, float, float]
    empty_lines: tuple[str, ...] = APPROVAL_SLOT_EMPTY


def approval_stamp_lines(signer_name: str, certificate_fingerprint: str, signed_at: dt.datetime,
                         time_zone: str, meaning: str = PERSON_APPROVAL_MEANING) -> tuple[str, ...]:
    """The lines of the visible stamp of a person's approval: who, what it means, when, which certificate.

    The time is the plant's local time with its zone and UTC offset; the certificate is named
    by the SHA-256 fingerprint the register of authorised signers lists.
    """
    if signed_at.tzinfo is None:
        raise InputError(f"the approval time must carry a time zone; received {signed_at}")
    meaning_lines = textwrap.wrap(f"Meaning: {meaning}", STAMP_LINE_CHARACTERS, subsequent_indent="  ")
    return ("APPROVED FOR RELEASE by an authorised person",
            f"Signed by: {signer_name}",
            *meaning_lines,
            f"Date and time: {local_time_text(signed_at, time_zone)}, plant time zone {time_zone}",
            f"Certificate SHA-256: {certificate_fingerprint.lower()}")


ROLE_OF_RELEASE = SignerRole.RELEASE_APPROVAL
ROLE_OF_REJECTION = SignerRole.REJECTION


def signature_block(signer_name: str, certificate_fingerprint: str, signed_at: dt.datetime, time_zone: str,
                    meaning: str, *, system: bool = False) -> dict[str, str]:
    """The signature block a certificate shows: who, when (plant time and UTC), meaning, certificate."""
    block = {"signer_name": signer_name, "signed_at_local": local_time_text(signed_at, time_zone),
             "signed_at_utc": signed_at.isoformat(), "meaning": meaning,
             "certificate_fingerprint": certificate_fingerprint}
    return {**block, "signer_kind": "system"} if system else block


def checked_reason(reason: str | None, reference_pattern: str | None = None) -> str:
    """The reason, stripped, when it says something; InputError in one line otherwise.

    Something: at least MIN_REASON_CHARACTERS characters, MIN_REASON_WORDS words with letters in
    them (not only punctuation or digits), and the plant's reference pattern when it sets one.
    """
    text = " ".join((reason or "").split())
    words = [w for w in text.split(" ") if any(ch.isalpha() for ch in w)]
    if len(text) < MIN_REASON_CHARACTERS or len(words) < MIN_REASON_WORDS:
        raise InputError(f"the reason {text!r} says too little: write at least {MIN_REASON_CHARACTERS} characters "
                         f"and {MIN_REASON_WORDS} words saying what was reviewed and why")
    if reference_pattern and re.search(reference_pattern, text) is None:
        raise InputError(f"the reason must name the plant's reference (pattern {reference_pattern}), "
                         f"e.g. the change control or deviation number; found none in {text!r}")
    return text
