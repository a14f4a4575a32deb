"""Which method version a plate was assayed by, and whether that version declares the plate's format (pure).

A plate's date is the registered assay date of the lots on it (all the same, else the plate is
not used); the method version in force on that date evaluates it (pipeline.controlled.catalog).
A plate read whose plate format (96 or 384 wells, from its plate map) the method version does
not declare cannot be evaluated: the night sets the read aside with that reason
(``format_problems``, ProblemCode.PLATE_FORMAT), as it does a read that breaks its layout.
"""

from __future__ import annotations

import datetime as dt
from collections.abc import Mapping
from typing import Any

import pandas as pd

from pipeline.assay.method_kinds import kind_of, read_kinds
from pipeline.assay.plate_reads import LOT_ROLES
from pipeline.controlled.catalog import Catalog
from pipeline.controlled.specs import declared_formats
from pipeline.intake.problems import ExportRejected, Problem
from pipeline.intake.validation import ParsedExport
from pipeline.vocabulary import ProblemCode

REGISTRY, PLATE_MAP = "lot-registry", "plate-map"


def plate_assay_date(plate_id: str, frame: pd.DataFrame,
                     registry: Mapping[str, Mapping[str, Any]]) -> tuple[dt.date | None, str | None]:
    """The registered assay date of the plate's lots (None without registered lots), or why there is none."""
    lots = {str(x) for x in frame.loc[frame["role"].isin(LOT_ROLES), "lot_id"].dropna()}
    dates = sorted({str(registry[lot]["assay_date"]) for lot in lots if lot in registry})
    if len(dates) > 1:
        return None, (f"plate {plate_id} holds lots registered as assayed on different days ({', '.join(dates)}); "
                      "one plate is assayed on one day")
    return (dt.date.fromisoformat(dates[0]) if dates else None), None


def plate_method(plate_id: str, frame: pd.DataFrame, registry: Mapping[str, Mapping[str, Any]],
                 catalog: Catalog) -> tuple[dt.date | None, Any | None, str | None]:
    """The plate's assay date and the version of its method in force that day, or why none applies.

    A plate without any registered lot is evaluated by the newest version (its lots are not
    decided anyway: the assembly names them).
    """
    method_id = str(frame["method_id"].iloc[0])
    if not catalog.all_methods(method_id):
        return None, None, f"plate {plate_id}: method {method_id} is not a known method under specs/methods"
    day, problem = plate_assay_date(plate_id, frame, registry)
    if problem is not None:
        return None, None, problem
    if day is None:
        return None, catalog.method_version(method_id, None), None
    method = catalog.method_on(method_id, day)
    if method is None:
        first = catalog.all_methods(method_id)[0].document
        return day, None, (f"plate {plate_id}: method {method_id} has no version in force on its assay date {day} "
                           f"(its first version, {first.version}, takes effect on {first.effective_from})")
    return day, method, None


def undeclared_format(plate_format: int, method: Any) -> str | None:
    """Why a read of ``plate_format`` cannot be evaluated by ``method``, or None when the method declares it."""
    declared = declared_formats(method)
    if plate_format in declared:
        return None
    return (f"its plate map says {plate_format}-well plate, and method {method.method_id} v{method.document.version} "
            f"declares settings for {' and '.join(f'{n}-well' for n in declared) or 'no'} plates only; "
            "the path length and volumes of this format are not validated")


def _registry_dates(exports: list[ParsedExport]) -> dict[str, dict[str, Any]]:
    registry: dict[str, dict[str, Any]] = {}
    for export in exports:
        if export.kind == REGISTRY:
            for row in export.frame[["lot_id", "assay_date"]].to_dict("records"):
                registry.setdefault(str(row["lot_id"]), row)
    return registry


def format_problems(parsed: list[ParsedExport], catalog: Catalog) -> dict[str, ExportRejected]:
    """The night's plate reads whose format their plate's method version does not declare, by file name."""
    registry = _registry_dates(parsed)
    maps: dict[str, pd.DataFrame] = {}
    for export in parsed:
        if export.kind == PLATE_MAP:
            for plate_id, frame in export.frame.groupby("plate_id", sort=True):
                maps.setdefault(str(plate_id), frame)
    out: dict[str, ExportRejected] = {}
    for export in parsed:
        if export.kind not in read_kinds():
            continue
        problems = []
        for plate_id in sorted({str(x) for x in export.frame["plate_id"]}):
            frame = maps.get(plate_id)
            if frame is None or frame["method_id"].nunique() != 1 or frame["plate_format"].nunique() != 1:
                continue  # the assembly names a missing or ambiguous plate map
            _, method, _ = plate_method(plate_id, frame, registry, catalog)
            if method is None or kind_of(method).read_kind != export.kind:
                continue  # the assembly names these
            why = undeclared_format(int(frame["plate_format"].iloc[0]), method)
            if why is not None:
                problems.append(Problem(ProblemCode.PLATE_FORMAT, f"plate {plate_id}: {why}"))
        if problems:
            out[export.file_name] = ExportRejected(export.file_name, problems)
    return out
