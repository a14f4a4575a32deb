"""Stage 1 of reading an export: the file as a whole (pure; raises ExportRejected).

Name, size, encoding, binary content, line ends, line length, control characters, delimiter,
CSV quoting, header, field counts and a cut-off end. The only conversions made without asking
are returned to be named: a UTF-8 byte-order mark removed, Windows line ends (CR LF) converted,
spaces around values removed, empty lines skipped.
"""

from __future__ import annotations

import csv
import io
import re
from dataclasses import dataclass

from pipeline.intake.layouts import ExportLayout, layout_for
from pipeline.intake.problems import (
    MAX_PER_KIND,
    ExportRejected,
    Problem,
    hidden_character,
    in_file_order,
    printable,
    reject,
)
from pipeline.vocabulary import ProblemCode

DECIMAL_COMMA = re.compile(r"[+-]?[0-9]+,[0-9]+")
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


def read_file(name: str, data: bytes, layouts: dict[str, ExportLayout]) -> tuple[ExportLayout, Rows]:
    """Stage 1: the file's layout and data rows, or ExportRejected with every problem of the file."""
    layout = _check_name(name, data, layouts)
    text, conversions = _decode(name, data)
    if not text.strip():
        raise reject(name, ProblemCode.EMPTY, "the file is empty")
    _check_lines(name, text, layout)
    rows = _read_rows(name, text, layout)
    rows.conversions[:0] = conversions
    if not rows.body and not rows.problems:
        raise reject(name, ProblemCode.NO_ROWS, "the file has a header but no data rows")
    if len(rows.body) > layout.max_rows:
        raise reject(name, ProblemCode.TOO_MANY_ROWS, f"the file has {len(rows.body):,} data rows; a {layout.kind} export "
                     f"may have at most {layout.max_rows:,}")
    if rows.problems:
        raise ExportRejected(name, in_file_order(rows.problems, layout.columns))
    return layout, rows


def _check_name(name: str, data: bytes, layouts: dict[str, ExportLayout]) -> ExportLayout:
    hidden = hidden_character(name)
    if hidden is not None:
        raise reject(name, ProblemCode.FILE_NAME, f"the file name contains the invisible character {hidden}; rename the file")
    layout = layout_for(name, layouts)
    if layout is None:
        known = ", ".join(f"{lay.file_prefix}… ({lay.title})" for lay in layouts.values())
        raise reject(name, ProblemCode.UNKNOWN_KIND, f"the file name does not start with a known export prefix; known: {known}")
    if not name.lower().endswith(".csv"):
        raise reject(name, ProblemCode.EXTENSION, f"expected a .csv file (a comma-separated text export); received '{printable(name, 80)}'")
    if len(data) > layout.max_bytes:
        raise reject(name, ProblemCode.TOO_LARGE, f"the file has {len(data):,} bytes; a {layout.kind} export may have at most {layout.max_bytes:,}")
    return layout


def _decode(name: str, data: bytes) -> tuple[str, list[str]]:
    conversions = []
    for magic, what in _MAGIC:
        if data.startswith(magic):
            raise reject(name, ProblemCode.BINARY, f"this is a binary file, {what}, not a comma-separated text export")
    for bom, encoding in _WIDE_BOMS:
        if data.startswith(bom):
            raise reject(name, ProblemCode.ENCODING, f"the file is {encoding} text, not UTF-8; export it again as UTF-8")
    if b"\x00" in data:
        line = data[: data.index(b"\x00")].count(b"\n") + 1
        raise reject(name, ProblemCode.BINARY, "this is a binary file (it contains NUL bytes), not a comma-separated text export", line)
    if data.startswith(b"\xef\xbb\xbf"):
        data = data[3:]
        conversions.append("removed a UTF-8 byte-order mark at the start of the file")
    try:
        text = data.decode("utf-8")
    except UnicodeDecodeError as exc:
        line = data[: exc.start].count(b"\n") + 1
        raise reject(name, ProblemCode.ENCODING, f"byte 0x{data[exc.start]:02X} is not UTF-8 text (the file may be in a "
                     "Windows or Latin-1 code page); export it again as UTF-8", line) from None
    if "\r\n" in text:
        text = text.replace("\r\n", "\n")
        conversions.append("converted Windows line ends (CR LF) to LF")
    if "\r" in text:
        line = text[: text.index("\r")].count("\n") + 1
        raise reject(name, ProblemCode.LINE_ENDS, "contains bare carriage returns (CR) inside the text; lines must end with LF or CR LF", line)
    return text, conversions


