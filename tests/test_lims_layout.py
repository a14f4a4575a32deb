"""The LIMS results file a LIMS can import: coded dispositions, the person in a column, UCUM units.

Unit codes are checked against the unit syntax of UCUM, *The Unified Code for Units of Measure*,
Regenstrief Institute (§§ 1–12 of the specification: the grammar of terms, components,
annotations and exponents, the case-sensitive prefixes and the base and derived atoms). The
grammar below is written from the specification's syntax rules (from memory, checked against its
published examples: "mmol/L", "/s", "[pH]", "{CFU}/g", "L/mol/s"); the atom and prefix lists hold
only the symbols our units use, with their UCUM meaning noted.
"""

import csv
import io
import json
import re

import pytest

from pipeline.documents.lims_codes import (
    DISPOSITION_CODES,
    HOLD_CODES,
    UCUM_CODES,
    disposition_code,
    unit_code,
)
from pipeline.documents.lims_results import COLUMNS, LAYOUT_VERSION, lims_files, result_rows
from pipeline.release.records import DecisionRecord, RecordedResult
from pipeline.vocabulary import Disposition, HoldCategory

# UCUM, c/s symbols (from the specification's tables): prefixes that apply to metric atoms, and the atoms.
PREFIXES = {"k": 1e3, "m": 1e-3, "u": 1e-6, "n": 1e-9, "M": 1e6}
METRIC_ATOMS = {"g", "L", "l", "mol", "s", "U", "Cel", "m"}  # U: enzyme unit (umol/min), Cel: degree Celsius
OTHER_ATOMS = {"%", "[pH]", "min", "h", "d"}  # non-metric: no prefix allowed
_TOKEN = re.compile(r"\{[!-z|~]*\}|\[[A-Za-z]+\]|[0-9]+|[A-Za-z%]+|[./()+-]")


def _simple_unit(symbol: str) -> bool:
    if symbol in METRIC_ATOMS or symbol in OTHER_ATOMS:
        return True
    return any(symbol.startswith(p) and symbol[len(p):] in METRIC_ATOMS for p in PREFIXES)


def is_ucum(code: str) -> bool:
    """True if ``code`` parses as a UCUM main-term: ['/'] term; term = component {('.'|'/') component};
    component = annotatable [annotation] | annotation | factor | '(' term ')';
    annotatable = simple-unit [exponent]."""
    if not code or not code.isascii() or " " in code:
        return False
    tokens = _TOKEN.findall(code)
    if "".join(tokens) != code:
        return False
    position = 0

    def peek() -> str | None:
        return tokens[position] if position < len(tokens) else None

    def take() -> str:
        nonlocal position
        position += 1
        return tokens[position - 1]

    def component() -> bool:
        token = peek()
        if token is None:
            return False
        if token == "(":
            take()
            if not term() or peek() != ")":
                return False
            take()
            return True
        if token.startswith("{"):
            take()
            return True
        if token.isdigit():
            take()
            return True
        if token[0].isalpha() or token[0] in "%[":
            take()
            if not _simple_unit(token):
                return False
            if peek() in ("+", "-"):
                take()
                if peek() is None or not peek().isdigit():
                    return False
            if peek() is not None and peek().isdigit():
                take()
            if peek() is not None and peek().startswith("{"):
                take()
            return True
        return False

    def term() -> bool:
        if not component():
            return False
        while peek() in (".", "/"):
            take()
            if not component():
                return False
        return True

    if peek() == "/":
        take()
    return term() and position == len(tokens)


@pytest.mark.parametrize("code", ["mmol/L", "/s", "L/mol/s", "[pH]", "{CFU}/g", "U/mL", "mg/kg", "%", "1", "Cel",
                                  "umol/min", "m2", "/(25.g)"])
def test_the_checker_accepts_ucum_codes(code):
    assert is_ucum(code)


@pytest.mark.parametrize("code", ["1/(M·s)", "/M/s", "mM", "per 25 g", "CFU/g", "µmol/L", "mg/", "", "U/mL)"])
def test_the_checker_refuses_what_ucum_does_not_define(code):
    # "/M/s": M is the prefix mega, not a unit; "mM": no molar atom; "CFU": not an atom (an annotation {CFU} is)
    assert not is_ucum(code)


def test_every_ucum_code_lotgate_writes_parses():
    for certificate_unit, code in UCUM_CODES.items():
        assert is_ucum(code), (certificate_unit, code)
        assert code.isascii()


