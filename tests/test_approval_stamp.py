"""The approval is visible: a prepared certificate keeps a box for it, and the approval's stamp fills that box.

Expected values come from outside lotgate's own code: pyHanko's validator and modification
analysis, poppler's ``pdfsig`` and ``pdftotext`` (independent PDF readers) when installed, the
signer's certificate read back from the signature (its common name and the SHA-256 of its DER
bytes, RFC 5280 / common practice for a certificate fingerprint), and Python's IANA time-zone
database for the plant's local time (Europe/Berlin is UTC+01:00, "CET", in December: from memory).
"""

from __future__ import annotations

import datetime as dt
import hashlib
import re
import shutil
import subprocess
from io import BytesIO
from pathlib import Path
from zoneinfo import ZoneInfo

import pytest
from asn1crypto import pem
from asn1crypto import x509 as asn1_x509
from pyhanko.pdf_utils.reader import PdfFileReader
from pyhanko.sign.diff_analysis import ModificationLevel
from pyhanko.sign.validation import validate_pdf_signature
from pyhanko.sign.validation.status import SignatureCoverageLevel
from pyhanko_certvalidator import ValidationContext

from flows import cli
from pipeline.documents.certificate import render_certificate_with_slot
from pipeline.night.approval import approve_lot
from pipeline.records import signing
from pipeline.records.certificate_check import check_certificate
from pipeline.records.pdf_verification import pdfsig_report
from pipeline.records.signature_stamps import stamp_safe
from pipeline.release.signature import (
    APPROVAL_FIELD,
    approval_stamp_lines,
    signature_block,
    system_ready_meaning,
)
from pipeline.vocabulary import Disposition
from tests import trust_fixtures as tf
from tests.dossiers import example_dossier

REASON = "results, assay validity and the prepared certificate reviewed"
PERSON = "Mira Castellan (DEMO)"


@pytest.fixture()
def ready(tmp_path):
    return tf.ready_workspace(tmp_path / "ws")


@pytest.fixture()
def approved(ready) -> Path:
    done = approve_lot(ready.ws, ready.store, tf.LOT, identity=ready.person("mira.castellan"), reason=REASON)
    return ready.ws.root / done.certificate


def _prepared(ready) -> Path:
    return ready.ws.certificates / f"{tf.LOT}_r1_certificate.pdf"


def _reader(path: Path) -> PdfFileReader:
    return PdfFileReader(BytesIO(path.read_bytes()), strict=False)


def _field(reader: PdfFileReader, name: str):
    return next(f.get_object() for f in reader.root["/AcroForm"]["/Fields"] if f.get_object()["/T"] == name)


def _appearance_text(reader: PdfFileReader, name: str) -> str:
    """The text a field's normal appearance draws (its literal strings, PDF escapes undone)."""
    data = _field(reader, name)["/AP"]["/N"].data
    strings = re.findall(rb"\(((?:\\.|[^\\)])*)\)\s*Tj", data, re.S)

    def unescape(raw: bytes) -> str:
        return re.sub(rb"\\([0-7]{1,3}|.)", lambda m: bytes([int(m[1], 8)]) if m[1][:1].isdigit() else m[1],
                      raw).decode("latin-1")

    return "\n".join(unescape(s) for s in strings)


def _pdftotext(path: Path, *extra: str) -> str | None:
    exe = shutil.which("pdftotext")
    if exe is None:
        return None
    return subprocess.run([exe, "-layout", *extra, str(path), "-"], capture_output=True, text=True,  # noqa: S603
                          check=True, timeout=60).stdout


def _flat(text: str) -> str:
    return " ".join(text.split())


# --------------------------------------------------------------------------- the signatures stay valid


def test_both_signatures_intact_and_the_stamp_is_form_filling_for_pyhanko(ready, approved):
    signatures = list(_reader(approved).embedded_signatures)
    assert [s.field_name for s in signatures] == ["QA-Release", APPROVAL_FIELD]
    _, _, der = pem.unarmor(ready.trust.root_ca.read_bytes())
    context = ValidationContext(trust_roots=[asn1_x509.Certificate.load(der)], allow_fetching=False)
    system, person = (validate_pdf_signature(s, context) for s in signatures)
    assert system.intact and system.valid and system.trusted and person.intact and person.valid and person.trusted
    assert system.coverage == SignatureCoverageLevel.ENTIRE_REVISION  # the approval came after it
    assert system.modification_level is not None and system.modification_level <= ModificationLevel.FORM_FILLING
    assert system.docmdp_ok  # the system's signature carries no DocMDP restriction that filling would break
    assert person.coverage == SignatureCoverageLevel.ENTIRE_FILE


