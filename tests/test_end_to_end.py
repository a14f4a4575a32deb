"""The demo's five nights through the Prefect flow: dispositions, signatures, log, re-runs."""

import json
import shutil
import subprocess
import sys

import pytest

from flows import nightly
from pipeline.demo import plant as demo
from pipeline.records import ledger
from pipeline.records.pdf_verification import pdfsig_report, verify_pdf
from pipeline.records.store import Store
from pipeline.records.workspace import atomic_write, open_workspace, write_settings

pytestmark = pytest.mark.slow


def _prepare(root):
    write_settings(root, {"plant_name": demo.PLANT_NAME, "time_zone": demo.PLANT_TIME_ZONE,
                          "signing": {"signer_name": demo.DEMO_SIGNER}})
    (root / "keys").mkdir(parents=True, exist_ok=True)
    (root / "keys" / "use-demo-identity").touch()
    (root / "inbox").mkdir(exist_ok=True)


def _write_night(root, night):
    for name, data in night.files.items():
        atomic_write(root / "inbox" / name, data)


@pytest.fixture(scope="module")
def demo_workspace(tmp_path_factory, prefect_harness):
    root = tmp_path_factory.mktemp("demo")
    _prepare(root)
    nights = demo.build_scenario()
    summaries = []
    for night in nights:
        _write_night(root, night)
        summaries.append(nightly.nightly(str(root)))
        if night.investigations:  # as `lotgate demo` does: recorded with the demo identity
            import io

            from rich.console import Console

            from flows.investigate_cmd import demo_investigations
            demo_investigations(root, night.investigations, Console(file=io.StringIO()))
    return root, nights, summaries


def test_every_lot_gets_the_intended_disposition(demo_workspace):
    # The scenario's intentions are the demo's own design (docs/assay-rules.md: validity, verdicts).
    root, nights, summaries = demo_workspace
    for night, summary in zip(nights, summaries):
        got = {o.lot_id: o.label for o in summary.outcomes}
        # Release mode 'approval' (the default): a lot meeting every criterion waits for a person.
        assert got == {lot.lot_id: "ready for release" if lot.intended == "released" else lot.intended
                       for lot in night.lots}
    trouble = {o.lot_id: o for o in summaries[-2].outcomes}
    assert "Nelson rule 1" in trouble["LLC-2611-027"].reasons[0]
    assert any("recovered 82.5 %" in r for r in trouble["LLC-2611-029"].reasons)
    # The lot record across nights (the scenario's design): pending → ready, invalid → ready on the
    # re-assay, OOS retested without an investigation stays held, with one it is ready for release.
    labels = {(n, o.lot_id): o.label for n, summary in enumerate(summaries) for o in summary.outcomes}
    ready = "ready for release"
    assert [labels[(2, "LLC-2611-023")], labels[(3, "LLC-2611-023")]] == ["pending", ready]
    assert [labels[(3, "LLC-2611-030")], labels[(4, "LLC-2611-030")]] == ["held: invalid assay", ready]
    assert [labels[(3, "PGR-2611-017")], labels[(4, "PGR-2611-017")]] == ["held: out of specification"] * 2
    assert [labels[(3, "PGR-2611-018")], labels[(4, "PGR-2611-018")]] == ["held: out of specification", ready]
    assert [labels[(0, "PGR-2611-001")], labels[(4, "PGR-2611-001")]] == ["pending", "held: overdue"]


def test_files_are_accounted_for_and_the_malformed_export_is_quarantined(demo_workspace):
    root, nights, summaries = demo_workspace
    for night, summary in zip(nights, summaries):
        assert summary.received == len(night.files) == summary.archived + summary.quarantined
    reason = (root / "quarantine" / "lims-PGR-2611-019.csv.reason.txt").read_text()
    assert "line 2, column 'result': '95,2'" in reason
    store = Store(open_workspace(root).database_url)
    statuses = {f.file_name: f.status for f in store.files()}
    assert statuses["lims-PGR-2611-019.csv"] == "quarantined"
    assert all(len(f.sha256) == 64 for f in store.files())


