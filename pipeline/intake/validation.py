"""Reading one export: bytes in, a validated table or the list of every problem out.

``parse_export`` is pure (no file I/O): the flow reads the bytes, this module decides. Every
problem is stated as file, line, column and what was expected, in the analyst's words, with a
stable ``Problem.code`` (``pipeline.vocabulary.ProblemCode``). The only conversions made without
asking are named in ``ParsedExport.conversions``: a UTF-8 byte-order mark removed, Windows line
ends (CR LF) converted, spaces around values removed, empty lines skipped. Nothing else is
guessed: a value that is not exactly what the layout allows makes the whole file unusable.

The checks run in three stages, so that one mistake is not reported three times:

1. the file as a whole (``file_checks``);
2. every cell (``cell_checks``): numbers, calendar dates, and the pandera schema;
3. only when every cell is valid, rows against each other (``row_checks``).
"""

from __future__ import annotations

import hashlib
import sys
import warnings
from collections.abc import Callable
from dataclasses import dataclass
from typing import TypeVar

import pandas as pd
import pandera.pandas as pa

from pipeline.intake.cell_checks import check_cells, schema_problems
from pipeline.intake.file_checks import read_file
from pipeline.intake.layouts import ExportLayout
from pipeline.intake.problems import ExportRejected, Problem, in_file_order, internal_error
from pipeline.intake.row_checks import row_problems
from pipeline.vocabulary import ProblemCode

_T = TypeVar("_T")


@dataclass(frozen=True)
class ParsedExport:
    file_name: str
    kind: str
    layout_version: str
    layout_sha256: str
    sha256: str
    frame: pd.DataFrame
    conversions: tuple[str, ...] = ()


@dataclass(frozen=True)
class _Prepared:
    """A file read and cell-checked (stages 1 and 2), waiting for its layout's schema validation."""

    file_name: str
    sha256: str
    layout: ExportLayout
    conversions: tuple[str, ...]
    lines: list[int]
    frame: pd.DataFrame


def _prepare(file_name: str, data: bytes, layouts: dict[str, ExportLayout]) -> _Prepared:
    """Stages 1 and 2 of a file: the whole file, then every cell (raises ExportRejected)."""
    layout, rows = read_file(file_name, data, layouts)
    frame = check_cells(file_name, rows, layout)
    return _Prepared(file_name, hashlib.sha256(data).hexdigest(), layout, tuple(rows.conversions), rows.lines, frame)


def _finish(prepared: _Prepared, validated: pd.DataFrame | None, errors: pa.errors.SchemaErrors | None) -> ParsedExport:
    """The schema's verdict on a file, then stage 3, rows against each other (raises ExportRejected)."""
    layout = prepared.layout
    if errors is not None:
        problems = schema_problems(errors, prepared.frame, layout, prepared.lines)
        if not problems:
            problems.append(Problem(ProblemCode.VALUE, "the values do not match the layout"))
        raise ExportRejected(prepared.file_name, in_file_order(problems, layout.columns))
    assert validated is not None
    validated = validated.reset_index(drop=True)
    problems = row_problems(validated, set(layout.columns), prepared.lines, max_reads_per_well=layout.max_reads_per_well,
                            layout=f"{layout.kind} {layout.version}")
    if problems:
        raise ExportRejected(prepared.file_name, in_file_order(problems, layout.columns))
    for column in validated.columns:
        if validated[column].dtype == object:
            # One shared string per distinct value: a kinetic read repeats each plate and well name
            # hundreds of times, and a large night holds thousands of reads.
            validated[column] = validated[column].map(lambda v: v if v is None else sys.intern(str(v)))
    return ParsedExport(
        file_name=prepared.file_name, kind=layout.kind, layout_version=layout.version,
        layout_sha256=layout.sha256, sha256=prepared.sha256, frame=validated,
        conversions=prepared.conversions,
    )


def _validate_one(prepared: _Prepared) -> ParsedExport:
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        try:
            validated = prepared.layout.schema.validate(prepared.frame, lazy=True)
        except pa.errors.SchemaErrors as exc:
            return _finish(prepared, None, exc)
    return _finish(prepared, validated, None)


def _guarded(file_name: str, call: Callable[[], _T]) -> _T | ExportRejected:
    try:
        return call()
    except ExportRejected as exc:
        return exc
    except Exception as exc:  # noqa: BLE001 - the contract: a bad file never stops the night
        rejected = internal_error(file_name, exc)
        rejected.__cause__ = exc
        return rejected


def _validate_kind(group: list[_Prepared]) -> list[ParsedExport | ExportRejected]:
    """The files of one layout: one schema check over all of them stacked, one by one if it fails."""
    stacked = pd.concat([p.frame for p in group], keys=range(len(group)))
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        try:
            validated = group[0].layout.schema.validate(stacked, lazy=True)
        except Exception:  # noqa: BLE001 - schema errors, or else: one file at a time, which guards each file
            return [_guarded(p.file_name, lambda p=p: _validate_one(p)) for p in group]
    # each file its own rows (a copy), so that the stacked table can go
    return [_guarded(p.file_name, lambda p=p, i=i: _finish(p, validated.xs(i, level=0).copy(), None))
            for i, p in enumerate(group)]


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
        verdicts = _validate_kind([p for p in group if isinstance(p, _Prepared)])
        for index, verdict in zip(indices, verdicts, strict=True):
            results[index] = verdict
    done = [r for r in results if not isinstance(r, _Prepared)]
    assert len(done) == len(results), "every file has its verdict"
    return done


def parse_export(file_name: str, data: bytes, layouts: dict[str, ExportLayout]) -> ParsedExport:
    """Validate one export against its layout, lazily: every failure of a stage is collected.

    Returns the typed table, or raises ExportRejected with the full list of problems. No other
    exception leaves this function: an unforeseen failure is reported as the problem code
    ``ProblemCode.INTERNAL_ERROR`` (a defect of lotgate, never of the file), so the night goes on.
    """
    try:
        return _validate_one(_prepare(file_name, data, layouts))
    except ExportRejected:
        raise
    except Exception as exc:  # noqa: BLE001 - the contract: a bad file never stops the night
        raise internal_error(file_name, exc) from exc