def test_lotgate_verify_and_pdfsig_accept_the_approved_certificate(ready, approved, capsys):
    verdict = check_certificate(approved, ready.ws, ready.store)
    assert verdict.holds, [f"{c.what}: {c.found}" for c in verdict.failed()]
    assert "only further signatures were added" in next(c.found for c in verdict.checks
                                                         if c.what == "signature 1: what was added after it")
    capsys.readouterr()
    assert cli.main(["verify", "--workspace", str(ready.ws.root), str(approved)]) == 0
    assert "VALID" in capsys.readouterr().out
    report = pdfsig_report(approved)
    if report is None:
        pytest.skip("poppler's pdfsig is not installed (Debian package poppler-utils): the independent check is skipped")
    ok, text = report
    assert ok and text.count("Signature is Valid.") == 2, text


def test_a_stamp_painted_after_the_approval_is_still_caught(ready, approved):
    """An unsigned update after the visible approval still fails verify (the stamp opens no door)."""
    forged = approved.with_name(approved.name)
    forged.write_bytes(tf.painted(approved.read_bytes(), b"APPROVED FOR RELEASE by Someone Else"))
    verdict = check_certificate(forged, ready.ws, ready.store)
    assert not verdict.holds
    assert any("appended after the last signature" in c.found for c in verdict.failed())


# --------------------------------------------------------------------------- what the stamp says


def test_the_stamp_names_the_person_the_meaning_the_local_time_and_the_certificate(approved):
    reader = _reader(approved)
    person = list(reader.embedded_signatures)[1]
    cert = person.signer_cert
    expected_name = cert.subject.native["common_name"]
    expected_fingerprint = hashlib.sha256(cert.dump()).hexdigest()
    local = person.self_reported_timestamp.astimezone(ZoneInfo("Europe/Berlin"))
    minutes = int(local.utcoffset().total_seconds()) // 60
    expected_time = f"{local:%Y-%m-%d %H:%M:%S %Z} (UTC{'+' if minutes >= 0 else '-'}{abs(minutes) // 60:02d}:" \
                    f"{abs(minutes) % 60:02d})"
    stamp = _flat(_appearance_text(reader, APPROVAL_FIELD))
    assert expected_name == PERSON and f"Signed by: {PERSON}" in stamp
    assert "APPROVED FOR RELEASE" in stamp and "approve its release against the stated specification" in stamp
    assert expected_time in stamp and "Europe/Berlin" in stamp
    assert expected_fingerprint in stamp
    assert "NOT YET GIVEN" not in stamp
    text = _pdftotext(approved)
    if text is None:
        pytest.skip("pdftotext (poppler-utils) is not installed: the stamp was read from its appearance stream only")
    printed = _flat(text)
    assert f"Signed by: {PERSON}" in printed and expected_fingerprint in printed and expected_time in printed
    assert "NOT YET GIVEN" not in printed  # the printed approved certificate no longer says it awaits approval


def test_the_prepared_certificate_shows_the_empty_box_saying_not_yet_given(ready):
    prepared = _prepared(ready)
    reader = _reader(prepared)
    assert [s.field_name for s in reader.embedded_signatures] == ["QA-Release"]
    field = _field(reader, APPROVAL_FIELD)
    assert "/V" not in field and int(field["/F"]) & 4  # empty, and printed (annotation flag bit 3, ISO 32000-1 12.5.3)
    assert "NOT YET GIVEN" in _appearance_text(reader, APPROVAL_FIELD)
    text = _pdftotext(prepared)
    if text is None:
        pytest.skip("pdftotext (poppler-utils) is not installed")
    assert "NOT YET GIVEN" in text and "not valid for release until an authorised person has signed" in _flat(text)


@pytest.mark.parametrize(("utc", "local"), [
    (dt.datetime(2026, 12, 2, 10, 0, tzinfo=dt.UTC), "2026-12-02 11:00:00 CET (UTC+01:00)"),  # winter time, from memory
    (dt.datetime(2026, 7, 2, 10, 0, tzinfo=dt.UTC), "2026-07-02 12:00:00 CEST (UTC+02:00)"),  # summer time, from memory
])
def test_the_stamp_time_is_the_plant_time_with_zone_and_offset(utc, local):
    lines = approval_stamp_lines("A. Person", "AB" * 32, utc, "Europe/Berlin")
    assert f"Date and time: {local}, plant time zone Europe/Berlin" in lines
    assert f"Certificate SHA-256: {'ab' * 32}" in lines and "Signed by: A. Person" in lines
    assert max(len(line) for line in lines) <= 88  # what the box holds unscaled (see test_no_page_text_...)


