"""The LIMS results files: every exported decision's results as CSV and JSON, with a manifest (bytes out).

The layout is documented and versioned (docs/lims-results-layout.md, ``LAYOUT_VERSION``): every
CSV row and the JSON's header carry the layout name and version, dispositions and hold
categories are codes from a small list (pipeline.documents.lims_codes), the person who decided
has a column of their own, and units are UCUM codes in ASCII where UCUM has one.

The CSV guards every text cell against being run as a formula by a spreadsheet (a cell starting
with =, +, -, @, a tab or a carriage return gets a leading apostrophe), except plain numbers.
"""

from __future__ import annotations

import csv
import hashlib
import io
import json
import re
from dataclasses import dataclass
from typing import Any

from pipeline.documents.lims_codes import ascii_text, disposition_code, hold_codes, unit_code
from pipeline.release.records import DecisionRecord

LAYOUT_NAME = "lotgate-lims-results"
LAYOUT_VERSION = "2.0"  # docs/lims-results-layout.md; a change of columns or codes is a new version
NIGHTLY, PERSON = "NIGHTLY", "PERSON"  # who decided: the nightly job, or an authorised person (named)
COLUMNS = ("layout_version", "lot_id", "product_code", "revision", "disposition_code", "hold_codes",
           "decided_by_kind", "decided_by", "decided_at_utc", "spec_version", "attribute", "value", "reported",
           "unit", "unit_system", "verdict")

FORMULA_PREFIXES = ("=", "+", "-", "@", "\t", "\r")
_PLAIN_NUMBER = re.compile(r"-?[0-9]+(\.[0-9]+)?([eE][-+]?[0-9]+)?")


def csv_cell(value: Any) -> str:
    """Text for a CSV cell that a spreadsheet will not run as a formula."""
    if value is None:
        return ""
    if isinstance(value, float):
        return repr(value)
    text = str(value)
    if _PLAIN_NUMBER.fullmatch(text):
        return text
    return "'" + text if text.startswith(FORMULA_PREFIXES) else text


def _decision_columns(record: DecisionRecord) -> dict[str, Any]:
    person = record.decided_by is not None
    return {"layout_version": LAYOUT_VERSION, "lot_id": record.lot_id, "product_code": record.product,
            "revision": record.revision,
            "disposition_code": disposition_code(record.disposition, record.hold_categories),
            "hold_codes": "|".join(hold_codes(record.hold_categories)),
            "decided_by_kind": PERSON if person else NIGHTLY,
            "decided_by": ascii_text(record.decided_by) if record.decided_by else "",
            "decided_at_utc": record.decided_at_utc, "spec_version": record.spec_version}


def result_rows(records: list[DecisionRecord]) -> list[dict[str, Any]]:
    """One row per result of each decision, in the columns of layout ``LAYOUT_VERSION`` (``COLUMNS``)."""
    rows = []
    for record in records:
        decision = _decision_columns(record)
        for result in record.results:
            code, system = unit_code(result.unit, result.code)
            value = result.value if isinstance(result.value, int | float) else None
            rows.append({**decision, "attribute": result.code, "value": value,
                         "reported": ascii_text(result.reported) if result.reported is not None else "",
                         "unit": code, "unit_system": system, "verdict": str(result.verdict)})
    return rows


@dataclass(frozen=True)
class LimsFiles:
    """The three files of one export: name → bytes, in the order CSV, JSON, manifest."""

    stem: str
    files: dict[str, bytes]


def lims_files(decision_ids: list[int], rows: list[dict[str, Any]], code_version: str) -> LimsFiles:
    """CSV and JSON of ``rows`` and their SHA-256 manifest, named after the first and last decision."""
    header = list(COLUMNS)
    buffer = io.StringIO()
    writer = csv.writer(buffer, lineterminator="\n")
    writer.writerow(header)
    for row in rows:
        writer.writerow([csv_cell(row[h]) for h in header])
    stem = f"results-{decision_ids[0]:06d}-{decision_ids[-1]:06d}"
    csv_bytes = buffer.getvalue().encode("utf-8")
    # One result per line (json's indenting encoder is pure Python, ten times slower than this).
    json_text = (f'{{"layout": {json.dumps(LAYOUT_NAME)}, "layout_version": {json.dumps(LAYOUT_VERSION)}, '
                 f'"code_version": {json.dumps(code_version)}, "decisions": {json.dumps(decision_ids)}, '
                 f'"results": [\n' + ",\n".join(json.dumps(row, ensure_ascii=True) for row in rows) + "\n]}\n")
    files = {f"{stem}.csv": csv_bytes, f"{stem}.json": json_text.encode("utf-8")}
    files[f"{stem}.sha256"] = "".join(f"{hashlib.sha256(data).hexdigest()}  {name}\n"
                                      for name, data in files.items()).encode()
    return LimsFiles(stem, files)
