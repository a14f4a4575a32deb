"""Bad files lose nothing and stop nothing: the catalogue of tests/badfiles.py, file by file
and as one night next to a good night of the demo plant.

The expected reasons are lotgate's own decisions (the decision table in DEVELOPERS.md); the
facts behind some of them: a 96-well plate has rows A–H and columns 1–12, a 384-well plate
rows A–P and columns 1–24 (ANSI/SLAS 4-2004, microplate well positions); UTF-8 and its
byte-order mark EF BB BF (RFC 3629 §6); CSV records end with a line break and quoted fields
may contain line breaks and commas (RFC 4180 §2); "nan" and "inf" are IEEE 754 special values,
not measurements (common practice).
"""

from __future__ import annotations

import hashlib
import re
from pathlib import Path

import pytest
from badfiles import (
    Catalogue,
    Held,
    Noted,
    Quarantined,
    Read,
    Released,
    build_catalogue,
    lims_text,
    schemas_with,
)

from flows.nightly import run_stages
from pipeline.intake.layouts import load_layouts
from pipeline.intake.problems import ExportRejected
from pipeline.intake.validation import parse_export
from pipeline.night.open import open_night
from pipeline.records.store import Store
from pipeline.records.workspace import write_settings
from pipeline.vocabulary import Disposition, ProblemCode

LAYOUTS = load_layouts(Path(__file__).resolve().parents[1] / "schemas")
CATALOGUE: Catalogue = build_catalogue()
SINGLE = [c for c in CATALOGUE.cases if c.single_file is not None]
EXPECTATIONS = [(c, e) for c in CATALOGUE.cases for e in c.expect]


def _id(item: object) -> str:
    return re.sub(r"[^A-Za-z0-9]+", "-", getattr(item, "name", str(item))).strip("-")


def test_the_catalogue_is_large_and_names_its_outcome():
    assert len(CATALOGUE.cases) >= 30
    assert len({c.name for c in CATALOGUE.cases}) == len(CATALOGUE.cases)
    assert all(c.expect and c.decision for c in CATALOGUE.cases)


@pytest.mark.parametrize("case", SINGLE, ids=_id)
def test_parse_export_alone_rejects_the_file_with_its_code(case):
    name, data = case.single_file
    expected = case.expect[0]
    with pytest.raises(ExportRejected) as info:
        parse_export(name, data, LAYOUTS)
    error = info.value
    assert error.problems[0].code == expected.code, error.report()
    assert error.codes <= {expected.code, ProblemCode.LAYOUT}, error.report()  # the template is otherwise valid
    assert expected.phrase in error.report()
    assert error.report().startswith(f"File {name.replace(chr(27), '?')} was set aside")


@pytest.mark.parametrize(("case", "read"), [(c, e) for c, e in EXPECTATIONS if isinstance(e, Read)],
                         ids=lambda x: _id(x) if hasattr(x, "expect") else type(x).__name__)
def test_files_that_are_read_name_their_conversion(case, read):
    parsed = parse_export(read.file, case.files[read.file], LAYOUTS)
    assert len(parsed.frame) > 0
    if read.phrase is None:
        assert parsed.conversions == ()
    else:
        assert any(read.phrase in c for c in parsed.conversions), parsed.conversions


def test_a_byte_order_mark_and_windows_line_ends_give_the_same_table():
    case = next(c for c in CATALOGUE.cases if c.name == "UTF-8 byte-order mark")
    name, data = next(iter(case.files.items()))
    plain = parse_export(name, data[3:], LAYOUTS)
    converted = parse_export(name, data.replace(b"\n", b"\r\n"), LAYOUTS)
    assert plain.frame.equals(converted.frame)
    assert len(converted.conversions) == 2


# ------------------------------------------------------------------------------ the night
@pytest.fixture(scope="module")
def night(tmp_path_factory):
    root = tmp_path_factory.mktemp("badnight")
    write_settings(root, {"plant_name": "Catalogue plant (test)", "signing": {"signer_name": "Q. A. Tester"}})
    (root / "keys").mkdir()
    (root / "keys" / "use-demo-identity").touch()
    (root / "inbox").mkdir()

    def run(files: dict[str, bytes]):
        for name, data in files.items():
            (root / "inbox" / name).write_bytes(data)
        ws, store, signer = open_night(root)
        return run_stages(ws, store, signer, orchestrated=False)

    run(CATALOGUE.earlier_night)
    files = CATALOGUE.night_files()
    summary = run(files)
    store = Store(open_night(root)[0].database_url)
    return root, files, summary, {f.file_name: f for f in store.files(summary.night_id)}


