"""Reading one export: bytes in, a validated table or the list of every problem out.

``parse_export`` is pure (no file I/O): the flow reads the bytes, this module decides. Every
problem is stated as file, line, column and what was expected, in the analyst's words, with a
stable ``Problem.code``. The only conversions made without asking are named in
``ParsedExport.conversions``: a UTF-8 byte-order mark removed, Windows line ends (CR LF)
converted, spaces around values removed, empty lines skipped. Nothing else is guessed: a value
that is not exactly what the layout allows makes the whole file unusable.

The checks run in three stages, so that one mistake is not reported three times:

1. the file as a whole — name, size, encoding, binary content, line ends, line length,
   control characters, delimiter, CSV quoting, header, field counts, a cut-off end;
2. every cell — numbers (``nan``, ``inf``, a decimal comma are not numbers), calendar dates,
   and the pandera schema (patterns, ranges, allowed values, uniqueness);
3. only when every cell is valid, rows against each other — wells inside the plate format,
   one format and method per plate, the fields a well's role needs, read times that increase
   within a well, an assay date not before the manufacturing date.
"""

from __future__ import annotations

import csv
import datetime as dt
import hashlib
import io
import math
import re
import sys
import unicodedata
import warnings
from collections import defaultdict
from dataclasses import dataclass
from typing import Any

import pandas as pd
import pandera.pandas as pa

from pipeline.errors import InputError
from pipeline.intake.layouts import ExportLayout, layout_for

MAX_PROBLEMS_LISTED = 20
MAX_PER_KIND = 50  # problems of one code kept per file (a broken file is not listed row by row)

DATE_PATTERN = r"^[0-9]{4}-[0-9]{2}-[0-9]{2}$"  # ASCII digits only: "２０２６" is not a year here
PLATE_GEOMETRY = {96: ("ABCDEFGH", 12), 384: ("ABCDEFGHIJKLMNOP", 24)}
ROLE_NEEDS = {  # plate-map role -> fields that must not be empty for it
    "sample": ("lot_id",),
    "kinetic": ("lot_id", "substrate_mm"),
    "reference": ("lot_id",),
    "standard": ("nominal_mg_per_ml",),
}
_FLOAT = re.compile(r"[+-]?(?:[0-9]+(?:\.[0-9]+)?|\.[0-9]+)(?:[eE][+-]?[0-9]+)?")
_INT = re.compile(r"[+-]?[0-9]+")
_DECIMAL_COMMA = re.compile(r"[+-]?[0-9]+,[0-9]+")
_MAGIC = (
    (b"PK\x03\x04", "a ZIP archive (for example an .xlsx workbook)"),
    (b"\xd0\xcf\x11\xe0", "an old-style Office document (for example an .xls workbook)"),
    (b"%PDF", "a PDF document"),
    (b"\x1f\x8b", "a gzip-compressed file"),
)
_WIDE_BOMS = (
    (b"\xff\xfe\x00\x00", "UTF-32"), (b"\x00\x00\xfe\xff", "UTF-32"),
    (b"\xff\xfe", "UTF-16"), (b"\xfe\xff", "UTF-16"),
)


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
        super().__init__(f"{_printable(file_name, 200)}: {shown}{tail}")

    def __reduce__(self) -> tuple[Any, ...]:
        # Verdicts come back from worker processes by pickling (the default would call __init__ with the message).
        return (ExportRejected, (self.file_name, list(self.problems)))

    @property
    def codes(self) -> frozenset[str]:
        return frozenset(p.code for p in self.problems)

    def report(self) -> str:
        lines = [f"File {_printable(self.file_name, 200)} was set aside (quarantined) and not used.", ""]
        lines += [f"- {p}" for p in self.problems[:MAX_PROBLEMS_LISTED * 10]]
        more = len(self.problems) - MAX_PROBLEMS_LISTED * 10
        if more > 0:
            lines.append(f"- and {more} more")
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


def _hidden_character(text: str) -> str | None:
    """The first control or invisible formatting character in ``text`` (tab included), or None."""
    for ch in text:
        category = unicodedata.category(ch)
        if category in ("Cc", "Cf", "Zl", "Zp", "Cs", "Co"):
            name = unicodedata.name(ch, "a control character")
            return f"U+{ord(ch):04X} ({name.lower()})"
    return None


