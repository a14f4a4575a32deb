"""Hostile text in exports: path tricks, PDF markup, spreadsheet formulas, control characters,
very long values. The night completes, nothing is written outside the workspace, reports show
the text literally, and the LIMS results file holds no cell a spreadsheet would run.

Sources: formula injection through CSV cells starting with '=', '+', '-' or '@' (OWASP, "CSV
Injection"); reportlab's paragraph markup (<b>, <font>, <para>, entities with '&') is described
in the reportlab user guide, chapter "Paragraphs" (common practice to escape it).
"""

from __future__ import annotations

import csv
import datetime as dt
import io
import re
from pathlib import Path

import pytest
from badfiles import (
    LIMS_HEADER,
    MAP_HEADER,
    REGISTRY_HEADER,
    from_csv,
    map_rows,
    registry_rows,
    to_csv,
)
from pypdf import PdfReader

from flows.nightly import run_stages
from pipeline.demo import plant as demo
from pipeline.documents.lims_results import csv_cell
from pipeline.intake.layouts import load_layouts
from pipeline.intake.problems import ExportRejected
from pipeline.intake.validation import parse_export
from pipeline.night.open import open_night
from pipeline.records.workspace import write_settings
from pipeline.vocabulary import Disposition, ProblemCode

LAYOUTS = load_layouts(Path(__file__).resolve().parents[1] / "schemas")
DATE = dt.date(2026, 9, 7)  # in the past: a date after today is refused
LIPASE, PROTEASE = f"LLC-{DATE:%y%m}-001", f"PGR-{DATE:%y%m}-001"
PATH_LOTS = ["../../escape", "..\\..\\escape", "LLC/2611/901", "LLC-..-902", "/etc/passwd", "LLC-2611-903/..", "C:\\temp\\x"]
UNITS = {  # LIMS test -> a unit with markup or a formula; each differs from the specification's unit
    "PB": "<b>mg/kg</b>",
    "COLI": "<font size=40>CFU/g</font>",
    "ECOLI": "per 25 g & <para>x</para>",
    "SALM": '=HYPERLINK("http://x")',
}
ANALYSTS = ["=1+2", "+SUM(A1:A9)", "-2+3", "@cmd", "<b>K. L.</b> &amp; <font size=40>big</font>"]
LONG_ANALYST = ("<font size=40>" * 6)[:80]  # exactly the layout's 80-character limit
HOSTILE_NAME = "lims-PGR-2609-001 <b>&amp; <font size=40> =cmd <para>.csv"  # a file name cannot hold "/"
LONG_NAME = "lots-" + "<i>very-long-name<br>-" * 9 + "end.csv"
PLAIN_NUMBER = re.compile(r"[+-]?(\d+(\.\d*)?|\.\d+)([eE][+-]?\d+)?")
FORMULA_START = ("=", "+", "-", "@")


def _hostile_files() -> dict[str, bytes]:
    night = demo.build_scenario(first_night=DATE, nights=1, lipase_per_night=1, protease_per_night=1)[0]
    files = dict(night.files)
    header, rows = from_csv(files.pop(f"lims-{LIPASE}.csv"))
    files[f"lims-{LIPASE}.csv"] = to_csv(header, [[*r[:3], UNITS.get(r[1], r[3]), r[4], ANALYSTS[i % len(ANALYSTS)]]
                                                  for i, r in enumerate(rows)])
    header, rows = from_csv(files.pop(f"lims-{PROTEASE}.csv"))
    files[HOSTILE_NAME] = to_csv(header, [[*r[:2], "-0.1" if r[1] == "PB" else r[2], *r[3:5], LONG_ANALYST] for r in rows])
    header, rows = from_csv(files.pop(f"lots-{DATE:%Y%m%d}.csv"))
    files[LONG_NAME] = to_csv(header, [[*r[:4], a] for r, a in zip(rows, ["=HYPERLINK(\"x\")", "@evil"], strict=True)])
    files[f"lims-{LIPASE}-extra.csv"] = to_csv(LIMS_HEADER, [[LIPASE, "XTRA", "1.0", "u" * 440, "2026-09-07", "K"]])
    files[f"lims-{LIPASE}-ansi.csv"] = to_csv(LIMS_HEADER, [[LIPASE, "XTRB", "1.0", "", "2026-09-07", "K.\x1b[31mRed"]])
    files["lots-paths.csv"] = to_csv(REGISTRY_HEADER, [row for lot in PATH_LOTS for row in registry_rows(lot)])
    files["platemap-paths.csv"] = to_csv(MAP_HEADER, map_rows("../../plate", "LLC-2611-904"))
    files["lims-paths.csv"] = to_csv(LIMS_HEADER, [["../../../tmp/x", "PH", "7.0", "", "2026-09-07", "K"]])
    return files


@pytest.mark.parametrize("lot", PATH_LOTS)
def test_a_lot_number_with_path_parts_is_refused_by_the_layout(lot):
    with pytest.raises(ExportRejected) as info:
        parse_export("lots-x.csv", to_csv(REGISTRY_HEADER, registry_rows(lot)), LAYOUTS)
    assert info.value.codes == {ProblemCode.PATTERN}
    assert "column 'lot_id'" in info.value.report()