def test_names_beyond_latin1_lose_accents_on_the_stamp_only(ready, tmp_path):
    p12 = tf.issue(tmp_path / "zoe", tf.plant_ca(ready.trust), "Zoë Dvořák-Łaska")
    identity = tf.unlocked(p12)
    when = dt.datetime.now(dt.UTC).replace(microsecond=0)
    lines = approval_stamp_lines(identity.signer_name, identity.fingerprint_sha256, when, "Europe/Berlin")
    signed = tmp_path / "signed.pdf"
    signed.write_bytes(signing.sign_pdf(_prepared(ready).read_bytes(), identity, reason="approval test",
                                        location="test", signed_at=when, field_name=APPROVAL_FIELD, stamp_lines=lines))
    assert stamp_safe("Zoë Dvořák-Łaska") == "Zoë Dvorák-Laska"
    assert "Signed by: Zoë Dvorák-Laska" in _appearance_text(_reader(signed), APPROVAL_FIELD)
    text = _pdftotext(signed)
    if text is not None:
        assert "Signed by: Zoë Dvorák-Laska" in text


# --------------------------------------------------------------------------- the layout keeps the box free


def _words(pdf: Path, page: int) -> list[tuple[float, float, float, float, str]]:
    """Word boxes of one page (1-based) in PDF points from the lower-left corner, by pdftotext -bbox."""
    html = _pdftotext(pdf, "-bbox", "-f", str(page), "-l", str(page))
    assert html is not None
    height = float(re.search(r'<page width="[0-9.]+" height="([0-9.]+)"', html)[1])
    return [(float(a), height - float(d), float(c), height - float(b), w) for a, b, c, d, w in
            re.findall(r'<word xMin="([0-9.]+)" yMin="([0-9.]+)" xMax="([0-9.]+)" yMax="([0-9.]+)">([^<]*)</word>', html)]


@pytest.mark.parametrize("results", [0, None])  # the block on the first page, or pushed to the second
def test_no_page_text_lies_in_the_reserved_box(tmp_path, results):
    if shutil.which("pdftotext") is None:
        pytest.skip("pdftotext (poppler-utils) is not installed: word positions cannot be read")
    dossier = example_dossier()
    dossier["decision"].update(disposition=Disposition.READY_FOR_RELEASE, label=Disposition.READY_FOR_RELEASE)
    dossier["verdicts"] = dossier["verdicts"][:results]
    when = dt.datetime(2026, 12, 2, 10, 0, tzinfo=dt.UTC)
    block = signature_block("lotgate system - test (DEMO)", "ab" * 32, when, "Europe/Berlin",
                            system_ready_meaning("Test plant", "LLC-200", "3.1"), system=True)
    pdf, slot = render_certificate_with_slot(dossier, block)
    assert slot is not None and slot.field_name == APPROVAL_FIELD and slot.page_index == (0 if results == 0 else 1)
    path = tmp_path / "prepared.pdf"
    path.write_bytes(pdf)
    left, bottom, right, top = slot.box_pt
    assert right - left > 400 and top - bottom > 90  # room for the stamp's seven lines of 8 pt text
    words = _words(path, slot.page_index + 1)
    inside = [w for w in words if w[0] < right and w[2] > left and w[1] < top and w[3] > bottom]
    assert words and not inside, inside
    above = [w for w in words if w[1] >= top]
    assert any(w[4] == "below" for w in above)  # the caption pointing to the box is on the box's page, above it


def test_a_released_certificate_keeps_no_box():
    dossier = example_dossier()
    when = dt.datetime(2026, 12, 2, 10, 0, tzinfo=dt.UTC)
    block = signature_block("Mira Castellan", "ab" * 32, when, "Europe/Berlin", "Release of the lot")
    assert render_certificate_with_slot(dossier, block)[1] is None


def test_a_certificate_prepared_without_the_box_is_still_approved_invisibly(tmp_path, monkeypatch):
    """A certificate a night signed before the box existed: approval still works, with no stamp to draw."""
    monkeypatch.setattr(tf, "render_certificate_with_slot", lambda dossier, block: (
        render_certificate_with_slot(dossier, block)[0], None))  # prepared as before: no reserved field
    ready = tf.ready_workspace(tmp_path / "ws")
    assert "/AcroForm" not in _reader(_prepared(ready)).root or all(
        f.get_object()["/T"] != APPROVAL_FIELD for f in _reader(_prepared(ready)).root["/AcroForm"]["/Fields"])
    done = approve_lot(ready.ws, ready.store, tf.LOT, identity=ready.person("mira.castellan"), reason=REASON)
    approved = ready.ws.root / done.certificate
    assert check_certificate(approved, ready.ws, ready.store).holds
    rect = [float(v) for v in _field(_reader(approved), APPROVAL_FIELD)["/Rect"]]
    assert rect[0] == rect[2] or rect[1] == rect[3]  # an invisible signature: a box of no area
