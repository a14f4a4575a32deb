"""Who signs what, approval, and verification: each attack on certificates and human acts now fails safely.

No night is run: tests.trust_fixtures stores one lot ready for release with a system-signed
certificate, exactly as the night writes it. Expected outcomes come from outside the project:
pyHanko's validator and poppler's ``pdfsig`` (an independent PDF signature validator) for the PDF
checks; RFC 5280 §4.2.1.3 for key usage (digitalSignature / nonRepudiation for signing) and
§4.1.2.5 for validity periods; 21 CFR 11.50 / 11.100 / 11.200 for a signature naming its signer,
its meaning, and belonging to one person (the requirements are the standard's; the tests are ours).
"""

from __future__ import annotations

import datetime as dt
import shutil

import pytest

from flows import cli
from pipeline.errors import InputError, NotFound, SigningError
from pipeline.night.approval import approve_lot, approve_lots
from pipeline.night.person_decision import decide_lot
from pipeline.records.certificate_check import check_certificate
from pipeline.records.pdf_verification import pdfsig_report
from pipeline.records.signer_check import SYSTEM_UNIT
from tests import trust_fixtures as tf

REASON = "results, assay validity and the prepared certificate reviewed"


@pytest.fixture()
def ready(tmp_path):
    return tf.ready_workspace(tmp_path / "ws")


def _failed(verdict) -> str:
    return " | ".join(f"{c.what}: {c.found}" for c in verdict.failed())


def _approve(ready, person="mira.castellan", lot=tf.LOT):
    return approve_lot(ready.ws, ready.store, lot, identity=ready.person(person), reason=REASON)


# --------------------------------------------------------------------------- the approval flow


def test_ready_certificate_names_no_person_and_is_not_a_release(ready):
    path = ready.ws.certificates / f"{tf.LOT}_r1_certificate.pdf"
    verdict = check_certificate(path, ready.ws, ready.store)
    assert not verdict.holds
    assert "READY FOR RELEASE, NOT RELEASED" in _failed(verdict)
    assert all(c.holds for c in verdict.checks if c.what.startswith("signature"))  # the system's signature holds
    assert "system identity" in next(c.found for c in verdict.checks if "who signed" in c.what)


def test_approval_adds_a_second_signature_valid_in_pdfsig_and_verify(ready):
    done = _approve(ready)
    path = ready.ws.root / done.certificate
    assert done.revision == 2 and path.name == f"{tf.LOT}_r2_certificate.pdf"
    verdict = check_certificate(path, ready.ws, ready.store)
    assert verdict.holds, _failed(verdict)
    who = [c.found for c in verdict.checks if "who signed" in c.what]
    assert "system identity" in who[0] and "Mira Castellan (DEMO) holds 'release approval'" in who[1]
    report = pdfsig_report(path)
    if report is None:
        pytest.skip("poppler's pdfsig is not installed")
    ok, text = report
    assert ok and text.count("Signature is Valid.") == 2, text
    assert "Mira Castellan (DEMO)" in text and SYSTEM_UNIT in text
    latest = ready.store.latest_decision(tf.LOT)
    assert latest.disposition == "released" and latest.decided_by == "Mira Castellan (DEMO)"
    kinds = [e.body for e in ready.store.audit_events()]
    assert any('"lot-approved"' in b for b in kinds) and any('"signer-register-in-force"' in b for b in kinds)


def test_register_version_is_recorded_once_then_again_when_it_changes(tmp_path):
    ready = tf.ready_workspace(tmp_path / "ws", lots=("HGE-0001", "HGE-0002"))
    _approve(ready, lot="HGE-0001")
    _approve(ready, lot="HGE-0002")
    assert sum('"signer-register-in-force"' in e.body for e in ready.store.audit_events()) == 1
    text = ready.trust.register.read_text().replace("version: '1'", "version: '2'")
    ready.trust.register.write_text(text)
    ready.store.add_decisions([tf.DecisionWrite(tf.prepared_record(ready.ws, ready.system(), "HGE-0003"),
                                                tf.NIGHTLY)])
    _approve(ready, lot="HGE-0003")
    versions = [e.body for e in ready.store.audit_events() if '"signer-register-in-force"' in e.body]
    assert len(versions) == 2 and '"register_version":"2"' in versions[1].replace(" ", "")


