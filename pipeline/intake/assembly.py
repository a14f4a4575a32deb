"""Grouping a night's validated exports by lot and plate, and cross-checking them (pure).

Every lot that cannot be decided, and every file that refers to something unknown, is named
in ``Assembly.notes`` with the reason; a lot that can be decided but whose data are not
complete carries the reason in ``LotInputs.problems`` (it is held as incomplete). Nothing is
dropped silently. Cross-file rules:

- a lot registered twice with different product or dates, or for a product without a
  specification, is not decided; a lot named in a plate map or LIMS export but missing from
  the registry is not decided (and a quarantined registry export that lists it is named);
- a plate needs exactly one plate map with one known method and exactly one read of the
  method's kind; every mapped well needs a read; a read well must lie on the mapped plate;
- a LIMS test reported twice with different results (or units) is not judged at all, and
  holds the lot; so does a LIMS test dated before the lot was manufactured;
- a quarantined export that names a lot (or one of its plates) holds that lot; a lot named
  only in quarantined exports is noted as not decided.
- an export of a kind that no part of the night uses (a layout added under schemas/ that
  nothing reads yet) is noted: it is archived but not used.
"""

from __future__ import annotations

import csv
import datetime as dt
import io
import re
from collections import defaultdict
from dataclasses import dataclass
from typing import Any

import pandas as pd

from pipeline.assay.method_kinds import Measures, kind_of, read_kinds, read_label
from pipeline.assay.plate_reads import LOT_ROLES, PlateReads
from pipeline.controlled.catalog import Catalog
from pipeline.controlled.specs import KineticMethod
from pipeline.intake.plate_methods import plate_method
from pipeline.intake.row_checks import PLATE_GEOMETRY
from pipeline.intake.validation import ParsedExport
from pipeline.release.lot_evaluation import LimsEntry, LotInputs
from pipeline.science.plate_wells import listed_wells

LOT_ID = re.compile(r"[A-Z0-9][A-Z0-9-]{2,31}")  # the lot_id pattern of the export layouts
# The kinds of export (``lotgate_export.kind`` of a layout under schemas/) that a night uses.
# Plate reads come in the export kinds of the method kinds (pipeline.assay.method_kinds).
REGISTRY, PLATE_MAP, LIMS_RESULTS = "lot-registry", "plate-map", "lims-results"
USED_KINDS = (REGISTRY, PLATE_MAP, LIMS_RESULTS, *read_kinds())
_TOKEN = re.compile(r"[A-Za-z0-9][A-Za-z0-9-]*")


@dataclass(frozen=True)
class QuarantinedFile:
    """A file set aside tonight: its name, SHA-256, reason and decodable text (to link it to lots)."""

    file_name: str
    sha256: str
    reason: str
    text: str


@dataclass
class Assembly:
    lots: list[LotInputs]
    activity_plates: dict[str, PlateReads]
    protein_plates: dict[str, PlateReads]
    notes: list[str]  # lots or files that get no decision, and why
    registry_files: dict[str, str]


@dataclass(frozen=True)
class _Quarantined:
    file: QuarantinedFile
    tokens: frozenset[str]  # every word of the text, to find lot and plate ids in it
    lots: frozenset[str]  # the values of its lot_id column, as far as the text can be read

    @property
    def first_reason(self) -> str:
        lines = [line[2:] for line in self.file.reason.splitlines() if line.startswith("- ")]
        return lines[0] if lines else "see its reason file"


def _lot_column(text: str) -> frozenset[str]:
    """Best effort: the lot numbers in the 'lot_id' column of a (possibly broken) export."""
    lines = text.lstrip("\ufeff").splitlines()
    if not lines:
        return frozenset()
    for sep in (",", ";", "\t", "|"):
        header = [h.strip().strip('"') for h in lines[0].split(sep)]
        if "lot_id" in header:
            break
    else:
        return frozenset()
    column = header.index("lot_id")
    found = set()
    try:
        for row in csv.reader(io.StringIO("\n".join(lines[1:])), delimiter=sep):
            if column < len(row) and LOT_ID.fullmatch(row[column].strip()):
                found.add(row[column].strip())
    except csv.Error:
        pass
    return frozenset(found)