def test_every_certificate_verifies_and_a_flipped_byte_fails(demo_workspace, tmp_path):
    root, nights, summaries = demo_workspace
    certificates = sorted((root / "certificates").glob("*.pdf"))
    ready = sum(o.label == "ready for release" for s in summaries for o in s.outcomes)
    assert len(certificates) == ready == sum(lot.intended == "released" for n in nights for lot in n.lots) == 47
    trust = [root / "keys" / "root-ca.pem"]
    from pypdf import PdfReader
    for path in certificates[:5] + certificates[-3:]:
        result = verify_pdf(path, trust_roots=trust)
        assert result.valid and result.trusted, result.summary
        # The night's certificate is the system's, with a truthful meaning; no person's name signs it.
        assert result.signer_name.startswith("lotgate system") and "NOT released until approved" in result.reason
        text = " ".join(" ".join(page.extract_text() for page in PdfReader(path).pages).split())
        assert demo.DEMO_SIGNER not in text
    damaged = tmp_path / "damaged.pdf"
    data = bytearray(certificates[0].read_bytes())
    data[len(data) // 3] ^= 0x01
    damaged.write_bytes(bytes(data))
    assert not verify_pdf(damaged, trust_roots=trust).valid


@pytest.mark.skipif(shutil.which("pdfsig") is None, reason="pdfsig (Debian poppler-utils) is not installed")
def test_pdfsig_accepts_every_certificate(demo_workspace):
    # An outside verifier: poppler's pdfsig must print "Signature is Valid." (TECH-NOTES: it exits 0 anyway).
    root, _, _ = demo_workspace
    for path in sorted((root / "certificates").glob("*.pdf")):
        ok, text = pdfsig_report(path)
        assert ok, text


def test_log_verifies_and_an_edited_record_is_named(demo_workspace, tmp_path):
    root, _, _ = demo_workspace
    assert ledger.verify_file(root / "decisions.jsonl").valid
    lines = (root / "decisions.jsonl").read_text().splitlines()
    decisions = [json.loads(line) for line in lines if '"kind":"decision"' in line]
    assert len(decisions) == 61
    for record in decisions:
        assert {"lot_id", "product", "disposition", "reasons", "spec_version", "input_files"} <= set(record)
        assert all(len(sha) == 64 for sha in record["input_files"].values())
    target = next(i for i, line in enumerate(lines) if "PGR-2611-017" in line and '"kind":"decision"' in line)
    record = json.loads(lines[target])
    record["disposition"] = "released"
    lines[target] = json.dumps(record)
    edited = tmp_path / "edited.jsonl"
    edited.write_text("\n".join(lines) + "\n")
    check = ledger.verify_file(edited)
    assert not check.valid and check.first_bad_seq == record["seq"]
    out = subprocess.run([sys.executable, "-m", "flows.cli", "verify", str(edited)], capture_output=True, text=True)
    assert out.returncode == 1 and f"record {record['seq']}" in out.stdout


def test_running_the_demo_again_adds_no_decision(demo_workspace):
    root, nights, _ = demo_workspace
    store = Store(open_workspace(root).database_url)
    before = len(store.decisions())
    _write_night(root, nights[-1])
    summary = nightly.nightly(str(root))
    assert len(store.decisions()) == before
    assert summary.received == summary.quarantined == len(nights[-1].files)
    assert not any(o.new for o in summary.outcomes)
    assert ledger.verify_file(root / "decisions.jsonl").valid


def test_revision_chain_original_reassay_and_a_persons_release(demo_workspace, tmp_path):
    """A lot held out of trend is re-assayed (held for a person's review), then released by a person."""
    import datetime as dt

    from flows import records_cmd
    from pipeline.night.person_decision import decide_lot
    from pipeline.records import signing
    from pipeline.records.demo_trust import create_demo_trust

    root, nights, _ = demo_workspace
    lot = "LLC-2611-027"
    reassay = demo.build_reassay(nights[-2], (lot,), dt.date(2026, 11, 29))
    _write_night(root, reassay)
    summary = nightly.nightly(str(root))
    outcome = next(o for o in summary.outcomes if o.lot_id == lot)
    # An out-of-trend hold is not settled by new results: the earlier hold awaits a person.
    assert outcome.revision == 2 and outcome.label.endswith("review required")
    assert outcome.reasons[-1].startswith("the lot's earlier decision")

    trust = create_demo_trust(root / "keys", demo.PLANT_NAME)  # Jonas Brandt: in the demo register
    p12, passphrase = trust.identity_of("jonas.brandt")
    identity = signing.load_identity(p12, passphrase_file=passphrase)
    ws = open_workspace(root)
    store = Store(ws.database_url)
    result = decide_lot(ws, store, lot, release=True, reason="re-assay valid; plate failure investigated",
                        identity=identity)
    assert result.revision == 3 and result.certificate
    rows = store.decisions(lot)
    assert [r.revision for r in rows] == [1, 2, 3]
    assert [r.record.label for r in rows] == ["held: out of trend", outcome.label, "released by Jonas Brandt (DEMO)"]
    assert rows[0].superseded_by == rows[1].id and rows[1].superseded_by == rows[2].id
    assert "new input files" in rows[1].change_note
    # The person's signature is linked to the record it signs (21 CFR 11.70).
    record = rows[2].record.to_json()
    signature = record.pop("person_signature")
    assert signing.verify_record(signature, ledger.canonical_json(record).encode())
    record["reasons"] = ["edited"]
    assert not signing.verify_record(signature, ledger.canonical_json(record).encode())
    # The re-issued certificate carries the person's signature, name and meaning.
    verification = verify_pdf(root / result.certificate, trust_roots=[trust.root_ca])
    assert verification.valid and verification.trusted
    assert verification.signer_name == "Jonas Brandt (DEMO)"
    from pypdf import PdfReader
    text = " ".join(page.extract_text() for page in PdfReader(root / result.certificate).pages)
    assert "Jonas Brandt (DEMO)" in " ".join(text.split())
    assert verification.reason.split(":")[0] in " ".join(text.split())
    # History shows all three revisions.
    import argparse
    import contextlib
    import io
    buffer = io.StringIO()
    with contextlib.redirect_stdout(buffer):
        records_cmd.cmd_history(argparse.Namespace(lot=lot, workspace=str(root)))
    shown = buffer.getvalue()
    assert "held: out of trend" in shown and "review required" in shown and "Jonas Brandt" in shown
    assert ledger.verify_file(root / "decisions.jsonl").valid


def test_lims_results_files_agree_with_each_other_and_their_manifest(demo_workspace):
    # The LIMS reads either file: the JSON (RFC 8259) and the CSV (RFC 4180) carry the same rows,
    # and each night's manifest holds their SHA-256 in the sha256sum format (common practice).
    import csv
    import hashlib

    root, _, summaries = demo_workspace
    stems = sorted(path.stem for path in (root / "lims").glob("results-*.sha256"))
    assert stems
    decided = 0
    for stem in stems:
        data = json.loads((root / "lims" / f"{stem}.json").read_text(encoding="utf-8"))
        with open(root / "lims" / f"{stem}.csv", newline="", encoding="utf-8") as handle:
            table = list(csv.DictReader(handle))
        assert [{k: "" if v is None else str(v) for k, v in row.items()} for row in data["results"]] == table
        assert {row["lot_id"] for row in table} and len(data["decisions"]) >= 1
        decided += len(data["decisions"])
        for line in (root / "lims" / f"{stem}.sha256").read_text().splitlines():
            digest, name = line.split("  ")
            assert hashlib.sha256((root / "lims" / name).read_bytes()).hexdigest() == digest
    store = Store(open_workspace(root).database_url)
    assert decided == len(store.decisions()) - len(store.unexported_decision_ids())  # each exported once


def test_approve_a_night_then_verify_both_signatures(demo_workspace, capsys):
    """Night → ready for release → lotgate approve --night N → two signatures valid in verify (and pdfsig)."""
    from flows import cli
    from pipeline.records.demo_trust import create_demo_trust

    root, _, summaries = demo_workspace
    p12, passphrase = create_demo_trust(root / "keys", demo.PLANT_NAME).identity_of("mira.castellan")
    night = summaries[0].night_id
    ready = [o.lot_id for o in summaries[0].outcomes if o.label == "ready for release"]
    assert cli.main(["approve", "--night", str(night), "--workspace", str(root), "--identity", str(p12),
                     "--passphrase-file", str(passphrase), "--reason", "night reviewed: results and assays valid"]) == 0
    approved = sorted((root / "certificates").glob("*_r2_certificate.pdf"))
    assert {p.name.split("_r2_")[0] for p in approved} >= set(ready) and ready
    capsys.readouterr()
    assert cli.main(["verify", "--workspace", str(root), *map(str, approved[:3])]) == 0
    out = capsys.readouterr().out
    assert out.count("VALID") == 3 and "Mira Castellan (DEMO) holds 'release approval'" in out
    prepared = root / "certificates" / f"{ready[0]}_r1_certificate.pdf"
    assert cli.main(["verify", "--workspace", str(root), str(prepared)]) == 1  # superseded by the approval
    if shutil.which("pdfsig"):
        ok, text = pdfsig_report(approved[0])
        assert ok and text.count("Signature is Valid.") == 2, text
