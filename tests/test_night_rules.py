"""The rules taken out of the night: plate choice, change note, decision record, LIMS rows.

Expected values are worked by hand from the rules each module states (common practice for a
lot-release record: a re-assay replaces, never adds to, the earlier export).
"""

from __future__ import annotations

import json
from types import SimpleNamespace

from pipeline.assay.plate_choice import choose_plates, plates_by_lot
from pipeline.assay.plates import ActivityPlateResult
from pipeline.assay.protein_plates import ProteinPlateResult
from pipeline.documents.lims_results import lims_files, result_rows
from pipeline.release.change_note import change_note
from pipeline.release.records import (
    CertificateFile,
    DecisionRecord,
    DocumentFile,
    EarlierDecision,
    RecordedResult,
    TrendFinding,
)

SPEC = SimpleNamespace(product_code="LLC-200", activity_method="LIP-PNPB")


def _activity(plate_id, method_id="LIP-PNPB", lots=("L-1",)):
    return ActivityPlateResult(plate_id, method_id, "1", True, (), 100.0, 0.0, {lot: None for lot in lots}, {}, {})


def _protein(plate_id, lots=("L-1",)):
    return ProteinPlateResult(plate_id, "BCA", "1", True, (), {lot: None for lot in lots}, {}, {})


def _record(**changes):
    base = DecisionRecord("L-1", "LLC-200", "released", (), (), "3.1", "a" * 64, "f" * 64, "released",
                          input_files={"a.csv": "1" * 64},
                          results=(RecordedResult("activity", 1200.4, "1200", "U/mL", "pass"),))
    return DecisionRecord(**{**vars(base), **changes})


def test_a_lot_on_one_plate_of_each_kind_takes_both():
    on_activity, on_protein = plates_by_lot([_activity("P1")], [_protein("B1")])
    choice = choose_plates("L-1", SPEC, on_activity["L-1"], on_protein["L-1"])
    assert (choice.activity.plate_id, choice.protein.plate_id, choice.problems) == ("P1", "B1", ())


def test_a_lot_on_two_activity_plates_or_another_method_gets_no_activity_plate():
    twice = choose_plates("L-1", SPEC, [_activity("P1"), _activity("P2")], [])
    assert twice.activity is None and "on 2 activity plates (P1, P2)" in twice.problems[0]
    other = choose_plates("L-1", SPEC, [_activity("P3", method_id="LIP-OTHER")], [])
    assert other.activity is None and other.problems == (
        "plate P3 uses method LIP-OTHER; LLC-200 is specified with LIP-PNPB",)


def test_the_change_note_names_files_results_and_disposition():
    after = _record(input_files={"a.csv": "2" * 64, "b.csv": "3" * 64}, label="held: out of trend",
                    results=(RecordedResult("activity", 1100.2, "1100", "U/mL", "pass"),))
    assert change_note(_record(), after) == ("new input files b.csv; changed content of a.csv; "
                                             "results changed: activity 1200 → 1100; "
                                             "disposition released → held: out of trend")
    assert change_note(_record(), _record()) == "re-evaluated with the same numbers"


def test_a_decision_record_reads_back_as_it_was_written():
    record = _record(trend=(TrendFinding("activity", "in trend", 1200.0, 5.0, 1, 8),),
                     certificate=CertificateFile("L-1_r1_certificate.pdf", "c" * 64, "QA", "2026-12-01T00:00:00+00:00",
                                                 "Release"),
                     report=DocumentFile("L-1_r1_batch-report.pdf", "d" * 64),
                     earlier_decision=EarlierDecision(1, "held: invalid assay", ("plate failed",)))
    plain = json.loads(json.dumps(record.to_json()))
    assert DecisionRecord.from_json(plain) == record
    # a nightly record carries none of a person's fields, not even as null
    nightly = _record().to_json()
    assert not {"earlier_decision", "decided_by", "meaning", "person_signature"} & set(nightly)
    assert "signer_certificate_sha256" not in plain["certificate"]


def test_lims_files_name_the_decisions_and_list_every_result():
    rows = result_rows([_record(revision=2, decided_at_utc="2026-12-01T02:00:00+00:00")])
    export = lims_files([7, 9], rows, "0.0-test")
    assert export.stem == "results-000007-000009"
    # layout 2.0 (docs/lims-results-layout.md): coded disposition, the unrounded value beside the reported text
    assert export.files["results-000007-000009.csv"].decode().splitlines() == [
        "layout_version,lot_id,product_code,revision,disposition_code,hold_codes,decided_by_kind,decided_by,"
        "decided_at_utc,spec_version,attribute,value,reported,unit,unit_system,verdict",
        "2.0,L-1,LLC-200,2,REL,,NIGHTLY,,2026-12-01T02:00:00+00:00,3.1,activity,1200.4,1200,U/mL,UCUM,pass"]
    assert json.loads(export.files["results-000007-000009.json"])["decisions"] == [7, 9]
