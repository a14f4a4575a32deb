"""Grouping a night's validated exports by lot and plate, and cross-checking them (pure).

Every lot that cannot be decided, and every file that refers to something unknown, is named
in ``Assembly.notes`` with the reason; nothing is dropped silently.
"""

from __future__ import annotations

from collections import defaultdict
from dataclasses import dataclass
from typing import Any

import pandas as pd

from pipeline.catalog import Catalog
from pipeline.ingest import ParsedExport
from pipeline.lots import LimsEntry, LotInputs
from pipeline.specs import KineticMethod


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
    activity_plates: dict[str, tuple[pd.DataFrame, pd.DataFrame, str, list[str]]]
    protein_plates: dict[str, tuple[pd.DataFrame, pd.DataFrame, str, list[str]]]
    notes: list[str]  # lots or files that get no decision, and why
    registry_files: dict[str, str]


def assemble(parsed_exports: list[ParsedExport], quarantined: list[QuarantinedFile], catalog: Catalog) -> Assembly:
    """Group the night's exports by lot and plate; state every lot that cannot be decided."""
    by_kind: dict[str, list[ParsedExport]] = defaultdict(list)
    for parsed in parsed_exports:
        by_kind[parsed.kind].append(parsed)
    notes: list[str] = []
    registry: dict[str, dict[str, Any]] = {}
    registry_file: dict[str, tuple[str, str]] = {}
    for export in by_kind["lot-registry"]:
        for row in export.frame.to_dict("records"):
            lot = row["lot_id"]
            if lot in registry and registry[lot]["product_code"] != row["product_code"]:
                notes.append(f"lot {lot} is registered for two products ({registry[lot]['product_code']} in "
                             f"{registry_file[lot][0]}, {row['product_code']} in {export.file_name}): not decided")
                registry[lot]["conflict"] = True
                continue
            registry.setdefault(lot, dict(row))
            registry_file.setdefault(lot, (export.file_name, export.sha256))

    def plates_of(kind: str) -> dict[str, tuple[pd.DataFrame, list[tuple[str, str]]]]:
        out: dict[str, tuple[pd.DataFrame, list[tuple[str, str]]]] = {}
        for export in by_kind[kind]:
            for plate_id, frame in export.frame.groupby("plate_id", sort=True):
                key = str(plate_id)
                if key in out:
                    out[key] = (pd.concat([out[key][0], frame]), [*out[key][1], (export.file_name, export.sha256)])
                else:
                    out[key] = (frame, [(export.file_name, export.sha256)])
        return out

    maps = plates_of("plate-map")
    kinetic_reads = plates_of("kinetic-read")
    endpoint_reads = plates_of("endpoint-read")
    activity_plates: dict[str, Any] = {}
    protein_plates: dict[str, Any] = {}
    plate_files: dict[str, dict[str, str]] = {}
    plate_problem: dict[str, str] = {}
    for plate_id, (frame, files) in sorted(maps.items()):
        plate_files[plate_id] = dict(files)
        if len(files) > 1:
            plate_problem[plate_id] = f"plate {plate_id} has more than one plate map ({', '.join(f for f, _ in files)})"
            continue
        if frame["well"].duplicated().any():
            dup = frame.loc[frame["well"].duplicated(), "well"].iloc[0]
            plate_problem[plate_id] = f"plate {plate_id}: well {dup} appears twice in the plate map"
            continue
        methods = sorted(set(frame["method_id"]))
        method = catalog.methods.get(methods[0]) if len(methods) == 1 else None
        if method is None:
            plate_problem[plate_id] = f"plate {plate_id}: method {', '.join(methods)} is not a single known method under specs/methods"
            continue
        reads = (kinetic_reads if isinstance(method, KineticMethod) else endpoint_reads).get(plate_id)
        if reads is None:
            plate_problem[plate_id] = f"plate {plate_id}: the plate map arrived but no {'kinetic' if isinstance(method, KineticMethod) else 'endpoint'} read for it"
            continue
        plate_files[plate_id].update(dict(reads[1]))
        target = activity_plates if isinstance(method, KineticMethod) else protein_plates
        target[plate_id] = (frame.reset_index(drop=True), reads[0].reset_index(drop=True), method.method_id, [])
    for plate_id in sorted(set(kinetic_reads) | set(endpoint_reads)):
        if plate_id not in maps:
            notes.append(f"a read for plate {plate_id} arrived without its plate map: not used")

    lims: dict[str, dict[str, LimsEntry]] = defaultdict(dict)
    lims_files: dict[str, dict[str, str]] = defaultdict(dict)
    lims_problems: dict[str, list[str]] = defaultdict(list)
    for export in by_kind["lims-results"]:
        for row in export.frame.to_dict("records"):
            lot, test = row["lot_id"], row["test_code"]
            lims_files[lot][export.file_name] = export.sha256
            if test in lims[lot] and lims[lot][test].result != row["result"]:
                lims_problems[lot].append(f"LIMS test {test} reported twice with different results "
                                          f"({lims[lot][test].result} in {lims[lot][test].file_name}, "
                                          f"{row['result']} in {export.file_name})")
                continue
            lims[lot][test] = LimsEntry(row["result"], row.get("unit"), export.file_name)

    plate_lots: dict[str, dict[str, list[str]]] = defaultdict(lambda: defaultdict(list))
    for plate_id, (frame, _files) in maps.items():
        for lot in frame.loc[frame["role"].isin(["sample", "kinetic"]), "lot_id"].dropna().unique():
            plate_lots[str(lot)][plate_id].append(plate_id)
    mentioned = set(plate_lots) | set(lims)
    for lot in sorted(mentioned - set(registry)):
        if lot.startswith("REF-"):
            continue
        notes.append(f"lot {lot} appears in tonight's exports but not in the lot registry: not decided")

    lots: list[LotInputs] = []
    for lot_id, row in sorted(registry.items()):
        if row.get("conflict"):
            continue
        product = row["product_code"]
        spec = catalog.specifications.get(product)
        if spec is None:
            notes.append(f"lot {lot_id}: product {product} has no specification under specs/products: not decided")
            continue
        files = {registry_file[lot_id][0]: registry_file[lot_id][1], **lims_files.get(lot_id, {})}
        problems = list(lims_problems.get(lot_id, []))
        activity = protein = None
        for plate_id in sorted(plate_lots.get(lot_id, {})):
            files.update(plate_files.get(plate_id, {}))
            if plate_id in plate_problem:
                problems.append(plate_problem[plate_id])
        for q in quarantined:
            if lot_id in q.text:
                files[q.file_name] = q.sha256
                first = q.reason.splitlines()[2:3]
                problems.append(f"export {q.file_name}, which mentions this lot, was quarantined"
                                f"{': ' + first[0].lstrip('- ') if first else ''}")
        lots.append(LotInputs(lot_id=lot_id, product_code=product, manufactured_on=row["manufactured_on"],
                              assay_date=row["assay_date"], activity_plate=None, protein_plate=None, lims=lims.get(lot_id, {}),
                              input_files=files, problems=tuple(problems)))
        del activity, protein
    return Assembly(lots, activity_plates, protein_plates, notes, {k: v[0] for k, v in registry_file.items()})