@pytest.mark.parametrize("reason", ["ok", "!!!!!!!!!!!!", "approved", "1234 5678 90"])
def test_a_reason_that_says_nothing_is_refused_and_nothing_written(ready, reason):
    before = ready.counts()
    with pytest.raises(InputError, match="says too little"):
        approve_lot(ready.ws, ready.store, tf.LOT, identity=ready.person("mira.castellan"), reason=reason)
    with pytest.raises(InputError, match="says too little"):
        decide_lot(ready.ws, ready.store, tf.LOT, release=False, reason=reason,
                   identity=ready.person("mira.castellan"))
    assert ready.counts() == before


def test_the_plants_reference_pattern_is_required_when_set(tmp_path):
    ready = tf.ready_workspace(tmp_path / "ws", settings={"release": {"reason_reference_pattern": r"CC-[0-9]{4}"}})
    with pytest.raises(InputError, match="CC-"):
        _approve(ready)
    done = approve_lot(ready.ws, ready.store, tf.LOT, identity=ready.person("mira.castellan"),
                       reason=f"{REASON} under CC-0042")
    assert done.revision == 2


# --------------------------------------------------------------------------- who may sign


def test_the_system_identity_cannot_act_as_a_person(ready):
    before = ready.counts()
    with pytest.raises(SigningError, match="system's identity, not a person's"):
        approve_lot(ready.ws, ready.store, tf.LOT, identity=ready.system(), reason=REASON)
    with pytest.raises(SigningError, match="system's identity, not a person's"):
        decide_lot(ready.ws, ready.store, tf.LOT, release=True, reason=REASON, identity=ready.system())
    assert ready.counts() == before


def test_a_key_named_like_the_nightly_job_is_refused(ready, tmp_path):
    p12 = tf.issue(tmp_path / "nightly", tf.plant_ca(ready.trust), "lotgate (nightly job)")
    before = ready.counts()
    with pytest.raises(SigningError, match="system's identity"):
        decide_lot(ready.ws, ready.store, tf.LOT, release=True, reason=REASON, identity=tf.unlocked(p12))
    assert ready.counts() == before


def test_forged_decide_with_a_self_made_ca_is_refused_nothing_written(ready, tmp_path):
    """The issue's attack: any PKCS#12 from any CA, even with a registered person's name."""
    p12 = tf.issue(tmp_path / "forger", tf.self_made_ca(), "Mira Castellan (DEMO)")
    before = ready.counts()
    with pytest.raises(SigningError, match="trust anchor"):
        decide_lot(ready.ws, ready.store, tf.LOT, release=True, reason=REASON, identity=tf.unlocked(p12))
    with pytest.raises(SigningError, match="trust anchor"):
        approve_lot(ready.ws, ready.store, tf.LOT, identity=tf.unlocked(p12), reason=REASON)
    assert ready.counts() == before


def test_a_person_of_the_plant_ca_not_in_the_register_is_refused(ready, tmp_path):
    p12 = tf.issue(tmp_path / "visitor", tf.plant_ca(ready.trust), "Pia Ostrander")
    before = ready.counts()
    with pytest.raises(SigningError, match="is not in the register of authorised signers version 1"):
        approve_lot(ready.ws, ready.store, tf.LOT, identity=tf.unlocked(p12), reason=REASON)
    assert ready.counts() == before


def test_a_registered_person_without_the_role_is_refused(ready):
    ready.trust.register.write_text(ready.trust.register.read_text().replace(
        "  - release approval\n  - rejection\n  valid_from", "  - rejection\n  valid_from"))
    before = ready.counts()
    with pytest.raises(SigningError, match="does not hold the role 'release approval'"):
        _approve(ready, person="jonas.brandt")
    assert ready.counts() == before


