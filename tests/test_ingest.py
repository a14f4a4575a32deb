"""Reading exports: every problem reported as line, column and expectation; nothing guessed."""

import pickle
from pathlib import Path

import pytest
from badfiles import schemas_with

from pipeline.controlled.catalog import Catalog
from pipeline.errors import SpecificationError
from pipeline.intake.assembly import assemble
from pipeline.intake.layouts import load_layouts
from pipeline.intake.problems import ExportRejected
from pipeline.intake.validation import parse_export
from pipeline.vocabulary import ProblemCode

LAYOUTS = load_layouts(Path(__file__).resolve().parents[1] / "schemas")
LIMS_HEADER = "lot_id,test_code,result,unit,tested_on,analyst\n"
GOOD_LIMS = LIMS_HEADER + "LLC-2611-001,PH,7.05,,2026-11-27,K. L.\nLLC-2611-001,PB,<0.5,mg/kg,2026-11-27,K. L.\n"


def reject(name: str, text: str | bytes) -> ExportRejected:
    data = text.encode() if isinstance(text, str) else text
    with pytest.raises(ExportRejected) as info:
        parse_export(name, data, LAYOUTS)
    return info.value


def test_good_export_is_read_as_typed_table():
    parsed = parse_export("lims-LLC-2611-001.csv", GOOD_LIMS.encode(), LAYOUTS)
    assert parsed.kind == "lims-results" and len(parsed.frame) == 2
    assert parsed.frame.loc[1, "result"] == "<0.5" and parsed.frame.loc[0, "unit"] is None


def test_decimal_comma_names_line_and_column():
    error = reject("lims-x.csv", LIMS_HEADER + 'LLC-2611-001,DM,"95,2",%,2026-11-27,K. L.\n')
    assert str(error.problems[0]).startswith("line 2, column 'result': '95,2' does not have the expected form")


def test_every_failure_is_collected_lazily():
    text = ("plate_id,plate_format,method_id,well,role,lot_id,substrate_mm,dilution_factor,nominal_mg_per_ml\n"
            "AK-1,96,LIP-PNPB,A01,sample,LLC-1,abc,1,\n"
            "AK-1,95,LIP-PNPB,Z01,sample,,1,0.5,\n")
    error = reject("platemap-AK-1.csv", text)
    found = {(p.line, p.column) for p in error.problems}
    assert found == {(2, "substrate_mm"), (3, "plate_format"), (3, "well"), (3, "dilution_factor")}
    assert "expected a dilution factor of 1 or more" in error.report()


@pytest.mark.parametrize(("name", "data", "code", "words"), [
    ("lims-a.csv", b"", ProblemCode.EMPTY, "the file is empty"),
    ("lims-a.csv", LIMS_HEADER.encode(), ProblemCode.NO_ROWS, "header but no data rows"),
    ("lims-a.csv", (LIMS_HEADER + "LLC-2611-001,PH,7.0,,2026-11-27").encode(), ProblemCode.FIELD_COUNT, "cut off"),
    ("lims-a.csv", LIMS_HEADER.replace(",", ";").encode() + b"LLC-2611-001;PH;7,0;;2026-11-27;K\n", ProblemCode.DELIMITER, "semicolons"),
    ("lims-a.csv", (LIMS_HEADER + "LLC-2611-001,PH,7.0,,2026-11-27,J. M\xfcller\n").encode("latin-1"), ProblemCode.ENCODING, "not UTF-8"),
    ("lims-a.csv", b"\x00\x01\x02binary", ProblemCode.BINARY, "binary file"),
    ("unknown-a.csv", GOOD_LIMS.encode(), ProblemCode.UNKNOWN_KIND, "known export prefix"),
    ("lims-a.txt", GOOD_LIMS.encode(), ProblemCode.EXTENSION, ".csv"),
    ("lims-a.csv", b"lot_id,test_code,result\nLLC-1,PH,7.0\n", ProblemCode.MISSING_COLUMN, "lacks"),
    ("lims-a.csv", (LIMS_HEADER + "LLC-2611-001,PH," + "9" * 600 + ",,2026-11-27,K\n").encode(), ProblemCode.LINE_TOO_LONG, "at most 512"),
])
def test_bad_files_are_rejected_with_their_reason(name, data, code, words):
    error = reject(name, data)
    assert error.problems[0].code == code
    assert words in error.report()


def test_explicit_conversions_are_recorded():
    data = b"\xef\xbb\xbf" + GOOD_LIMS.replace("\n", "\r\n").encode()
    parsed = parse_export("lims-LLC-2611-001.csv", data, LAYOUTS)
    assert len(parsed.frame) == 2
    assert any("byte-order mark" in c for c in parsed.conversions)
    assert any("CR LF" in c for c in parsed.conversions)


def test_duplicate_lot_in_registry_is_refused():
    text = ("lot_id,product_code,manufactured_on,assay_date,analyst\n"
            "LLC-2611-001,LLC-200,2026-11-25,2026-11-27,J. F.\nLLC-2611-001,LLC-200,2026-11-25,2026-11-27,J. F.\n")
    error = reject("lots-20261127.csv", text)
    assert any(p.column == "lot_id" and "more than once" in p.message for p in error.problems)