def _reject(name: str, code: str, message: str, line: int | None = None) -> ExportRejected:
    return ExportRejected(name, [Problem(code, message, line=line)])


# ------------------------------------------------------------------------------ stage 1: the file
def _check_name(name: str, data: bytes, layouts: dict[str, ExportLayout]) -> ExportLayout:
    hidden = _hidden_character(name)
    if hidden is not None:
        raise _reject(name, "file-name", f"the file name contains the invisible character {hidden}; rename the file")
    layout = layout_for(name, layouts)
    if layout is None:
        known = ", ".join(f"{lay.file_prefix}… ({lay.title})" for lay in layouts.values())
        raise _reject(name, "unknown-kind", f"the file name does not start with a known export prefix; known: {known}")
    if not name.lower().endswith(".csv"):
        raise _reject(name, "extension", f"expected a .csv file (a comma-separated text export); received '{_printable(name, 80)}'")
    if len(data) > layout.max_bytes:
        raise _reject(name, "too-large", f"the file has {len(data):,} bytes; a {layout.kind} export may have at most {layout.max_bytes:,}")
    return layout


def _decode(name: str, data: bytes) -> tuple[str, list[str]]:
    conversions = []
    for magic, what in _MAGIC:
        if data.startswith(magic):
            raise _reject(name, "binary", f"this is a binary file, {what}, not a comma-separated text export")
    for bom, encoding in _WIDE_BOMS:
        if data.startswith(bom):
            raise _reject(name, "encoding", f"the file is {encoding} text, not UTF-8; export it again as UTF-8")
    if b"\x00" in data:
        line = data[: data.index(b"\x00")].count(b"\n") + 1
        raise _reject(name, "binary", "this is a binary file (it contains NUL bytes), not a comma-separated text export", line)
    if data.startswith(b"\xef\xbb\xbf"):
        data = data[3:]
        conversions.append("removed a UTF-8 byte-order mark at the start of the file")
    try:
        text = data.decode("utf-8")
    except UnicodeDecodeError as exc:
        line = data[: exc.start].count(b"\n") + 1
        raise _reject(name, "encoding", f"byte 0x{data[exc.start]:02X} is not UTF-8 text (the file may be in a "
                      "Windows or Latin-1 code page); export it again as UTF-8", line) from None
    if "\r\n" in text:
        text = text.replace("\r\n", "\n")
        conversions.append("converted Windows line ends (CR LF) to LF")
    if "\r" in text:
        line = text[: text.index("\r")].count("\n") + 1
        raise _reject(name, "line-ends", "contains bare carriage returns (CR) inside the text; lines must end with LF or CR LF", line)
    return text, conversions


def _check_lines(name: str, text: str, layout: ExportLayout) -> None:
    lines = text.split("\n")
    long = [Problem("line-too-long", f"the line has {len(line):,} characters; at most {layout.max_line_chars} are allowed",
                    line=number) for number, line in enumerate(lines, start=1) if len(line) > layout.max_line_chars]
    if long:
        raise ExportRejected(name, long[:MAX_PER_KIND])
    header = lines[0]
    if "," not in header and len(layout.columns) > 1:
        found = [word for sep, word in ((";", "semicolons"), ("\t", "tabs"), ("|", "vertical bars")) if sep in header]
        how = f"the columns are separated by {found[0]}" if found else "the header line has no commas"
        decimal = " (a decimal comma is not read either)" if found and found[0] == "semicolons" and _has_decimal_comma(lines[1:]) else ""
        raise _reject(name, "delimiter", f"{how}; this layout uses commas between columns and a point as decimal mark{decimal}", 1)


def _has_decimal_comma(lines: list[str]) -> bool:
    return any(_DECIMAL_COMMA.fullmatch(cell.strip()) for line in lines[:50] for cell in line.split(";"))


@dataclass
class _Rows:
    header: list[str]
    body: list[list[str]]
    lines: list[int]  # the file line each body row starts on
    problems: list[Problem]
    conversions: list[str]


