"""The LIMS results files: every exported decision's results as CSV and JSON, with a manifest (bytes out).

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

from pipeline.release.records import DecisionRecord

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


def result_rows(records: list[DecisionRecord]) -> list[dict[str, Any]]:
    """One row per result of each decision: lot, product, attribute, reported value, verdict, disposition."""
    return [{"lot_id": record.lot_id, "product_code": record.product, "attribute": result.code,
             "value": result.reported, "unit": result.unit, "verdict": result.verdict,
             "disposition": record.label, "revision": record.revision, "spec_version": record.spec_version,
             "decided_at_utc": record.decided_at_utc}
            for record in records for result in record.results]


@dataclass(frozen=True)
class LimsFiles:
    """The three files of one export: name → bytes, in the order CSV, JSON, manifest."""

    stem: str
    files: dict[str, bytes]


def lims_files(decision_ids: list[int], rows: list[dict[str, Any]], code_version: str) -> LimsFiles:
    """CSV and JSON of ``rows`` and their SHA-256 manifest, named after the first and last decision."""
    header = list(rows[0])
    buffer = io.StringIO()
    writer = csv.writer(buffer, lineterminator="\n")
    writer.writerow(header)
    for row in rows:
        writer.writerow([csv_cell(row[h]) for h in header])
    stem = f"results-{decision_ids[0]:06d}-{decision_ids[-1]:06d}"
    csv_bytes = buffer.getvalue().encode("utf-8")
    # One result per line (json's indenting encoder is pure Python, ten times slower than this).
    json_text = (f'{{"code_version": {json.dumps(code_version)}, "decisions": {json.dumps(decision_ids)}, '
                 f'"results": [\n' + ",\n".join(json.dumps(row, ensure_ascii=False) for row in rows) + "\n]}\n")
    files = {f"{stem}.csv": csv_bytes, f"{stem}.json": json_text.encode("utf-8")}
    files[f"{stem}.sha256"] = "".join(f"{hashlib.sha256(data).hexdigest()}  {name}\n"
                                      for name, data in files.items()).encode()
    return LimsFiles(stem, files)
