"""The register of authorised signers, reasons, trust settings and release modes: strict, one-line refusals.

The dates, roles and fingerprints here are invented; what they must give follows the register's
own rules (an entry holds a role from valid_from to valid_to inclusive, by the UTC day of signing)
and RFC 5280 (a certificate's SHA-256 fingerprint is 64 hexadecimal digits).
"""

from __future__ import annotations

import dataclasses
import datetime as dt

import pytest

from pipeline.controlled.catalog import Catalog
from pipeline.controlled.signer_register import CertificateFacts, authorisation, parse_register
from pipeline.errors import InputError, SpecificationError
from pipeline.night.release_modes import with_release_modes
from pipeline.records.workspace import open_workspace, write_settings
from pipeline.release.decision import decide_night
from pipeline.release.signature import (
    checked_reason,
    system_automatic_meaning,
    system_ready_meaning,
)
from pipeline.vocabulary import Disposition, ReleaseMode, SignerRole
from tests import test_drift as drift

FP = "ab" * 32


def register(**entry):
    base = {"person": "ida.reyes", "printed_name": "Ida Reyes", "certificate_sha256": FP,
            "roles": ["release approval", "rejection"], "valid_from": "2026-01-01", "valid_to": "2026-12-31"}
    return {"kind": "signer-register", "version": "7", "approved_by": "Head of Quality", "signers": [{**base, **entry}]}


def test_authorisation_by_fingerprint_role_and_dates():
    reg = parse_register(register(), "signers.yaml", "0" * 64)
    cert = CertificateFacts(FP.upper(), "CN=Ida Reyes", "CN=Root")
    noon = dt.datetime(2026, 6, 1, 12, tzinfo=dt.UTC)
    assert authorisation(reg, cert, SignerRole.RELEASE_APPROVAL, noon).allowed
    assert authorisation(reg, cert, SignerRole.RELEASE_APPROVAL, dt.datetime(2026, 12, 31, 23, 59, tzinfo=dt.UTC)).allowed
    late = authorisation(reg, cert, SignerRole.RELEASE_APPROVAL, dt.datetime(2027, 1, 1, 0, 0, 1, tzinfo=dt.UTC))
    assert not late.allowed and "only from 2026-01-01 to 2026-12-31, not on 2027-01-01" in late.reason
    role = authorisation(reg, cert, SignerRole.REBASELINE, noon)
    assert not role.allowed and "does not hold the role 're-baseline'" in role.reason
    other = authorisation(reg, CertificateFacts("cd" * 32, "CN=Ida Reyes", "CN=Root"), SignerRole.REJECTION, noon)
    assert not other.allowed and "is not in the register of authorised signers version 7" in other.reason


def test_authorisation_by_subject_and_issuer():
    raw = register(certificate_sha256=None, subject="CN=Ida Reyes,O=Harrowgate", issuer="CN=Harrowgate Root")
    del raw["signers"][0]["certificate_sha256"]
    reg = parse_register(raw, "signers.yaml", "0" * 64)
    at = dt.datetime(2026, 6, 1, tzinfo=dt.UTC)
    assert authorisation(reg, CertificateFacts(FP, "CN=Ida Reyes,O=Harrowgate", "CN=Harrowgate Root"),
                         SignerRole.REJECTION, at).allowed
    # The same subject from another issuer (a self-made CA) is someone else.
    assert not authorisation(reg, CertificateFacts(FP, "CN=Ida Reyes,O=Harrowgate", "CN=Forged Root"),
                             SignerRole.REJECTION, at).allowed


@pytest.mark.parametrize(("change", "words"), [
    ({"roles": ["release approval", "approve everything"]}, "names unknown roles ['approve everything']"),
    ({"certificate_sha256": "1234"}, "64 hexadecimal digits"),
    ({"valid_to": "2025-01-01"}, "is before valid_from"),
    ({"subject": "CN=Ida Reyes"}, "give one way of naming the certificate"),
    ({"rolez": ["rejection"]}, "unknown field 'rolez' in 'signers[1]' (did you mean 'roles'?)"),
    ({"valid_from": "first of May"}, "'signers[1].valid_from' must be a date YYYY-MM-DD"),
])
def test_a_wrong_register_is_refused_in_one_line_naming_file_and_field(change, words):
    with pytest.raises(SpecificationError) as refused:
        parse_register(register(**change), "/etc/lotgate/signers.yaml", "0" * 64)
    text = str(refused.value)
    assert text.startswith("/etc/lotgate/signers.yaml: ") and words in text and "\n" not in text


def test_the_register_needs_its_version_and_approver():
    raw = register()
    del raw["approved_by"]
    with pytest.raises(SpecificationError, match="'approved_by' is missing"):
        parse_register(raw, "signers.yaml", "0" * 64)


@pytest.mark.parametrize("reason", ["", "ok", "..........", "approved!!", "12 34 56 78", "  a  b  "])
def test_reasons_that_say_nothing(reason):
    with pytest.raises(InputError, match="says too little"):
        checked_reason(reason)