def _read_rows(name: str, text: str, layout: ExportLayout) -> _Rows:
    reader = csv.reader(io.StringIO(text, newline="\n"), strict=True)
    rows: list[tuple[int, list[str]]] = []
    spanning: list[int] = []
    end = 0
    try:
        if '"' not in text:  # no quoted field, so one row per line (the fast path of large reads)
            rows = list(enumerate(reader, start=1))
        else:
            for row in reader:
                if reader.line_num > end + 1:
                    spanning.append(len(rows))
                rows.append((end + 1, row))
                end = reader.line_num
    except csv.Error as exc:
        raise _reject(name, "csv", f"the file is not well-formed CSV ({exc}); check the quotes on this line", reader.line_num) from None
    problems = _hidden_problems(rows, spanning, text)
    if problems:
        raise ExportRejected(name, problems[:MAX_PER_KIND])
    raw_header = rows[0][1]
    header = [h.strip() for h in raw_header]
    missing = [c for c in layout.columns if c not in header]
    extra = [c for c in header if c not in layout.columns]
    twice = sorted({c for c in header if header.count(c) > 1})
    if missing or extra or twice:
        if missing:
            problems.append(Problem("missing-column", f"the header lacks {', '.join(repr(c) for c in missing)}", line=1))
        if extra:
            problems.append(Problem("extra-column", f"the header has unknown {', '.join(repr(_printable(c)) for c in extra)}", line=1))
        if twice:
            problems.append(Problem("duplicate-column", f"the header names {', '.join(repr(c) for c in twice)} more than once", line=1))
        problems.append(Problem("layout", f"expected the header {','.join(layout.columns)}"))
        raise ExportRejected(name, problems)
    padded: list[tuple[int, str]] = [(1, h) for h, r in zip(header, raw_header, strict=True) if h != r]
    body: list[list[str]] = []
    lines: list[int] = []
    skipped: list[int] = []
    spaced = any(ch.isspace() and ch != "\n" for ch in set(text))  # else nothing to strip (most reads)
    for start, row in rows[1:]:
        cells = [cell.strip() for cell in row] if spaced else row
        if not any(cells):
            skipped.append(start)
            continue
        if len(row) != len(header):
            last = start == rows[-1][0] and not text.endswith("\n")
            note = " (the file seems cut off: its last line is incomplete)" if last else ""
            problems.append(Problem("field-count", f"has {len(row)} fields, the header has {len(header)}{note}", line=start))
            continue
        if cells != row:
            padded += [(start, h) for h, cell, raw in zip(header, cells, row, strict=True) if cell != raw]
        body.append(cells)
        lines.append(start)
    if body and not problems and not text.endswith("\n"):
        problems.append(Problem("no-final-line-end", "the last line has no line end, so the file may have been cut off "
                                "inside this line's last value; export it again", line=rows[-1][0]))
    conversions: list[str] = []
    if padded:
        conversions.append(f"removed spaces around {len(padded)} value(s) (first: line {padded[0][0]}, "
                           f"column '{padded[0][1]}')")
    if skipped:
        conversions.append(f"skipped {len(skipped)} empty line(s) (first: line {skipped[0]})")
    return _Rows(header, body, lines, problems, conversions)


def _hidden_problems(rows: list[tuple[int, list[str]]], spanning: list[int], text: str) -> list[Problem]:
    """Values running over several lines, and control or invisible characters, cell by cell."""
    problems: list[Problem] = []
    names = [h.strip() for h in rows[0][1]] if rows else []
    for position in spanning:
        start, row = rows[position]
        column = next((i for i, cell in enumerate(row) if "\n" in cell), None)
        label = names[column] if position > 0 and column is not None and column < len(names) else None
        problems.append(Problem("embedded-newline", "a quoted value runs over more than one line; "
                                "each row of an export must be on one line", line=start, column=label))
    if not any(_hidden_character(ch) for ch in set(text) if ch != "\n"):
        return problems
    skip = set(spanning)
    for position, (start, row) in enumerate(rows):
        if position in skip:
            continue
        for column, cell in enumerate(row):
            hidden = _hidden_character(cell)
            if hidden is not None:
                label = names[column] if position > 0 and column < len(names) else None
                problems.append(Problem("control-character", f"the value contains the invisible character {hidden}; "
                                        "only printable text is allowed", line=start, column=label))
    return problems