@pytest.mark.parametrize(("unit", "attribute", "expected"), [
    ("U/mL", "activity", ("U/mL", "UCUM")), ("mM", "km", ("mmol/L", "UCUM")), ("1/s", "kcat", ("/s", "UCUM")),
    ("1/(M·s)", "kcat_over_km", ("L/mol/s", "UCUM")), ("", "ph", ("[pH]", "UCUM")), ("", "ratio", ("1", "UCUM")),
    ("CFU/g", "coliforms", ("{CFU}/g", "UCUM")), ("per 25 g", "e_coli", ("per 25 g", "local")),
    ("µg/test", "other", ("ug/test", "local")),
])
def test_units_are_ucum_codes_where_ucum_has_one(unit, attribute, expected):
    assert unit_code(unit, attribute) == expected


def test_every_disposition_and_hold_category_has_its_code():
    # a new disposition or hold category without a code fails here, not in a LIMS import
    assert set(DISPOSITION_CODES) == set(Disposition) - {Disposition.HELD}
    assert set(HOLD_CODES) == set(HoldCategory)
    codes = [*DISPOSITION_CODES.values(), *(f"HLD-{c}" for c in HOLD_CODES.values())]
    assert len(set(codes)) == len(codes)
    assert all(re.fullmatch(r"[A-Z]{3}(-[A-Z]{3})?", c) for c in codes)
    assert disposition_code("held", ["incomplete", "out of specification"]) == "HLD-OOS"  # reading order
    assert disposition_code("ready for release", []) == "RFR"
    assert disposition_code("pending", []) == "PEN"


def _record(**changes) -> DecisionRecord:
    base = dict(lot_id="LLC-2611-001", product="LLC-200", disposition="held",
                hold_categories=("out of specification", "out of trend"), reasons=("low",), spec_version="3.2",
                spec_sha256="a" * 64, fingerprint="f" * 64, label="held: out of specification, out of trend",
                revision=2, decided_at_utc="2026-11-27T02:00:00+00:00",
                results=(RecordedResult("activity", 1218.636157, "1219", "U/mL", "fail"),
                         RecordedResult("kcat_over_km", 334631.8663, "3.35e+05", "1/(M·s)", "reported"),
                         RecordedResult("ph", 6.96, "7.0", "", "pass"),
                         RecordedResult("e_coli", "absent", "absent", "per 25 g", "pass")))
    return DecisionRecord(**{**base, **changes})


def test_the_file_is_ascii_coded_and_names_the_person_in_a_column():
    rejected = _record(lot_id="LLC-2611-002", disposition="rejected", hold_categories=(), label="rejected by M. Novák",
                       decided_by="Mira Novák")
    rows = result_rows([_record(), rejected])
    export = lims_files([7, 8], rows, "0.0-test")
    text = export.files["results-000007-000008.csv"].decode("utf-8")
    assert text.isascii()
    table = list(csv.DictReader(io.StringIO(text)))
    assert tuple(table[0]) == COLUMNS
    assert {r["layout_version"] for r in table} == {LAYOUT_VERSION}
    held = [r for r in table if r["lot_id"] == "LLC-2611-001"]
    assert {(r["disposition_code"], r["hold_codes"], r["decided_by_kind"], r["decided_by"]) for r in held} == {
        ("HLD-OOS", "OOS|OOT", "NIGHTLY", "")}
    person = [r for r in table if r["lot_id"] == "LLC-2611-002"]
    assert {(r["disposition_code"], r["decided_by_kind"], r["decided_by"]) for r in person} == {
        ("REJ", "PERSON", "Mira Novak")}
    assert not any("by" in r["disposition_code"] for r in table)  # no "released by …" text
    by_attribute = {r["attribute"]: r for r in held}
    assert (by_attribute["kcat_over_km"]["unit"], by_attribute["kcat_over_km"]["value"]) == ("L/mol/s", "334631.8663")
    assert (by_attribute["ph"]["unit"], by_attribute["e_coli"]["unit_system"]) == ("[pH]", "local")
    assert by_attribute["e_coli"]["value"] == ""  # a qualitative result has no numeric value
    for row in table:
        assert row["unit_system"] == "local" or is_ucum(row["unit"]), row
    document = json.loads(export.files["results-000007-000008.json"])
    assert (document["layout"], document["layout_version"]) == ("lotgate-lims-results", LAYOUT_VERSION)
    assert export.files["results-000007-000008.json"].isascii()