# --------------------------------------------------------------------------- layouts under schemas/
def test_a_second_layout_of_one_kind_is_refused_naming_both_files(tmp_path):
    schemas = schemas_with(tmp_path, "lims-results-edited.yaml", "lims-results", "limsnew-")
    with pytest.raises(SpecificationError, match=r"schemas/lims-results-edited\.yaml and schemas/lims-results\.yaml "
                                                 r"both describe exports of kind 'lims-results'"):
        load_layouts(schemas)


def test_two_layouts_with_one_file_prefix_are_refused_naming_both_files(tmp_path):
    schemas = schemas_with(tmp_path, "balance-weights.yaml", "balance-weights", "lims-")
    with pytest.raises(SpecificationError, match=r"schemas/balance-weights\.yaml and schemas/lims-results\.yaml "
                                                 r"both claim the files whose names start with 'lims-'"):
        load_layouts(schemas)


def test_an_export_of_a_kind_no_method_uses_is_noted_not_dropped_silently(tmp_path):
    schemas = schemas_with(tmp_path, "balance-weights.yaml", "balance-weights", "balance-")
    parsed = parse_export("balance-20261127.csv", GOOD_LIMS.encode(), load_layouts(schemas))
    assert parsed.kind == "balance-weights"
    assembly = assemble([parsed], [], Catalog(specifications={}, methods={}))
    assert assembly.notes == ["export balance-20261127.csv was read but no method uses exports of kind "
                              "'balance-weights': it is archived and not used"]
    assert assembly.lots == []


def test_problem_codes_stay_typed_across_worker_processes():
    # Verdicts come back from worker processes by pickling; the codes must stay members that code compares.
    error = reject("lims-a.csv", LIMS_HEADER.encode())
    back = pickle.loads(pickle.dumps(error))  # noqa: S301 - our own object
    assert back.codes == error.codes == {ProblemCode.NO_ROWS}
    assert all(type(code) is ProblemCode for code in back.codes)
    assert back.report() == error.report()


# --------------------------------------------------------------------------- reads per well
def _kinetic(plate: str, reads: int) -> bytes:
    rows = [f"{plate},{well},{5 * k},{0.06 + 0.0001 * k:.4f},405,30.0" for well in ("A01", "A02") for k in range(reads)]
    return ("plate_id,well,time_s,absorbance,wavelength_nm,temperature_c\n" + "\n".join(rows) + "\n").encode()


def _layouts_capped(tmp_path: Path, cap: int) -> dict:
    import yaml

    schemas = tmp_path / "schemas"
    schemas.mkdir()
    for path in (Path(__file__).resolve().parents[1] / "schemas").glob("*.yaml"):
        raw = yaml.safe_load(path.read_text(encoding="utf-8"))
        if raw["lotgate_export"]["kind"] == "kinetic-read":
            raw["lotgate_export"]["max_reads_per_well"] = cap
        (schemas / path.name).write_text(yaml.safe_dump(raw, sort_keys=False), encoding="utf-8")
    return load_layouts(schemas)


def test_the_kinetic_layout_caps_the_reads_per_well():
    assert LAYOUTS["kinetic-read"].max_reads_per_well == 10_000
    assert all(layout.max_reads_per_well is None for kind, layout in LAYOUTS.items() if kind != "kinetic-read")


def test_an_export_within_the_cap_is_read_and_one_beyond_it_is_rejected_with_the_reason(tmp_path):
    layouts = _layouts_capped(tmp_path, 40)
    parsed = parse_export("kinread-CAP-1.csv", _kinetic("CAP-1", 40), layouts)
    assert len(parsed.frame) == 80
    with pytest.raises(ExportRejected) as info:
        parse_export("kinread-CAP-2.csv", _kinetic("CAP-2", 41), layouts)
    problem, = info.value.problems
    assert problem.code is ProblemCode.TOO_MANY_READS
    # The first read beyond the cap: well A01's 41st read, the file's line 42 (the header is line 1).
    assert (problem.line, problem.column) == (42, "time_s")
    assert ("well A01 of plate CAP-2 has 41 reads (1 other well(s) too); the kinetic-read 1.2 layout allows at most "
            "40 reads per well") in info.value.report()


def test_the_shipped_cap_admits_a_read_every_10_s_for_a_day_and_no_more_than_its_figure():
    day = _kinetic("CAP-DAY", 8_640)  # a read every 10 s for 24 h (stated in the layout)
    assert len(parse_export("kinread-CAP-DAY.csv", day, LAYOUTS).frame) == 2 * 8_640
    assert len(parse_export("kinread-CAP-MAX.csv", _kinetic("CAP-MAX", 10_000), LAYOUTS).frame) == 20_000
    with pytest.raises(ExportRejected) as info:
        parse_export("kinread-CAP-OVER.csv", _kinetic("CAP-OVER", 10_001), LAYOUTS)
    assert info.value.codes == {ProblemCode.TOO_MANY_READS}