# ------------------------------------------------------------------------------ stage 2: every cell
_CHECK_WORDS = {
    "str_matches": ("pattern", "does not have the expected form"),
    "isin": ("not-allowed", "is not one of the allowed values"),
    "in_range": ("out-of-range", "is outside the allowed range"),
    "str_length": ("length", "has a length outside the allowed range"),
    "not_nullable": ("missing-value", "is empty, but a value is required"),
    "field_uniqueness": ("duplicate-value", "appears more than once, but must be unique"),
    "coerce_dtype": ("not-a-number", "is not a valid value"),
}
_DUPLICATE_CODES = {
    ("plate_id", "well"): ("duplicate-well", "well {well} of plate {plate_id}"),
    ("plate_id", "well", "time_s"): ("repeated-time", "the read of well {well} of plate {plate_id} at {time_s} s"),
    ("lot_id", "test_code"): ("duplicate-test", "LIMS test {test_code} of lot {lot_id}"),
}


def _expected(layout: ExportLayout, column: str) -> str:
    hint = layout.hints.get(column)
    return f"; expected {hint}" if hint else ""


def _number_problems(frame: pd.DataFrame, layout: ExportLayout, lines: list[int]) -> tuple[list[Problem], set[tuple[str, int]]]:
    """Numeric columns: only plain decimal numbers; ``nan``, ``inf``, ``1,5`` and ``0x1`` are not."""
    problems: list[Problem] = []
    seen: set[tuple[str, int]] = set()
    for column, spec in layout.schema.columns.items():
        dtype = str(spec.dtype)
        if dtype not in ("float64", "int64"):
            continue
        whole = dtype == "int64"
        pattern = _INT if whole else _FLOAT
        values = frame[column].dropna().astype(str)
        distinct = pd.unique(values.to_numpy())  # reads repeat their times, wavelength and temperature
        good = {v for v in distinct if pattern.fullmatch(v) is not None and math.isfinite(float(v))}
        bad = values.index[~values.isin(good).to_numpy()]
        for index in bad:
            value = str(values.at[index])
            why = f"'{_printable(value)}' is not a {'whole number' if whole else 'number'}"
            if _DECIMAL_COMMA.fullmatch(value):
                why += " (it has a decimal comma; a point is the decimal mark)"
            elif pattern.fullmatch(value):
                why += " (it is too large)"
            problems.append(Problem("not-a-number", why + _expected(layout, column), line=lines[int(index)], column=column))
            seen.add((column, int(index)))
    return problems, seen


def _date_columns(layout: ExportLayout) -> list[str]:
    return [name for name, spec in layout.schema.columns.items()
            if any(check.name == "str_matches" and (check.statistics or {}).get("pattern") == DATE_PATTERN
                   for check in spec.checks)]


def _date_problems(frame: pd.DataFrame, layout: ExportLayout, lines: list[int]) -> tuple[list[Problem], set[tuple[str, int]]]:
    """Date columns: the pattern says YYYY-MM-DD; the calendar says whether such a day exists."""
    problems: list[Problem] = []
    seen: set[tuple[str, int]] = set()
    for column in _date_columns(layout):
        for index, value in enumerate(frame[column]):
            if value is None or re.fullmatch(DATE_PATTERN, value) is None:
                continue
            try:
                dt.date.fromisoformat(value)
            except ValueError:
                problems.append(Problem("date", f"'{value}' is not a calendar date{_expected(layout, column)}",
                                        line=lines[index], column=column))
                seen.add((column, index))
    return problems, seen


def _normal(value: object) -> object:
    if isinstance(value, str) and _FLOAT.fullmatch(value):
        return float(value)
    return value


def _duplicate_problems(frame: pd.DataFrame, indices: set[int], layout: ExportLayout, lines: list[int]) -> list[Problem]:
    keys = tuple(layout.schema.unique or ())
    code, phrase = _DUPLICATE_CODES.get(keys, ("duplicate-key", " ".join(f"{k} {{{k}}}" for k in keys)))
    groups: dict[tuple[object, ...], list[int]] = defaultdict(list)
    for index in sorted(indices):
        groups[tuple(_normal(frame.at[index, k]) for k in keys)].append(index)
    problems = []
    for members in groups.values():
        if len(members) < 2:
            continue
        values = {k: _printable(str(frame.at[members[0], k])) for k in keys}
        what = phrase.format(**values)
        at = ", ".join(str(lines[i]) for i in members)
        problems.append(Problem(code, f"{what} appears more than once (lines {at}); each may appear only once",
                                line=lines[members[1]]))
    return problems


