"""Reading one export: bytes in, a validated table or the list of every problem out.

``parse_export`` is pure (no file I/O): the flow reads the bytes, this module decides. Every
problem is stated as file, line, column and what was expected, in the analyst's words. The
only conversions made without asking are named in ``ParsedExport.conversions`` (a UTF-8
byte-order mark and Windows line ends); nothing else is guessed.
"""

from __future__ import annotations

import csv
import hashlib
import io
import warnings
from dataclasses import dataclass

import pandas as pd
import pandera.pandas as pa

from pipeline.errors import InputError
from pipeline.layouts import ExportLayout, layout_for

MAX_PROBLEMS_LISTED = 20


@dataclass(frozen=True)
class Problem:
    """One thing wrong with an export. ``line`` is the file's line number (header = 1)."""

    code: str
    message: str
    line: int | None = None
    column: str | None = None

    def __str__(self) -> str:
        where = []
        if self.line is not None:
            where.append(f"line {self.line}")
        if self.column is not None:
            where.append(f"column '{self.column}'")
        return f"{', '.join(where)}: {self.message}" if where else self.message


class ExportRejected(InputError):
    """The export cannot be used; ``problems`` lists every reason found."""

    def __init__(self, file_name: str, problems: list[Problem]):
        self.file_name = file_name
        self.problems = tuple(problems)
        shown = "; ".join(str(p) for p in problems[:MAX_PROBLEMS_LISTED])
        more = len(problems) - MAX_PROBLEMS_LISTED
        tail = f"; and {more} more" if more > 0 else ""
        super().__init__(f"{file_name}: {shown}{tail}")

    def report(self) -> str:
        lines = [f"File {self.file_name} was set aside (quarantined) and not used.", ""]
        lines += [f"- {p}" for p in self.problems]
        return "\n".join(lines) + "\n"


@dataclass(frozen=True)
class ParsedExport:
    file_name: str
    kind: str
    layout_version: str
    layout_sha256: str
    sha256: str
    frame: pd.DataFrame
    conversions: tuple[str, ...] = ()


def _printable(text: str, limit: int = 40) -> str:
    cleaned = "".join(ch if ch.isprintable() else "?" for ch in text)
    return cleaned if len(cleaned) <= limit else cleaned[: limit - 1] + "…"


def _decode(name: str, data: bytes) -> tuple[str, list[str]]:
    conversions = []
    if b"\x00" in data[:8192]:
        raise ExportRejected(name, [Problem("binary", "this is a binary file, not a comma-separated text export")])
    if data.startswith(b"\xef\xbb\xbf"):
        data = data[3:]
        conversions.append("removed a UTF-8 byte-order mark at the start of the file")
    try:
        text = data.decode("utf-8")
    except UnicodeDecodeError as exc:
        line = data[: exc.start].count(b"\n") + 1
        raise ExportRejected(
            name,
            [Problem("encoding", f"byte 0x{data[exc.start]:02X} is not UTF-8 text (the file may be in a "
                     "Windows or Latin-1 code page); export it again as UTF-8", line=line)],
        ) from None
    if "\r\n" in text:
        text = text.replace("\r\n", "\n")
        conversions.append("converted Windows line ends (CR LF) to LF")
    if "\r" in text:
        raise ExportRejected(name, [Problem("line-ends", "contains bare carriage returns (CR) inside the text")])
    return text, conversions


_CHECK_WORDS = {
    "str_matches": "does not have the expected form",
    "isin": "is not one of the allowed values",
    "in_range": "is outside the allowed range",
    "str_length": "has a length outside the allowed range",
    "not_nullable": "is empty, but a value is required",
    "field_uniqueness": "appears more than once, but must be unique",
    "coerce_dtype": "is not a valid",
    "dtype": None,  # repeats coerce_dtype
}


def _check_phrase(check: str, failure: object, hint: str | None) -> str:
    name = check.split("(", 1)[0]
    phrase = _CHECK_WORDS.get(name, f"fails the check {check}")
    if name == "coerce_dtype":
        kind = "whole number" if "int" in check else "number" if "float" in check else "value"
        phrase = f"is not a valid {kind}"
    if name == "not_nullable":
        return f"the value is empty, but one is required; expected {hint}" if hint else "the value is empty, but one is required"
    value = "an empty value" if failure is None or (isinstance(failure, float) and pd.isna(failure)) else f"'{_printable(str(failure))}'"
    expected = f"; expected {hint}" if hint else ""
    return f"{value} {phrase}{expected}"