def test_free_text_with_markup_and_formulas_is_read_as_it_is():
    data = to_csv(LIMS_HEADER, [[LIPASE, test, "1", unit, "2026-09-07", analyst]
                                for (test, unit), analyst in zip(UNITS.items(), ANALYSTS, strict=False)])
    parsed = parse_export("lims-x.csv", data, LAYOUTS)
    assert list(parsed.frame["unit"]) == list(UNITS.values())
    assert list(parsed.frame["analyst"]) == ANALYSTS[: len(UNITS)]


def test_csv_cell_keeps_a_plain_negative_number():
    assert csv_cell("-0.1") == "-0.1"


@pytest.mark.parametrize("text", ["=1+2", "+SUM(A1)", "-2+3", "@cmd", "\t=1", "\r=1"])
def test_csv_cell_neutralises_formulas(text):
    assert csv_cell(text).startswith("'")


# ------------------------------------------------------------------------------ the night
@pytest.fixture(scope="module")
def night(tmp_path_factory):
    outer = tmp_path_factory.mktemp("hostile")
    root = outer / "workspace"
    outside = outer / "outside.csv"
    outside.write_bytes(to_csv(LIMS_HEADER, [["LLC-2611-905", "PH", "7.0", "", "2026-09-07", "K"]]))
    before = {p.name for p in outer.iterdir()}
    write_settings(root, {"plant_name": "Hostile <b>plant</b> & co (test)", "signing": {"signer_name": "Q. A. Tester"}})
    (root / "keys").mkdir()
    (root / "keys" / "use-demo-identity").touch()
    (root / "inbox").mkdir()
    files = _hostile_files()
    for name, data in files.items():
        (root / "inbox" / name).write_bytes(data)
    (root / "inbox" / "lims-link.csv").symlink_to(outside)
    ws, store, signer = open_night(root)
    summary = run_stages(ws, store, signer, orchestrated=False)
    return outer, root, before, outside, files, summary


def _pdf_text(path: Path) -> str:
    text = " ".join(page.extract_text() or "" for page in PdfReader(str(path)).pages)
    return " ".join(text.split())


@pytest.mark.slow
def test_the_night_completes_and_counts_every_file(night):
    _outer, _root, _before, _outside, files, summary = night
    assert summary.received == len(files) + 1 == summary.archived + summary.quarantined
    assert {o.lot_id for o in summary.outcomes} == {LIPASE, PROTEASE}


@pytest.mark.slow
def test_nothing_is_written_outside_the_workspace(night):
    outer, root, before, outside, _files, _summary = night
    assert {p.name for p in outer.iterdir()} == before | {"workspace"}
    assert outside.read_bytes().startswith(b"lot_id,")
    for path in root.rglob("*"):
        assert path.resolve(strict=False).is_relative_to(root.resolve()) or path.is_symlink()
        assert ".." not in path.relative_to(root).parts
    reasons = dict(night[5].quarantine_reasons)
    for name in ("lots-paths.csv", "platemap-paths.csv", "lims-paths.csv"):
        assert "does not have the expected form" in reasons[name]


@pytest.mark.slow
def test_the_batch_report_shows_hostile_units_literally(night):
    _outer, root, _before, _outside, _files, summary = night
    outcome = next(o for o in summary.outcomes if o.lot_id == LIPASE)
    assert outcome.label.startswith("held")
    text = _pdf_text(root / outcome.report)
    for unit in UNITS.values():
        assert any(f"the LIMS reports the unit '{unit}'" in reason for reason in outcome.reasons), outcome.reasons
        assert f"the LIMS reports the unit '{unit}'" in text, unit
    assert "has a length outside the allowed range" in text  # the 440-character unit: file set aside
    assert "U+001B" in text  # the escape sequence in an analyst's name: file set aside


@pytest.mark.slow
def test_hostile_file_names_appear_literally_in_the_documents(night):
    _outer, root, _before, _outside, _files, summary = night
    outcome = next(o for o in summary.outcomes if o.lot_id == PROTEASE)
    assert outcome.label == Disposition.READY_FOR_RELEASE, outcome.reasons
    report = _pdf_text(root / outcome.report)
    assert HOSTILE_NAME in report
    assert "Hostile <b>plant</b> & co (test)" in report
    assert "Hostile <b>plant</b> & co (test)" in _pdf_text(root / outcome.certificate)
    assert LONG_NAME[:120] in report.replace(" ", "") or LONG_NAME[:120] in report


@pytest.mark.slow
def test_the_lims_results_file_holds_no_formula(night):
    _outer, root, _before, _outside, _files, summary = night
    paths = [root / p for p in summary.lims_files if p.endswith(".csv")]
    assert paths
    cells = [cell for path in paths for row in csv.reader(io.StringIO(path.read_text(encoding="utf-8"))) for cell in row]
    assert any(cell.lstrip("'") == "-0.1" for cell in cells)  # the negative lead result reached the file
    for cell in cells:
        if cell.startswith(FORMULA_START):
            assert PLAIN_NUMBER.fullmatch(cell), f"cell {cell!r} would be run as a formula"