@pytest.mark.parametrize("days", [(-400, -30), (30, 400)], ids=["expired", "not-yet-valid"])
def test_an_expired_or_not_yet_valid_certificate_is_refused(ready, tmp_path, days):
    now = dt.datetime.now(dt.UTC)
    p12 = tf.issue(tmp_path / "timed", tf.plant_ca(ready.trust), "Mira Castellan (DEMO)",
                   start=now + dt.timedelta(days=days[0]), end=now + dt.timedelta(days=days[1]))
    before = ready.counts()
    with pytest.raises(SigningError, match="does not hold for signing"):
        approve_lot(ready.ws, ready.store, tf.LOT, identity=tf.unlocked(p12), reason=REASON)
    assert ready.counts() == before


def test_a_register_entry_outside_its_dates_is_refused(ready):
    text = ready.trust.register.read_text()
    ready.trust.register.write_text(text.replace("valid_to: '20", "valid_to: '19").replace(
        "valid_from: '20", "valid_from: '19"))
    before = ready.counts()
    with pytest.raises(SigningError, match="is authorised in the register .* only from 19"):
        _approve(ready)
    assert ready.counts() == before


def test_a_certificate_without_signing_key_usage_is_refused(ready, tmp_path):
    p12 = tf.issue(tmp_path / "nokeyusage", tf.plant_ca(ready.trust), "Mira Castellan (DEMO)", key_usage=False)
    before = ready.counts()
    with pytest.raises(SigningError, match="does not hold for signing"):
        approve_lot(ready.ws, ready.store, tf.LOT, identity=tf.unlocked(p12), reason=REASON)
    assert ready.counts() == before


def test_approve_refuses_a_lot_not_ready_and_a_certificate_changed_on_disk(ready):
    path = ready.ws.certificates / f"{tf.LOT}_r1_certificate.pdf"
    path.write_bytes(path.read_bytes() + b"\n% appended\n")
    before = ready.counts()
    with pytest.raises(SigningError, match="not the one recorded"):
        _approve(ready)
    assert ready.counts() == before
    with pytest.raises(NotFound, match="no decision"):
        approve_lots(ready.ws, ready.store, ["NOPE-1"], identity=ready.person("mira.castellan"), reason=REASON)
    decide_lot(ready.ws, ready.store, tf.LOT, release=False, reason="prepared certificate damaged, lot rejected",
               identity=ready.person("jonas.brandt"))
    with pytest.raises(InputError, match="not ready for release"):
        _approve(ready)


# --------------------------------------------------------------------------- verification attacks


def _forge_certificate(ready, tmp_path, ca):
    """A certificate signed by a forger's 'system' identity: the system's name and marking, another CA."""
    p12 = tf.issue(tmp_path / "forged-system", ca, "lotgate system - Harrowgate", unit=SYSTEM_UNIT)
    genuine = (ready.ws.certificates / f"{tf.LOT}_r1_certificate.pdf").read_bytes()
    unsigned = genuine[:genuine.rfind(b"%%EOF") + 5]  # any PDF will do; the signature is the forger's
    return tf.raw_sign(unsigned, tf.unlocked(p12), field="QA-Release2", when=dt.datetime.now(dt.UTC))


def test_a_forged_ca_is_reported_and_verify_exits_1(ready, tmp_path):
    forged = tmp_path / "out" / f"{tf.LOT}_r1_certificate.pdf"
    forged.parent.mkdir()
    ca = tf.self_made_ca()
    forged.write_bytes(_forge_certificate(ready, tmp_path, ca))
    verdict = check_certificate(forged, ready.ws, ready.store)
    assert not verdict.holds
    assert "does not chain to the plant's configured trust anchor" in _failed(verdict)
    assert "no certificate with SHA-256" in _failed(verdict)
    # The trust root shipped beside the forged file is never used, and verify needs the issuing workspace.
    (forged.parent.parent / "keys").mkdir(exist_ok=True)
    from cryptography.hazmat.primitives import serialization
    (forged.parent.parent / "keys" / "root-ca.pem").write_bytes(ca[1].public_bytes(serialization.Encoding.PEM))
    assert cli.main(["verify", str(forged), "--workspace", str(ready.ws.root)]) == 1
    assert cli.main(["verify", str(forged)]) == 2  # no workspace named: a set-up error, never "trusted"


