"""Property-based fuzzing of ``parse_export`` for every export kind (hypothesis).

The contract: whatever the bytes, ``parse_export`` returns a ParsedExport or raises
ExportRejected listing its problems; nothing else escapes, and the last-resort code
``internal-error`` (a defect of lotgate) never appears. Valid files, including randomly built
ones, parse. Example counts are bounded so the file runs in a few seconds.
"""

from __future__ import annotations

import csv
import datetime as dt
import io
from pathlib import Path

import pytest
from badfiles import (
    ENDPOINT_HEADER,
    KINETIC_HEADER,
    LIMS_HEADER,
    MAP_HEADER,
    REGISTRY_HEADER,
    endpoint_rows,
    kinetic_rows,
    lims_rows,
    map_rows,
    registry_rows,
    to_csv,
)
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st

from pipeline.demo import plant as demo
from pipeline.intake.layouts import load_layouts
from pipeline.intake.problems import ExportRejected
from pipeline.intake.validation import ParsedExport, parse_export
from pipeline.vocabulary import ProblemCode

LAYOUTS = load_layouts(Path(__file__).resolve().parents[1] / "schemas")
TEMPLATES = {
    "lims-FUZZ.csv": to_csv(LIMS_HEADER, lims_rows("LLC-2690-001") + lims_rows("LLC-2690-002")),
    "lots-FUZZ.csv": to_csv(REGISTRY_HEADER, registry_rows("LLC-2690-001") + registry_rows("PGR-2690-001", "PGR-040")),
    "platemap-FUZZ.csv": to_csv(MAP_HEADER, map_rows("FUZZ-1", "LLC-2690-001")),
    "kinread-FUZZ.csv": to_csv(KINETIC_HEADER, kinetic_rows("FUZZ-1")),
    "protread-FUZZ.csv": to_csv(ENDPOINT_HEADER, endpoint_rows("FUZZ-1")),
}
NAMES = sorted(TEMPLATES)
FUZZ = settings(max_examples=60, deadline=None, database=None, suppress_health_check=[HealthCheck.too_slow])
NASTY_CELLS = ["", " ", "nan", "NaN", "inf", "-Infinity", "1e999", "0x1F", "1_000", "٣.٥", "０.５", "7,0", "<", "< 0.5",
               '"', '""', "\\", "=1+2", "@SUM(A1)", "-", "+", "../../x", "A00", "I01", "P24", "Q01", "2026-02-30",
               "2026-13-01", "0000-01-01", "\u00a0", "\u200b", "\ufeff", "\u202e", "\x07", "\t", "𝟘", "ß" * 600]


def _outcome(name: str, data: bytes) -> ParsedExport | ExportRejected:
    """parse_export's result or its ExportRejected; any other exception fails the test."""
    try:
        return parse_export(name, data, LAYOUTS)
    except ExportRejected as error:
        assert error.problems, "a rejection lists at least one problem"
        assert ProblemCode.INTERNAL_ERROR not in error.codes, error.report()
        assert all(p.message for p in error.problems)
        assert error.report().count("\n") >= 2
        return error


def _lines(data: bytes) -> list[bytes]:
    return data.split(b"\n")


@pytest.mark.parametrize("name", NAMES)
def test_each_template_is_valid(name):
    parsed = _outcome(name, TEMPLATES[name])
    assert isinstance(parsed, ParsedExport), parsed
    assert len(parsed.frame) == TEMPLATES[name].count(b"\n") - 1 and parsed.conversions == ()


def test_the_demo_exports_are_valid():
    for name, data in demo.build_scenario(nights=1, lipase_per_night=4, protease_per_night=2)[0].files.items():
        parsed = _outcome(name, data)
        assert isinstance(parsed, ParsedExport), parsed


@FUZZ
@given(name=st.sampled_from([*NAMES, "unknown.csv", "lims-x.txt"]), data=st.binary(max_size=2000))
def test_random_bytes(name, data):
    _outcome(name, data)


@FUZZ
@given(name=st.sampled_from(NAMES), text=st.text(max_size=600))
def test_random_text(name, text):
    _outcome(name, text.encode("utf-8", errors="surrogatepass"))


@FUZZ
@given(name=st.sampled_from(NAMES), data=st.data())
def test_random_text_after_a_valid_header(name, data):
    header = TEMPLATES[name].split(b"\n", 1)[0] + b"\n"
    body = data.draw(st.text(alphabet=st.characters(codec="utf-8"), max_size=400))
    _outcome(name, header + body.encode("utf-8"))