def _schema_problems(errors: pa.errors.SchemaErrors, frame: pd.DataFrame, layout: ExportLayout,
                     lines: list[int], reported: set[tuple[str, int]]) -> list[Problem]:
    problems: list[Problem] = []
    seen = set(reported)
    duplicate_rows: set[int] = set()
    for row in errors.failure_cases.itertuples(index=False):
        check = str(row.check)
        name = check.split("(", 1)[0]
        index = None if row.index is None or pd.isna(row.index) else int(row.index)
        if name == "multiple_fields_uniqueness":
            if index is not None:
                duplicate_rows.add(index)
            continue
        if name == "dtype" or "TypeError" in str(row.failure_case):
            continue
        column = str(row.column)
        if index is not None and (column, index) in seen:
            continue
        if index is not None:
            seen.add((column, index))
        code, phrase = _CHECK_WORDS.get(name, ("value", f"fails the check {check}"))
        raw = frame.at[index, column] if index is not None and column in frame.columns else row.failure_case
        value = "the value" if raw is None or (isinstance(raw, float) and pd.isna(raw)) else f"'{_printable(str(raw))}'"
        message = ("the value is empty, but one is required" if name == "not_nullable" else f"{value} {phrase}")
        problems.append(Problem(code, message + _expected(layout, column),
                                line=lines[index] if index is not None else None, column=column))
    if duplicate_rows:
        problems += _duplicate_problems(frame, duplicate_rows, layout, lines)
    return problems


# ------------------------------------------------------------------------------ stage 3: rows together
def _plate_problems(frame: pd.DataFrame, lines: list[int]) -> list[Problem]:
    """Plate maps: each well inside the plate's format; one format and method per plate; role fields."""
    problems: list[Problem] = []
    for index, row in enumerate(frame.itertuples(index=False)):
        rows, columns = PLATE_GEOMETRY[int(row.plate_format)]
        well = str(row.well)
        if well[0] not in rows or int(well[1:]) > columns:
            problems.append(Problem("well-outside-plate", f"well {well} is outside a {int(row.plate_format)}-well plate "
                                    f"(rows {rows[0]}–{rows[-1]}, columns 01–{columns})", line=lines[index], column="well"))
        for needed in ROLE_NEEDS.get(str(row.role), ()):
            value = getattr(row, needed)
            if value is None or (isinstance(value, float) and math.isnan(value)):
                problems.append(Problem("role-fields", f"a '{row.role}' well needs a value in '{needed}'; well {well} has none",
                                        line=lines[index], column=needed))
    for column in ("plate_format", "method_id"):
        for plate_id, values in frame.groupby("plate_id", sort=True)[column]:
            distinct = sorted({str(v) for v in values})
            if len(distinct) > 1:
                first = lines[int(values.index[(values.astype(str) != str(values.iloc[0])).argmax()])]
                problems.append(Problem("plate-inconsistent", f"plate {plate_id} is given with more than one {column} "
                                        f"({', '.join(distinct)}); a plate has one", line=first, column=column))
    return problems


def _time_problems(frame: pd.DataFrame, lines: list[int]) -> list[Problem]:
    """Kinetic reads: within each well, read times increase from one row to the next."""
    previous = frame.groupby(["plate_id", "well"], sort=False)["time_s"].shift()
    back = frame.index[(frame["time_s"] < previous).to_numpy()]
    problems: list[Problem] = []
    flagged: set[tuple[str, str]] = set()
    for index in back:
        plate_id, well = str(frame.at[index, "plate_id"]), str(frame.at[index, "well"])
        if (plate_id, well) in flagged:
            continue
        flagged.add((plate_id, well))
        problems.append(Problem("time-order", f"well {well} of plate {plate_id}: the read at {frame.at[index, 'time_s']:g} s "
                                f"comes after a read at {previous.at[index]:g} s; read times must increase within a well",
                                line=lines[int(index)], column="time_s"))
    return problems


def _registry_problems(frame: pd.DataFrame, lines: list[int]) -> list[Problem]:
    """Lot registry: a lot cannot be assayed before it was manufactured."""
    problems = []
    for index, (lot, made, assayed) in enumerate(zip(frame["lot_id"], frame["manufactured_on"], frame["assay_date"], strict=True)):
        if dt.date.fromisoformat(assayed) < dt.date.fromisoformat(made):
            problems.append(Problem("date-order", f"lot {lot}: the assay date {assayed} is before the manufacturing date {made}",
                                    line=lines[index], column="assay_date"))
    return problems