def test_reasons_that_say_something_and_the_reference_pattern():
    assert checked_reason("  re-assay   valid; plate failure investigated ") == \
        "re-assay valid; plate failure investigated"
    with pytest.raises(InputError, match=r"pattern CC-\[0-9\]\{4\}"):
        checked_reason("re-assay valid, investigation closed", r"CC-[0-9]{4}")
    assert checked_reason("re-assay valid under CC-0042", r"CC-[0-9]{4}")


def test_trust_and_release_settings_are_strict(tmp_path):
    write_settings(tmp_path, {"release": {"default_mode": "sometimes"}})
    with pytest.raises(SpecificationError, match="'release.default_mode' must be 'approval' or 'automatic'"):
        open_workspace(tmp_path)
    write_settings(tmp_path, {"release": {"reason_reference_pattern": "CC-[0-9"}})
    with pytest.raises(SpecificationError, match="is not a valid regular expression"):
        open_workspace(tmp_path)
    write_settings(tmp_path, {"trust": {"root": "ca.pem"}})
    with pytest.raises(SpecificationError, match="unknown field 'root' in 'trust'"):
        open_workspace(tmp_path)
    write_settings(tmp_path, {"trust": {"root_ca": "keys/ca.pem"}, "signer_register": "keys/s.yaml",
                              "release": {"default_mode": "automatic", "procedure": "SOP-QA-017"}})
    ws = open_workspace(tmp_path)
    assert ws.trust_root == tmp_path.resolve() / "keys" / "ca.pem" and ws.release_mode == ReleaseMode.AUTOMATIC
    assert ws.signer_register == tmp_path.resolve() / "keys" / "s.yaml" and ws.release_procedure == "SOP-QA-017"


def test_release_mode_decides_ready_for_release_or_released(tmp_path):
    """The same in-specification lot: ready for release under approval, released under automatic."""
    write_settings(tmp_path, {"release": {"default_mode": "automatic", "procedure": "SOP-QA-017"}})
    automatic = with_release_modes(Catalog({"SIM-1": drift.SPEC}, {}), open_workspace(tmp_path))
    assert automatic.specifications["SIM-1"].release_procedure == "SOP-QA-017"
    lot = [drift.evaluation(1, 205.0)]
    charts = {("SIM-1", "specific_activity"): drift.ChartState("SIM-1", "specific_activity", None)}
    by_default = decide_night(lot, Catalog({"SIM-1": drift.SPEC}, {}), charts, "test")
    assert by_default.lots[0].decision.disposition == Disposition.READY_FOR_RELEASE
    assert by_default.lots[0].decision.label == "ready for release"
    released = decide_night(lot, automatic, charts, "test")
    assert released.lots[0].decision.disposition == Disposition.RELEASED
    # A specification's own mode wins over the plant's default.
    own = dataclasses.replace(drift.SPEC, release_mode=ReleaseMode.APPROVAL)
    assert with_release_modes(Catalog({"SIM-1": own}, {}), open_workspace(tmp_path)).specifications[
        "SIM-1"].release_mode == ReleaseMode.APPROVAL


def test_automatic_release_without_a_named_procedure_is_refused(tmp_path):
    write_settings(tmp_path, {"release": {"default_mode": "automatic"}})
    with pytest.raises(SpecificationError, match="needs the plant's procedure allowing release by exception"):
        with_release_modes(Catalog({"SIM-1": drift.SPEC}, {}), open_workspace(tmp_path))


def test_the_systems_meanings_name_no_person_and_say_what_is_true():
    ready = system_ready_meaning("Harrowgate", "LLC-200", "3.1")
    assert "NOT released until approved by an authorised person" in ready and "specification LLC-200 version 3.1" in ready
    automatic = system_automatic_meaning("Harrowgate", "LLC-200", "3.1", "SOP-QA-017")
    assert "released by exception" in automatic.lower() and "SOP-QA-017" in automatic
    assert "no person reviewed" in automatic
    for meaning in (ready, automatic):
        assert " I " not in f" {meaning} " and "approve its release" not in meaning  # no first-person claim


def test_a_long_plant_name_still_makes_the_demo_trust_set(tmp_path):
    # RFC 5280 bounds a certificate's common and organisation names at 64 (ub-common-name,
    # ub-organization-name); a plant name longer than that once stopped `lotgate deploy` with a
    # traceback. The names are cut, marked with an ellipsis, and keep their DEMO mark.
    from pipeline.records import signing
    from pipeline.records.demo_trust import create_demo_trust
    from pipeline.records.signer_check import is_system_certificate

    plant = "Tarnwick Bioprocess, Plant 2 (demo) \u2014 granulation and liquid formulation site"
    trust = create_demo_trust(tmp_path / "keys", plant)
    system = signing.load_identity(trust.system_p12, passphrase_env="", passphrase_file=trust.system_passphrase)
    assert len(system.signer_name.encode("utf-8")) <= 64 and system.signer_name.endswith("\u2026")
    assert system.signer_name.startswith("lotgate system \u2014 Tarnwick Bioprocess")
    assert is_system_certificate(system.signer.signing_cert)
    p12, passphrase = trust.identity_of("mira.castellan")
    person = signing.load_identity(p12, passphrase_env="", passphrase_file=passphrase)
    assert person.signer_name == "Mira Castellan (DEMO)" and not is_system_certificate(person.signer.signing_cert)