def _held_or_released(summary):
    return {o.lot_id: o for o in summary.outcomes}


@pytest.mark.slow
@pytest.mark.parametrize(("case", "expected"), EXPECTATIONS, ids=lambda x: _id(x) if hasattr(x, "expect") else type(x).__name__)
def test_each_case_gets_its_stated_outcome(night, case, expected):
    root, _files, summary, records = night
    outcomes = _held_or_released(summary)
    if isinstance(expected, Quarantined):
        reasons = dict(summary.quarantine_reasons)
        assert expected.file in reasons
        assert expected.phrase in reasons[expected.file]
        assert (root / "quarantine" / expected.file).is_file()
        assert expected.phrase in (root / "quarantine" / f"{expected.file}.reason.txt").read_text(encoding="utf-8")
    elif isinstance(expected, Read):
        record = records[expected.file]
        assert record.status == "archived"
        if expected.phrase is None:
            assert not record.reason
        else:
            assert expected.phrase in record.reason
    elif isinstance(expected, Held):
        outcome = outcomes[expected.lot]
        assert outcome.label.startswith("held: ") and expected.category in outcome.label, outcome.label
        assert any(expected.phrase in reason for reason in outcome.reasons), outcome.reasons
    elif isinstance(expected, Released):
        assert outcomes[expected.lot].label == Disposition.READY_FOR_RELEASE, outcomes[expected.lot].reasons
    elif isinstance(expected, Noted):
        assert any(expected.subject in note and expected.phrase in note for note in summary.notes), summary.notes
    else:  # pragma: no cover - a new kind of expectation must be handled above
        raise AssertionError(f"unknown expectation {expected!r}")


@pytest.mark.slow
def test_the_good_lots_are_still_released(night):
    _root, _files, summary, _records = night
    outcomes = _held_or_released(summary)
    for lot in CATALOGUE.good_lots:
        assert outcomes[lot].label == Disposition.READY_FOR_RELEASE, outcomes[lot].reasons


@pytest.mark.slow
def test_every_file_is_accounted_for_and_kept(night):
    root, files, summary, records = night
    assert summary.received == len(files) == summary.archived + summary.quarantined
    assert not any((root / "inbox").iterdir())
    kept = {hashlib.sha256(p.read_bytes()).hexdigest() for folder in ("archive", "quarantine")
            for p in (root / folder).rglob("*") if p.is_file() and not p.name.endswith(".reason.txt")}
    for name, data in files.items():
        assert hashlib.sha256(data).hexdigest() in kept, f"{name!r} is nowhere in archive/ or quarantine/"
    assert len(records) == len(files)
    for name, _reason in summary.quarantine_reasons:
        assert (root / "quarantine" / f"{name}.reason.txt").is_file()


@pytest.mark.slow
def test_every_lot_mentioned_has_a_decision_or_a_stated_reason(night):
    _root, _files, summary, _records = night
    decided = {o.lot_id for o in summary.outcomes}
    for lot in sorted(CATALOGUE.mentioned_lots()):
        word = re.compile(rf"(?<![A-Za-z0-9-]){re.escape(lot)}(?![A-Za-z0-9-])")
        assert lot in decided or any(word.search(note) for note in summary.notes), f"lot {lot}: no decision, no note"
    for outcome in summary.outcomes:
        if outcome.label != Disposition.READY_FOR_RELEASE:
            assert outcome.reasons, f"lot {outcome.lot_id} is held without a reason"


@pytest.mark.slow
def test_an_export_of_a_kind_no_method_uses_is_archived_with_a_note(tmp_path, monkeypatch):
    # A person drops a new layout under schemas/ and its first export arrives before any method reads it.
    monkeypatch.setenv("LOTGATE_SCHEMAS_DIR", str(schemas_with(tmp_path, "balance-weights.yaml", "balance-weights",
                                                               "balance-")))
    root = tmp_path / "plant"
    write_settings(root, {"plant_name": "New kind plant (test)", "signing": {"signer_name": "Q. A. Tester"}})
    (root / "keys").mkdir()
    (root / "keys" / "use-demo-identity").touch()
    (root / "inbox").mkdir()
    (root / "inbox" / "balance-20261127.csv").write_text(lims_text("LLC-2611-001"), encoding="utf-8")
    summary = run_stages(*open_night(root), orchestrated=False)
    assert (summary.archived, summary.quarantined, summary.outcomes) == (1, 0, [])
    assert ("export balance-20261127.csv was read but no method uses exports of kind 'balance-weights': it is "
            "archived and not used") in summary.notes