def _row_problems(frame: pd.DataFrame, columns: set[str], lines: list[int]) -> list[Problem]:
    problems: list[Problem] = []
    if {"plate_id", "plate_format", "well", "role"} <= columns:
        problems += _plate_problems(frame, lines)
    if {"plate_id", "well", "time_s"} <= columns:
        problems += _time_problems(frame, lines)
    if {"lot_id", "manufactured_on", "assay_date"} <= columns:
        problems += _registry_problems(frame, lines)
    return problems


# ------------------------------------------------------------------------------ the whole
def _sorted(problems: list[Problem], layout: ExportLayout) -> list[Problem]:
    order = {c: i for i, c in enumerate(layout.columns)}
    problems = sorted(problems, key=lambda p: (p.line or 0, order.get(p.column or "", -1)))
    kept: list[Problem] = []
    count: dict[str, int] = defaultdict(int)
    for problem in problems:
        count[problem.code] += 1
        if count[problem.code] <= MAX_PER_KIND:
            kept.append(problem)
    dropped = sum(max(0, n - MAX_PER_KIND) for n in count.values())
    if dropped:
        kept.append(Problem("more", f"{dropped} further problem(s) of the same kinds are not listed"))
    return kept


@dataclass
class _Prepared:
    """A file read and cell-checked, waiting for its layout's schema validation."""

    file_name: str
    sha256: str
    layout: ExportLayout
    conversions: list[str]
    lines: list[int]
    frame: pd.DataFrame
    checked: pd.DataFrame
    seen: set[tuple[str, int]]


def _prepare(file_name: str, data: bytes, layouts: dict[str, ExportLayout]) -> _Prepared:
    """Stages 1 and 2 of a file: the whole file, then every cell (raises ExportRejected)."""
    sha256 = hashlib.sha256(data).hexdigest()
    layout = _check_name(file_name, data, layouts)
    text, conversions = _decode(file_name, data)
    if not text.strip():
        raise _reject(file_name, "empty", "the file is empty")
    _check_lines(file_name, text, layout)
    rows = _read_rows(file_name, text, layout)
    conversions += rows.conversions
    problems = list(rows.problems)
    if not rows.body and not problems:
        raise _reject(file_name, "no-rows", "the file has a header but no data rows")
    if len(rows.body) > layout.max_rows:
        raise _reject(file_name, "too-many-rows", f"the file has {len(rows.body):,} data rows; a {layout.kind} export "
                      f"may have at most {layout.max_rows:,}")
    if problems:
        raise ExportRejected(file_name, _sorted(problems, layout))
    frame = pd.DataFrame(rows.body, columns=rows.header)[list(layout.columns)]
    frame = frame.astype(object).where(frame != "", None)
    numbers, seen_numbers = _number_problems(frame, layout, rows.lines)
    dates, seen_dates = _date_problems(frame, layout, rows.lines)
    if numbers or dates:
        checked = frame.copy()
        for column, index in seen_numbers:  # reported already; emptied so that the rest of the column is checked
            checked.at[index, column] = None
        problems = numbers + dates
        with warnings.catch_warnings():
            warnings.simplefilter("ignore")
            try:
                layout.schema.validate(checked, lazy=True)
            except pa.errors.SchemaErrors as exc:
                problems += _schema_problems(exc, frame, layout, rows.lines, seen_numbers | seen_dates)
        raise ExportRejected(file_name, _sorted(problems, layout))
    return _Prepared(file_name, sha256, layout, conversions, rows.lines, frame, frame, seen_numbers | seen_dates)