@FUZZ
@given(name=st.sampled_from(NAMES), data=st.data())
def test_line_mutations(name, data):
    lines = _lines(TEMPLATES[name])
    for _ in range(data.draw(st.integers(1, 4))):
        op = data.draw(st.sampled_from(["delete", "duplicate", "swap"]))
        i = data.draw(st.integers(0, len(lines) - 1))
        j = data.draw(st.integers(0, len(lines) - 1))
        if op == "delete" and len(lines) > 1:
            del lines[i]
        elif op == "duplicate":
            lines.insert(j, lines[i])
        else:
            lines[i], lines[j] = lines[j], lines[i]
    result = _outcome(name, b"\n".join(lines))
    if isinstance(result, ParsedExport):  # what is read is exactly rows of the template
        assert len(result.frame) <= len(lines)


@FUZZ
@given(name=st.sampled_from(NAMES), data=st.data())
def test_cut_at_any_offset(name, data):
    whole = TEMPLATES[name]
    cut = data.draw(st.integers(0, len(whole) - 1))
    result = _outcome(name, whole[:cut])
    if isinstance(result, ParsedExport):  # only a cut right after a line end can be whole
        assert whole[:cut].endswith(b"\n")


@FUZZ
@given(name=st.sampled_from(NAMES), data=st.data())
def test_random_cell_replacement(name, data):
    rows = list(csv.reader(io.StringIO(TEMPLATES[name].decode())))
    for _ in range(data.draw(st.integers(1, 3))):
        r = data.draw(st.integers(0, len(rows) - 1))
        c = data.draw(st.integers(0, len(rows[r]) - 1))
        rows[r][c] = data.draw(st.one_of(st.sampled_from(NASTY_CELLS), st.text(max_size=30)))
    buffer = io.StringIO()
    csv.writer(buffer, lineterminator="\n").writerows(rows)
    _outcome(name, buffer.getvalue().encode("utf-8", errors="surrogatepass"))


@FUZZ
@given(name=st.sampled_from(NAMES), data=st.data())
def test_random_unicode_inserted(name, data):
    text = TEMPLATES[name].decode()
    for _ in range(data.draw(st.integers(1, 3))):
        at = data.draw(st.integers(0, len(text)))
        text = text[:at] + data.draw(st.text(min_size=1, max_size=4)) + text[at:]
    _outcome(name, text.encode("utf-8", errors="surrogatepass"))


# ------------------------------------------------------------------------------ valid files parse
LOT = st.from_regex(r"[A-Z0-9][A-Z0-9-]{2,31}", fullmatch=True)
WELL = st.builds(lambda r, c: f"{r}{c:02d}", st.sampled_from("ABCDEFGH"), st.integers(1, 12))
DATE = st.dates(min_value=dt.date(2000, 1, 1), max_value=dt.date(2026, 11, 30))  # a later date is refused
RESULT = st.one_of(st.sampled_from(["absent", "present"]),
                   st.builds(lambda q, v: f"{q}{v}", st.sampled_from(["", "<", "< "]),
                             st.decimals(-1000, 1000, places=2, allow_nan=False).map(str)))


@FUZZ
@given(rows=st.lists(st.tuples(LOT, st.from_regex(r"[A-Z]{1,8}", fullmatch=True), RESULT,
                               st.sampled_from(["", "mg/kg", "CFU/g", "per 25 g", "%"]), DATE,
                               st.text(st.characters(codec="ascii", categories=["L", "N", "P", "Zs"]), min_size=1, max_size=80)
                               .filter(str.strip)),
                     min_size=1, max_size=20, unique_by=lambda r: (r[0], r[1])))
def test_a_random_valid_lims_export_parses(rows):
    data = to_csv(LIMS_HEADER, [[*r[:4], r[4].isoformat(), r[5]] for r in rows])
    parsed = _outcome("lims-random.csv", data)
    assert isinstance(parsed, ParsedExport), parsed.report()
    assert list(parsed.frame["lot_id"]) == [r[0] for r in rows]
    assert list(parsed.frame["result"]) == [r[2] for r in rows]


@FUZZ
@given(wells=st.lists(WELL, min_size=1, max_size=12, unique=True),
       times=st.lists(st.integers(0, 86400), min_size=1, max_size=8, unique=True),
       absorbance=st.floats(-0.5, 5.0, allow_nan=False), time_major=st.booleans())
def test_a_random_valid_kinetic_read_parses(wells, times, absorbance, time_major):
    times = sorted(times)
    pairs = [(w, t) for t in times for w in wells] if time_major else [(w, t) for w in wells for t in times]
    data = to_csv(KINETIC_HEADER, [["FUZZ-1", w, t, f"{absorbance:.4f}", 405, "30.0"] for w, t in pairs])
    parsed = _outcome("kinread-random.csv", data)
    assert isinstance(parsed, ParsedExport), parsed.report()
    assert len(parsed.frame) == len(pairs)
    assert parsed.frame["absorbance"].between(-0.5, 5.0).all()