def _schema_problems(errors: pa.errors.SchemaErrors, layout: ExportLayout, source_lines: list[int]) -> list[Problem]:
    cases = errors.failure_cases
    problems: list[Problem] = []
    seen: set[tuple[str, object]] = set()
    for row in cases.itertuples(index=False):
        check = str(row.check)
        if check == "column_in_dataframe":
            problems.append(Problem("missing-column", f"the column '{row.failure_case}' is missing from the header"))
            continue
        if check == "column_in_schema":
            problems.append(Problem("extra-column", f"the header has a column '{row.failure_case}' that this layout does not know"))
            continue
        if check.startswith("dtype(") or "TypeError" in str(row.failure_case):
            continue
        index = row.index
        key = (str(row.column), index)
        if check.startswith("coerce_dtype"):
            seen.add(key)
        elif key in seen:
            continue
        line = source_lines[int(index)] if index is not None and not pd.isna(index) else None
        problems.append(Problem(
            "value", _check_phrase(check, row.failure_case, layout.hints.get(str(row.column))),
            line=line, column=str(row.column),
        ))
    problems.sort(key=lambda p: (p.line or 0, layout.columns.index(p.column) if p.column in layout.columns else -1))
    return problems


def parse_export(file_name: str, data: bytes, layouts: dict[str, ExportLayout]) -> ParsedExport:
    """Validate one export against its layout, lazily: every failure is collected.

    Raises ExportRejected with the full list of problems when the file cannot be used.
    """
    sha256 = hashlib.sha256(data).hexdigest()
    layout = layout_for(file_name, layouts)
    if layout is None:
        known = ", ".join(f"{lay.file_prefix}… ({lay.title})" for lay in layouts.values())
        raise ExportRejected(file_name, [Problem("unknown-kind", f"the file name does not start with a known export prefix; known: {known}")])
    if not file_name.lower().endswith(".csv"):
        raise ExportRejected(file_name, [Problem("extension", "expected a .csv file")])
    if len(data) > layout.max_bytes:
        raise ExportRejected(file_name, [Problem("too-large", f"the file has {len(data):,} bytes; a {layout.kind} export may have at most {layout.max_bytes:,}")])
    text, conversions = _decode(file_name, data)
    if not text.strip():
        raise ExportRejected(file_name, [Problem("empty", "the file is empty")])
    lines = text.split("\n")
    for number, line in enumerate(lines, start=1):
        if len(line) > layout.max_line_chars:
            raise ExportRejected(file_name, [Problem("line-too-long", f"the line has {len(line):,} characters; at most {layout.max_line_chars} are allowed", line=number)])
    header_line = lines[0]
    if "," not in header_line and (";" in header_line or "\t" in header_line):
        sep = "semicolons" if ";" in header_line else "tabs"
        raise ExportRejected(file_name, [Problem("delimiter", f"the columns are separated by {sep}; this layout uses commas (and a point as decimal mark)", line=1)])
    reader = csv.reader(io.StringIO(text), strict=True)
    try:
        rows = list(reader)
    except csv.Error as exc:
        raise ExportRejected(file_name, [Problem("csv", f"the file is not well-formed CSV ({exc})", line=reader.line_num)]) from None
    header = [h.strip() for h in rows[0]]
    problems: list[Problem] = []
    missing = [c for c in layout.columns if c not in header]
    extra = [c for c in header if c not in layout.columns]
    if missing or extra or len(set(header)) != len(header):
        if missing:
            problems.append(Problem("missing-column", f"the header lacks {', '.join(repr(c) for c in missing)}", line=1))
        if extra:
            problems.append(Problem("extra-column", f"the header has unknown {', '.join(repr(_printable(c)) for c in extra)}", line=1))
        if len(set(header)) != len(header):
            problems.append(Problem("duplicate-column", "a column name appears twice in the header", line=1))
        problems.append(Problem("layout", f"expected the header {','.join(layout.columns)}"))
        raise ExportRejected(file_name, problems)
    body: list[list[str]] = []
    source_lines: list[int] = []
    for number, row in enumerate(rows[1:], start=2):
        if not row or all(not cell.strip() for cell in row):
            continue
        if len(row) != len(header):
            last = number == len(rows) and not text.endswith("\n")
            note = " (the file seems cut off: its last line is incomplete)" if last else ""
            problems.append(Problem("field-count", f"has {len(row)} fields, the header has {len(header)}{note}", line=number))
            continue
        body.append([cell.strip() for cell in row])
        source_lines.append(number)
    if not body and not problems:
        raise ExportRejected(file_name, [Problem("no-rows", "the file has a header but no data rows")])
    if len(body) > layout.max_rows:
        raise ExportRejected(file_name, [Problem("too-many-rows", f"the file has {len(body):,} data rows; a {layout.kind} export may have at most {layout.max_rows:,}")])
    frame = pd.DataFrame(body, columns=header)[list(layout.columns)]
    for column in layout.nullable:
        frame[column] = frame[column].where(frame[column] != "", None)
    frame = frame.replace({"": None})
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        try:
            validated = layout.schema.validate(frame, lazy=True)
        except pa.errors.SchemaErrors as exc:
            problems += _schema_problems(exc, layout, source_lines)
            validated = None
    if problems:
        raise ExportRejected(file_name, problems)
    assert validated is not None
    for column in validated.columns:
        if validated[column].dtype == object:
            validated[column] = validated[column].map(lambda v: v if v is None else str(v))
    return ParsedExport(
        file_name=file_name, kind=layout.kind, layout_version=layout.version,
        layout_sha256=layout.sha256, sha256=sha256, frame=validated.reset_index(drop=True),
        conversions=tuple(conversions),
    )