def test_an_expired_signer_signing_with_its_own_tool_is_reported(ready, tmp_path):
    now = dt.datetime.now(dt.UTC)
    p12 = tf.issue(tmp_path / "old", tf.plant_ca(ready.trust), "Mira Castellan (DEMO)",
                   start=now - dt.timedelta(days=400), end=now - dt.timedelta(days=30))
    genuine = (ready.ws.certificates / f"{tf.LOT}_r1_certificate.pdf").read_bytes()
    signed = ready.ws.certificates / "expired.pdf"
    signed.write_bytes(tf.raw_sign(genuine, tf.unlocked(p12), field="QA-Approval", when=now))
    verdict = check_certificate(signed, ready.ws, ready.store)
    assert not verdict.holds and "outside its validity period at the signing time" in _failed(verdict)


def test_a_signer_without_key_usage_is_reported(ready, tmp_path):
    p12 = tf.issue(tmp_path / "noku", tf.plant_ca(ready.trust), "Mira Castellan (DEMO)", key_usage=False)
    genuine = (ready.ws.certificates / f"{tf.LOT}_r1_certificate.pdf").read_bytes()
    signed = ready.ws.certificates / "noku.pdf"
    signed.write_bytes(tf.raw_sign(genuine, tf.unlocked(p12), field="QA-Approval", when=dt.datetime.now(dt.UTC)))
    verdict = check_certificate(signed, ready.ws, ready.store)
    assert not verdict.holds and "key usage" in _failed(verdict)


def test_text_painted_in_an_incremental_update_and_re_signed_is_detected(ready, tmp_path):
    """The issue's attack: 'VALID, 2 signatures, 0 broken' before; now the change after signature 1 is named."""
    _approve(ready)
    approved = ready.ws.certificates / f"{tf.LOT}_r2_certificate.pdf"
    forger = tf.issue(tmp_path / "painter", tf.self_made_ca(), "Quality Assurance")
    attacked = tf.raw_sign(tf.painted(approved.read_bytes()), tf.unlocked(forger), field="QA-Final",
                           when=dt.datetime.now(dt.UTC))
    approved.write_bytes(attacked)
    verdict = check_certificate(approved, ready.ws, ready.store)
    failed = _failed(verdict)
    assert not verdict.holds
    assert "changed after it beyond adding signatures" in failed  # pyHanko's difference analysis
    assert "does not chain to the plant's configured trust anchor" in failed
    assert "no certificate with SHA-256" in failed
    # Painted but not re-signed: bytes after the last signature.
    approved.write_bytes(tf.painted((ready.ws.certificates / f"{tf.LOT}_r1_certificate.pdf").read_bytes()))
    assert "appended after the last signature" in _failed(check_certificate(approved, ready.ws, ready.store))


def test_a_renamed_certificate_fails_on_its_record(tmp_path):
    ready = tf.ready_workspace(tmp_path / "ws", lots=("HGE-0001", "HGE-0002"))
    _approve(ready, lot="HGE-0001")
    renamed = ready.ws.certificates / "HGE-0002_r2_certificate.pdf"
    shutil.copyfile(ready.ws.certificates / "HGE-0001_r2_certificate.pdf", renamed)
    verdict = check_certificate(renamed, ready.ws, ready.store)
    assert not verdict.holds and "its content is the certificate of lot HGE-0001 revision 2 (renamed)" in _failed(verdict)


def test_the_certificate_of_a_lot_later_rejected_is_reported_superseded(ready):
    _approve(ready)
    approved = ready.ws.certificates / f"{tf.LOT}_r2_certificate.pdf"
    assert check_certificate(approved, ready.ws, ready.store).holds
    decide_lot(ready.ws, ready.store, tf.LOT, release=False, reason="customer complaint confirmed, lot recalled",
               identity=ready.person("jonas.brandt"))
    verdict = check_certificate(approved, ready.ws, ready.store)
    assert not verdict.holds and "SUPERSEDED" in _failed(verdict) and "rejected" in _failed(verdict)
    assert cli.main(["verify", str(approved), "--workspace", str(ready.ws.root)]) == 1