def _quarantined(files: list[QuarantinedFile]) -> list[_Quarantined]:
    return [_Quarantined(q, frozenset(_TOKEN.findall(q.text)), _lot_column(q.text)) for q in files]


def _naming(quarantined: list[_Quarantined], word: str) -> list[_Quarantined]:
    return [q for q in quarantined if word in q.tokens]


def _registry(exports: list[ParsedExport], notes: list[str]) -> tuple[dict[str, dict[str, Any]], dict[str, tuple[str, str]]]:
    registry: dict[str, dict[str, Any]] = {}
    where: dict[str, tuple[str, str]] = {}
    for export in exports:
        for row in export.frame.to_dict("records"):
            lot = row["lot_id"]
            if lot not in registry:
                registry[lot] = dict(row)
                where[lot] = (export.file_name, export.sha256)
                continue
            first = registry[lot]
            differs = [k for k in ("product_code", "manufactured_on", "assay_date") if first[k] != row[k]]
            if differs and not first.get("conflict"):
                what = "two products" if "product_code" in differs else "different dates"
                shown = ", ".join(f"{k} {first[k]} in {where[lot][0]} but {row[k]} in {export.file_name}" for k in differs)
                notes.append(f"lot {lot} is registered for {what} ({shown}): not decided")
                first["conflict"] = True
    return registry, where


def _plate_groups(exports: list[ParsedExport]) -> dict[str, tuple[pd.DataFrame, list[tuple[str, str]]]]:
    out: dict[str, tuple[pd.DataFrame, list[tuple[str, str]]]] = {}
    for export in exports:
        ids = export.frame["plate_id"]
        # A file of one plate (the usual case) is used as it is: grouping would copy every read of
        # the night while the parsed tables are still held.
        single = len(ids) > 0 and bool((ids == ids.iloc[0]).all())
        groups = [(ids.iloc[0], export.frame)] if single else export.frame.groupby("plate_id", sort=True)
        for plate_id, frame in groups:
            key = str(plate_id)
            if key in out:
                out[key] = (pd.concat([out[key][0], frame]), [*out[key][1], (export.file_name, export.sha256)])
            else:
                out[key] = (frame, [(export.file_name, export.sha256)])
    return out


def _well_problem(plate_id: str, plate_map: pd.DataFrame, reads: pd.DataFrame, read_files: list[str]) -> str | None:
    """Every mapped well has a read, and every read well lies on the mapped plate."""
    used = plate_map.loc[plate_map["role"] != "empty", "well"].astype(str)
    read_wells = set(reads["well"].astype(str))
    missing = sorted(set(used) - read_wells)
    if missing:
        return f"plate {plate_id}: mapped well(s) {listed_wells(missing)} have no read in {', '.join(read_files)}"
    plate_format = int(plate_map["plate_format"].iloc[0])
    rows, columns = PLATE_GEOMETRY[plate_format]
    outside = sorted(w for w in read_wells if w[0] not in rows or int(w[1:]) > columns)
    if outside:
        return (f"plate {plate_id}: the read {', '.join(read_files)} has well(s) {listed_wells(outside)}, outside the "
                f"{plate_format}-well plate of its plate map")
    return None


def _with_article(word: str) -> str:
    return ("an " if word[:1] in "aeiou" else "a ") + word