def _check_lines(name: str, text: str, layout: ExportLayout) -> None:
    lines = text.split("\n")
    long = [Problem(ProblemCode.LINE_TOO_LONG, f"the line has {len(line):,} characters; at most {layout.max_line_chars} are allowed",
                    line=number) for number, line in enumerate(lines, start=1) if len(line) > layout.max_line_chars]
    if long:
        raise ExportRejected(name, long[:MAX_PER_KIND])
    header = lines[0]
    if "," not in header and len(layout.columns) > 1:
        found = [word for sep, word in ((";", "semicolons"), ("\t", "tabs"), ("|", "vertical bars")) if sep in header]
        how = f"the columns are separated by {found[0]}" if found else "the header line has no commas"
        decimal = " (a decimal comma is not read either)" if found and found[0] == "semicolons" and _has_decimal_comma(lines[1:]) else ""
        raise reject(name, ProblemCode.DELIMITER, f"{how}; this layout uses commas between columns and a point as decimal mark{decimal}", 1)


def _has_decimal_comma(lines: list[str]) -> bool:
    return any(DECIMAL_COMMA.fullmatch(cell.strip()) for line in lines[:50] for cell in line.split(";"))


@dataclass
class Rows:
    """The data rows of a file that passed stage 1, and the conversions made to read it."""

    header: list[str]
    body: list[list[str]]
    lines: list[int]  # the file line each body row starts on
    problems: list[Problem]
    conversions: list[str]


def _read_rows(name: str, text: str, layout: ExportLayout) -> Rows:
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
        raise reject(name, ProblemCode.CSV, f"the file is not well-formed CSV ({exc}); check the quotes on this line", reader.line_num) from None
    problems = _hidden_problems(rows, spanning, text)
    if problems:
        raise ExportRejected(name, problems[:MAX_PER_KIND])
    raw_header = rows[0][1]
    header = _header(name, raw_header, layout)
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
            problems.append(Problem(ProblemCode.FIELD_COUNT, f"has {len(row)} fields, the header has {len(header)}{note}", line=start))
            continue
        if cells != row:
            padded += [(start, h) for h, cell, raw in zip(header, cells, row, strict=True) if cell != raw]
        body.append(cells)
        lines.append(start)
    if body and not problems and not text.endswith("\n"):
        problems.append(Problem(ProblemCode.NO_FINAL_LINE_END, "the last line has no line end, so the file may have been cut off "
                                "inside this line's last value; export it again", line=rows[-1][0]))
    conversions: list[str] = []
    if padded:
        conversions.append(f"removed spaces around {len(padded)} value(s) (first: line {padded[0][0]}, "
                           f"column '{padded[0][1]}')")
    if skipped:
        conversions.append(f"skipped {len(skipped)} empty line(s) (first: line {skipped[0]})")
    return Rows(header, body, lines, problems, conversions)


def _hidden_problems(rows: list[tuple[int, list[str]]], spanning: list[int], text: str) -> list[Problem]:
    """Values running over several lines, and control or invisible characters, cell by cell."""
    problems: list[Problem] = []
    names = [h.strip() for h in rows[0][1]] if rows else []
    for position in spanning:
        start, row = rows[position]
        column = next((i for i, cell in enumerate(row) if "\n" in cell), None)
        label = names[column] if position > 0 and column is not None and column < len(names) else None
        problems.append(Problem(ProblemCode.EMBEDDED_NEWLINE, "a quoted value runs over more than one line; "
                                "each row of an export must be on one line", line=start, column=label))
    if not any(hidden_character(ch) for ch in set(text) if ch != "\n"):
        return problems
    skip = set(spanning)
    for position, (start, row) in enumerate(rows):
        if position in skip:
            continue
        for column, cell in enumerate(row):
            hidden = hidden_character(cell)
            if hidden is not None:
                label = names[column] if position > 0 and column < len(names) else None
                problems.append(Problem(ProblemCode.CONTROL_CHARACTER, f"the value contains the invisible character {hidden}; "
                                        "only printable text is allowed", line=start, column=label))
    return problems


def _header(name: str, raw_header: list[str], layout: ExportLayout) -> list[str]:
    """The header's column names, spaces removed; exactly the layout's columns, each once."""
    header = [h.strip() for h in raw_header]
    missing = [c for c in layout.columns if c not in header]
    extra = [c for c in header if c not in layout.columns]
    twice = sorted({c for c in header if header.count(c) > 1})
    problems: list[Problem] = []
    if missing:
        problems.append(Problem(ProblemCode.MISSING_COLUMN, f"the header lacks {', '.join(repr(c) for c in missing)}", line=1))
    if extra:
        problems.append(Problem(ProblemCode.EXTRA_COLUMN, f"the header has unknown {', '.join(repr(printable(c)) for c in extra)}", line=1))
    if twice:
        problems.append(Problem(ProblemCode.DUPLICATE_COLUMN, f"the header names {', '.join(repr(c) for c in twice)} more than once", line=1))
    if problems:
        problems.append(Problem(ProblemCode.LAYOUT, f"expected the header {','.join(layout.columns)}"))
        raise ExportRejected(name, problems)
    return header