def _finish(prepared: _Prepared, validated: pd.DataFrame | None, errors: pa.errors.SchemaErrors | None) -> ParsedExport:
    """Stage 3 of a file: its schema verdict, then rows against each other (raises ExportRejected)."""
    layout = prepared.layout
    problems: list[Problem] = []
    if errors is not None:
        problems += _schema_problems(errors, prepared.frame, layout, prepared.lines, prepared.seen)
        if not problems:
            problems.append(Problem("value", "the values do not match the layout"))
        raise ExportRejected(prepared.file_name, _sorted(problems, layout))
    assert validated is not None
    validated = validated.reset_index(drop=True)
    problems = _row_problems(validated, set(layout.columns), prepared.lines)
    if problems:
        raise ExportRejected(prepared.file_name, _sorted(problems, layout))
    for column in validated.columns:
        if validated[column].dtype == object:
            # One shared string per distinct value: a kinetic read repeats each plate and well name
            # hundreds of times, and a large night holds thousands of reads.
            validated[column] = validated[column].map(lambda v: v if v is None else sys.intern(str(v)))
    return ParsedExport(
        file_name=prepared.file_name, kind=layout.kind, layout_version=layout.version,
        layout_sha256=layout.sha256, sha256=prepared.sha256, frame=validated,
        conversions=tuple(prepared.conversions),
    )


def _validate_one(prepared: _Prepared) -> ParsedExport:
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        try:
            validated = prepared.layout.schema.validate(prepared.checked, lazy=True)
        except pa.errors.SchemaErrors as exc:
            return _finish(prepared, None, exc)
    return _finish(prepared, validated, None)


def _parse(file_name: str, data: bytes, layouts: dict[str, ExportLayout]) -> ParsedExport:
    return _validate_one(_prepare(file_name, data, layouts))


def _guarded(file_name: str, call: Any) -> Any:
    try:
        return call()
    except ExportRejected as exc:
        return exc
    except Exception as exc:  # noqa: BLE001 - the contract: a bad file never stops the night
        rejected = _reject(file_name, "internal-error", f"lotgate could not read this file ({type(exc).__name__}: "
                           f"{_printable(str(exc), 120)}); this is a defect of lotgate, please report it")
        rejected.__cause__ = exc
        return rejected


def parse_exports(files: list[tuple[str, bytes]], layouts: dict[str, ExportLayout]) -> list[ParsedExport | ExportRejected]:
    """``parse_export`` for many files at once, with the same verdict for each file.

    The schema check, pandera's fixed cost per call, runs once per layout over all files of
    that kind stacked together; only when that finds a problem are that kind's files checked
    one by one, so every problem is still attributed to its file, line and column.
    """
    results: list[ParsedExport | ExportRejected | _Prepared] = [
        _guarded(name, lambda name=name, data=data: _prepare(name, data, layouts)) for name, data in files]
    by_kind: dict[str, list[int]] = {}
    for index, item in enumerate(results):
        if isinstance(item, _Prepared):
            by_kind.setdefault(item.layout.kind, []).append(index)
    for indices in by_kind.values():
        group = [results[i] for i in indices]
        assert all(isinstance(p, _Prepared) for p in group)
        stacked = pd.concat([p.checked for p in group], keys=range(len(group)))  # type: ignore[union-attr]
        with warnings.catch_warnings():
            warnings.simplefilter("ignore")
            try:
                validated = group[0].layout.schema.validate(stacked, lazy=True)  # type: ignore[union-attr]
            except pa.errors.SchemaErrors:
                validated = None
            except Exception:  # noqa: BLE001 - fall back to one file at a time, which guards each file
                validated = None
        for position, index in enumerate(indices):
            prepared = results[index]
            assert isinstance(prepared, _Prepared)
            if validated is None:
                results[index] = _guarded(prepared.file_name, lambda p=prepared: _validate_one(p))
            else:
                part = validated.xs(position, level=0).copy()  # its own rows: the stacked table can go
                results[index] = _guarded(prepared.file_name, lambda p=prepared, v=part: _finish(p, v, None))
    return results  # type: ignore[return-value]


def parse_export(file_name: str, data: bytes, layouts: dict[str, ExportLayout]) -> ParsedExport:
    """Validate one export against its layout, lazily: every failure of a stage is collected.

    Returns the typed table, or raises ExportRejected with the full list of problems. No other
    exception leaves this function: an unforeseen failure is reported as the problem code
    ``internal-error`` (a defect of lotgate, never of the file), so the night goes on.
    """
    try:
        return _parse(file_name, data, layouts)
    except ExportRejected:
        raise
    except Exception as exc:  # noqa: BLE001 - the contract: a bad file never stops the night
        raise _reject(file_name, "internal-error", f"lotgate could not read this file ({type(exc).__name__}: "
                      f"{_printable(str(exc), 120)}); this is a defect of lotgate, please report it") from exc
