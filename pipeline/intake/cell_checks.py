"""Stage 2 of reading an export: every cell (pure).

Numbers (``nan``, ``inf``, a decimal comma are not numbers), calendar dates, and the layout's
pandera schema (patterns, ranges, allowed values, uniqueness), each problem with its line and
column.
"""

from __future__ import annotations

import datetime as dt
import math
import re
import warnings
from collections import defaultdict
from collections.abc import Set as AbstractSet

import pandas as pd
import pandera.pandas as pa

from pipeline.intake.file_checks import DECIMAL_COMMA, Rows
from pipeline.intake.layouts import ExportLayout
from pipeline.intake.problems import ExportRejected, Problem, in_file_order, printable
from pipeline.vocabulary import ProblemCode

DATE_PATTERN = r"^[0-9]{4}-[0-9]{2}-[0-9]{2}$"  # ASCII digits only: "２０２６" is not a year here
_FLOAT = re.compile(r"[+-]?(?:[0-9]+(?:\.[0-9]+)?|\.[0-9]+)(?:[eE][+-]?[0-9]+)?")
_INT = re.compile(r"[+-]?[0-9]+")
_CHECK_WORDS = {
    "str_matches": (ProblemCode.PATTERN, "does not have the expected form"),
    "isin": (ProblemCode.NOT_ALLOWED, "is not one of the allowed values"),
    "in_range": (ProblemCode.OUT_OF_RANGE, "is outside the allowed range"),
    "str_length": (ProblemCode.LENGTH, "has a length outside the allowed range"),
    "not_nullable": (ProblemCode.MISSING_VALUE, "is empty, but a value is required"),
    "field_uniqueness": (ProblemCode.DUPLICATE_VALUE, "appears more than once, but must be unique"),
    "coerce_dtype": (ProblemCode.NOT_A_NUMBER, "is not a valid value"),
}
_DUPLICATE_CODES = {
    ("plate_id", "well"): (ProblemCode.DUPLICATE_WELL, "well {well} of plate {plate_id}"),
    ("plate_id", "well", "time_s"): (ProblemCode.REPEATED_TIME, "the read of well {well} of plate {plate_id} at {time_s} s"),
    ("lot_id", "test_code"): (ProblemCode.DUPLICATE_TEST, "LIMS test {test_code} of lot {lot_id}"),
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
            why = f"'{printable(value)}' is not a {'whole number' if whole else 'number'}"
            if DECIMAL_COMMA.fullmatch(value):
                why += " (it has a decimal comma; a point is the decimal mark)"
            elif pattern.fullmatch(value):
                why += " (it is too large)"
            problems.append(Problem(ProblemCode.NOT_A_NUMBER, why + _expected(layout, column), line=lines[int(index)], column=column))
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
                problems.append(Problem(ProblemCode.DATE, f"'{value}' is not a calendar date{_expected(layout, column)}",
                                        line=lines[index], column=column))
                seen.add((column, index))
    return problems, seen


def _normal(value: object) -> object:
    if isinstance(value, str) and _FLOAT.fullmatch(value):
        return float(value)
    return value


def _duplicate_problems(frame: pd.DataFrame, indices: set[int], layout: ExportLayout, lines: list[int]) -> list[Problem]:
    keys = tuple(layout.schema.unique or ())
    code, phrase = _DUPLICATE_CODES.get(keys, (ProblemCode.DUPLICATE_KEY, " ".join(f"{k} {{{k}}}" for k in keys)))
    groups: dict[tuple[object, ...], list[int]] = defaultdict(list)
    for index in sorted(indices):
        groups[tuple(_normal(frame.at[index, k]) for k in keys)].append(index)
    problems = []
    for members in groups.values():
        if len(members) < 2:
            continue
        values = {k: printable(str(frame.at[members[0], k])) for k in keys}
        what = phrase.format(**values)
        at = ", ".join(str(lines[i]) for i in members)
        problems.append(Problem(code, f"{what} appears more than once (lines {at}); each may appear only once",
                                line=lines[members[1]]))
    return problems


def schema_problems(errors: pa.errors.SchemaErrors, frame: pd.DataFrame, layout: ExportLayout,
                    lines: list[int], reported: AbstractSet[tuple[str, int]] = frozenset()) -> list[Problem]:
    """The schema's failures as problems, one per cell (cells in ``reported`` are told already)."""
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
        code, phrase = _CHECK_WORDS.get(name, (ProblemCode.VALUE, f"fails the check {check}"))
        raw = frame.at[index, column] if index is not None and column in frame.columns else row.failure_case
        value = "the value" if raw is None or (isinstance(raw, float) and pd.isna(raw)) else f"'{printable(str(raw))}'"
        message = ("the value is empty, but one is required" if name == "not_nullable" else f"{value} {phrase}")
        problems.append(Problem(code, message + _expected(layout, column),
                                line=lines[index] if index is not None else None, column=column))
    if duplicate_rows:
        problems += _duplicate_problems(frame, duplicate_rows, layout, lines)
    return problems


def check_cells(name: str, rows: Rows, layout: ExportLayout) -> pd.DataFrame:
    """Stage 2 before the schema: the table of text cells (empty → None), every number and date valid.

    A file with a bad number or date is also checked against the schema (the bad cells emptied,
    so the rest of their column is checked) and rejected with every problem found.
    """
    frame = pd.DataFrame(rows.body, columns=rows.header)[list(layout.columns)]
    frame = frame.astype(object).where(frame != "", None)
    numbers, seen_numbers = _number_problems(frame, layout, rows.lines)
    dates, seen_dates = _date_problems(frame, layout, rows.lines)
    if not numbers and not dates:
        return frame
    checked = frame.copy()
    for column, index in seen_numbers:  # reported already; emptied so that the rest of the column is checked
        checked.at[index, column] = None
    problems = numbers + dates
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        try:
            layout.schema.validate(checked, lazy=True)
        except pa.errors.SchemaErrors as exc:
            problems += schema_problems(exc, frame, layout, rows.lines, seen_numbers | seen_dates)
    raise ExportRejected(name, in_file_order(problems, layout.columns))