def assemble(parsed_exports: list[ParsedExport], quarantined: list[QuarantinedFile], catalog: Catalog) -> Assembly:
    """Group the night's exports by lot and plate; state every lot that cannot be decided."""
    by_kind: dict[str, list[ParsedExport]] = defaultdict(list)
    for parsed in parsed_exports:
        by_kind[parsed.kind].append(parsed)
    setaside = _quarantined(quarantined)
    notes = [f"export {parsed.file_name} was read but no method uses exports of kind '{kind}': it is archived "
             "and not used" for kind in sorted(set(by_kind) - set(USED_KINDS)) for parsed in by_kind[kind]]
    registry, registry_file = _registry(by_kind[REGISTRY], notes)

    maps = _plate_groups(by_kind[PLATE_MAP])
    read_groups = {read_kind: _plate_groups(by_kind[read_kind]) for read_kind in read_kinds()}
    activity_plates: dict[str, Any] = {}
    protein_plates: dict[str, Any] = {}
    plate_files: dict[str, dict[str, str]] = {}
    plate_problem: dict[str, str] = {}
    for plate_id, (frame, files) in sorted(maps.items()):
        plate_files[plate_id] = dict(files)
        if len(files) > 1:
            plate_problem[plate_id] = f"plate {plate_id} has more than one plate map ({', '.join(f for f, _ in files)})"
            continue
        methods = sorted(set(frame["method_id"]))
        if len(methods) != 1 or not catalog.all_methods(methods[0]):
            plate_problem[plate_id] = f"plate {plate_id}: method {', '.join(methods)} is not a single known method under specs/methods"
            continue
        assay_date, method, problem = plate_method(plate_id, frame, registry, catalog)
        if method is None:
            plate_problem[plate_id] = str(problem)
            continue
        method_kind = kind_of(method)
        kind = method_kind.read_label
        for other in read_groups:
            if other != method_kind.read_kind and plate_id in read_groups[other]:
                names = ", ".join(f for f, _ in read_groups[other][plate_id][1])
                notes.append(f"{_with_article(read_label(other))} read for plate {plate_id} arrived ({names}), but "
                             f"its plate map names the {kind} method {method.method_id}: the read is not used")
        reads = read_groups[method_kind.read_kind].get(plate_id)
        if reads is None:
            aside = _naming(setaside, plate_id)
            plate_problem[plate_id] = (
                f"plate {plate_id}: its {kind} read was not used: the export {aside[0].file.file_name} was quarantined "
                f"({aside[0].first_reason})" if aside else f"plate {plate_id}: the plate map arrived but no {kind} read for it")
            continue
        read_files = [f for f, _ in reads[1]]
        plate_files[plate_id].update(dict(reads[1]))
        if len(read_files) > 1:
            plate_problem[plate_id] = (f"plate {plate_id} has more than one {kind} read ({', '.join(read_files)}); "
                                       "a re-read must replace the earlier export, not add to it")
            continue
        problem = _well_problem(plate_id, frame, reads[0], read_files)
        if problem is not None:
            plate_problem[plate_id] = problem
            continue
        target = activity_plates if method_kind.measures == Measures.ACTIVITY else protein_plates
        target[plate_id] = PlateReads(frame.reset_index(drop=True), reads[0].reset_index(drop=True), method.method_id,
                                      assay_date, method.document.version)
    for read_kind, groups in read_groups.items():
        for plate_id in sorted(set(groups) - set(maps)):
            aside = _naming(setaside, plate_id)
            why = f" (the export {aside[0].file.file_name}, which names this plate, was quarantined)" if aside else ""
            notes.append(f"{_with_article(read_label(read_kind))} read for plate {plate_id} arrived without its "
                         f"plate map{why}: not used")

    lims: dict[str, dict[str, LimsEntry]] = defaultdict(dict)
    lims_dates: dict[str, list[tuple[str, str, str]]] = defaultdict(list)
    lims_files: dict[str, dict[str, str]] = defaultdict(dict)
    lims_problems: dict[str, list[str]] = defaultdict(list)
    conflicting: set[tuple[str, str]] = set()
    for export in by_kind[LIMS_RESULTS]:
        for row in export.frame.to_dict("records"):
            lot, test = row["lot_id"], row["test_code"]
            lims_files[lot][export.file_name] = export.sha256
            lims_dates[lot].append((test, row["tested_on"], export.file_name))
            if (lot, test) in conflicting:
                continue
            earlier = lims[lot].get(test)
            if earlier is not None and (earlier.result, earlier.unit) != (row["result"], row.get("unit")):
                lims_problems[lot].append(f"LIMS test {test} reported twice with different results "
                                          f"({earlier.result} in {earlier.file_name}, {row['result']} in "
                                          f"{export.file_name}): neither is used")
                conflicting.add((lot, test))
                del lims[lot][test]
                continue
            lims[lot].setdefault(test, LimsEntry(row["result"], row.get("unit"), export.file_name,
                                                 row.get("analyst") if isinstance(row.get("analyst"), str) else None,
                                                 row["tested_on"]))

    plate_lots: dict[str, set[str]] = defaultdict(set)
    for plate_id, (frame, _files) in maps.items():
        for lot in frame.loc[frame["role"].isin(LOT_ROLES), "lot_id"].dropna().unique():
            plate_lots[str(lot)].add(plate_id)
    references = {r.lot for m in catalog.every_method() if isinstance(m, KineticMethod) for r in m.reference_lots}
    mentioned = set(plate_lots) | set(lims)
    for lot in sorted(mentioned - set(registry) - references):
        aside = [q.file.file_name for q in setaside if lot in q.lots and q.file.file_name.startswith("lots-")]
        why = f" (the quarantined registry export {', '.join(aside)} lists it)" if aside else ""
        notes.append(f"lot {lot} appears in tonight's exports but not in the lot registry{why}: not decided")
    only_aside: dict[str, list[str]] = defaultdict(list)
    for q in setaside:
        for lot in sorted(q.lots - set(registry) - mentioned - references):
            only_aside[lot].append(f"{q.file.file_name} ({q.first_reason})")
    for lot, where in sorted(only_aside.items()):
        notes.append(f"lot {lot} appears only in quarantined exports ({'; '.join(where)}): not decided")

    lots: list[LotInputs] = []
    for lot_id, row in sorted(registry.items()):
        if row.get("conflict"):
            continue
        product = row["product_code"]
        if product not in catalog.specifications:
            notes.append(f"lot {lot_id}: product {product} has no specification under specs/products: not decided")
            continue
        files = {registry_file[lot_id][0]: registry_file[lot_id][1], **lims_files.get(lot_id, {})}
        problems = list(lims_problems.get(lot_id, []))
        made = dt.date.fromisoformat(row["manufactured_on"])
        for test, tested_on, file_name in lims_dates.get(lot_id, []):
            if dt.date.fromisoformat(tested_on) < made:
                problems.append(f"LIMS test {test} in {file_name} is dated {tested_on}, before the lot was "
                                f"manufactured ({row['manufactured_on']})")
        for plate_id in sorted(plate_lots.get(lot_id, set())):
            files.update(plate_files.get(plate_id, {}))
            if plate_id in plate_problem:
                problems.append(plate_problem[plate_id])
        for q in _naming(setaside, lot_id):
            files[q.file.file_name] = q.file.sha256
            problems.append(f"export {q.file.file_name}, which mentions this lot, was quarantined: {q.first_reason}")
        lots.append(LotInputs(lot_id=lot_id, product_code=product, manufactured_on=row["manufactured_on"],
                              assay_date=row["assay_date"], activity_plate=None, protein_plate=None,
                              lims=lims.get(lot_id, {}), input_files=files, problems=tuple(problems)))
    notes += catalog.staged_notes([(lot.manufactured_on, lot.assay_date) for lot in lots])
    return Assembly(lots, activity_plates, protein_plates, notes, {k: v[0] for k, v in registry_file.items()})
