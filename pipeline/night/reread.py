"""Re-reading from the archive the plates of earlier nights that tonight's derived results need (use case).

A lot that comes tonight with only one of its two plates (its activity plate repeated after an
invalid run, its protein standing on record, or the other way round) needs the other plate for
its specific activity, Vmax per mg, kcat and kcat/Km. ``pipeline.release.carried`` says which
plate of the lot's record that is; here its files are read back from the archive (each checked
against the SHA-256 the store recorded), validated with tonight's layouts and assembled as on
their night, with that night's lot registry. ``pipeline.night.evaluate`` evaluates the plate and
uses it only if it gives exactly the value on record. A file missing or changed in the archive,
or an export today's layouts refuse, leaves the lot without its derived results and says why.
"""

from __future__ import annotations

import hashlib
from collections import defaultdict
from dataclasses import dataclass, field
from pathlib import Path

from pipeline.assay.method_kinds import Measures, kind_of
from pipeline.assay.plate_reads import LOT_ROLES, PlateReads
from pipeline.controlled.catalog import Catalog
from pipeline.intake.assembly import PLATE_MAP, REGISTRY, Assembly, assemble
from pipeline.intake.layouts import ExportLayout
from pipeline.intake.problems import ExportRejected
from pipeline.intake.validation import ParsedExport, parse_exports
from pipeline.records.lot_record_store import load_histories
from pipeline.records.store import Store
from pipeline.records.workspace import Workspace
from pipeline.release.carried import CarriedPlate, needs_other_plate, plate_to_carry


@dataclass(frozen=True)
class RereadPlate:
    """An earlier night's plate read back from the archive: its reads, its lots' A280 extinctions, its files."""

    reads: PlateReads
    extinction: dict[str, float]
    files: dict[str, str]


@dataclass(frozen=True)
class Reread:
    """The plates re-read tonight, by (night, plate); each lot's wanted plate; why a lot's could not be."""

    plates: dict[tuple[int, str], RereadPlate] = field(default_factory=dict)
    wanted: dict[str, CarriedPlate] = field(default_factory=dict)
    problems: dict[str, str] = field(default_factory=dict)


def kinds_tonight(assembly: Assembly) -> dict[str, set[Measures]]:
    """Which kinds of plate name each lot tonight (whatever their validity)."""
    out: dict[str, set[Measures]] = defaultdict(set)
    for measures, plates in ((Measures.ACTIVITY, assembly.activity_plates), (Measures.PROTEIN, assembly.protein_plates)):
        for reads in plates.values():
            frame = reads.plate_map
            for lot in frame.loc[frame["role"].isin(LOT_ROLES), "lot_id"].dropna().unique():
                out[str(lot)].add(measures)
    return out


def reread_plates(ws: Workspace, store: Store, catalog: Catalog, layouts: dict[str, ExportLayout],
                  assembly: Assembly) -> Reread:
    """The earlier plates tonight's lots need for their derived results, read back from the archive."""
    tonight = kinds_tonight(assembly)
    need: dict[str, tuple[object, Measures]] = {}
    for lot in assembly.lots:
        spec = catalog.specification_for_lot(lot.product_code, lot.manufactured_on, lot.assay_date)
        kind = needs_other_plate(spec, tonight.get(lot.lot_id, set()))
        if kind is not None:
            need[lot.lot_id] = (spec, kind)
    if not need:
        return Reread()
    histories = load_histories(store, sorted(need))
    wanted: dict[str, CarriedPlate] = {}
    problems: dict[str, str] = {}
    for lot_id, (spec, kind) in need.items():
        history = histories.get(lot_id)
        found = plate_to_carry(lot_id, spec, kind, history) if history is not None else None  # type: ignore[arg-type]
        if isinstance(found, str):
            problems[lot_id] = found
        elif found is not None:
            wanted[lot_id] = found
    plates: dict[tuple[int, str], RereadPlate] = {}
    failed: dict[tuple[int, str], str] = {}
    for carried in sorted(wanted.values(), key=lambda c: (c.night_id, c.plate_id)):
        key = (carried.night_id, carried.plate_id)
        if key in plates or key in failed:
            continue
        read = _reread(ws, store, catalog, layouts, carried)
        if isinstance(read, str):
            failed[key] = read
        else:
            plates[key] = read
    for lot_id, carried in list(wanted.items()):
        if (why := failed.get((carried.night_id, carried.plate_id))) is not None:
            problems[lot_id] = why
            del wanted[lot_id]
    return Reread(plates, wanted, problems)


def _night_files(store: Store, carried: CarriedPlate) -> dict[str, str]:
    """The files the lot's decision of the plate's night used (the night's registry among them)."""
    for decision in reversed(store.decisions(carried.lot_id)):
        if decision.record.night_id == carried.night_id:
            return dict(decision.record.input_files)
    return dict(carried.files)


def _reread(ws: Workspace, store: Store, catalog: Catalog, layouts: dict[str, ExportLayout],
            carried: CarriedPlate) -> RereadPlate | str:
    """The plate read back from the archive and assembled as on its night, or why it cannot be."""
    what = f"plate {carried.plate_id} (night {carried.night_id}), on record for lot {carried.lot_id}"
    files = _night_files(store, carried)
    archived = store.archived_files(sorted(set(files.values())))
    chosen = [a for a in archived.values()
              if a.kind == REGISTRY or (a.kind not in (None, REGISTRY) and carried.plate_id in a.file_name
                                        and (a.kind == PLATE_MAP or a.file_name in carried.files))]
    if not any(a.kind == PLATE_MAP for a in chosen):
        return f"{what}: its plate map is not in the archive's records; the derived results wait for both plates"
    exports: list[tuple[str, bytes]] = []
    archive = ws.archive.resolve()
    for stored in chosen:
        path = ws.root / stored.stored_as
        if path.is_symlink() or not path.resolve().is_relative_to(archive):
            return (f"{what}: the record places its file {stored.file_name} at {stored.stored_as}, which is not a file "
                    "of this workspace's archive; it is not read, and the derived results wait for both plates")
        try:
            data = Path(path).read_bytes()
        except OSError as exc:
            return (f"{what}: the archived file {stored.stored_as} cannot be read ({exc.strerror}); the derived "
                    "results wait for both plates")
        if hashlib.sha256(data).hexdigest() != stored.sha256:
            return (f"{what}: the archived file {stored.stored_as} no longer has the SHA-256 recorded when it was "
                    "received (it was changed); it is not used, and the derived results wait for both plates")
        exports.append((stored.file_name, data))
    parsed = parse_exports(exports, layouts)
    refused = [p for p in parsed if isinstance(p, ExportRejected)]
    if refused:
        return f"{what}: today's export layouts refuse {refused[0]}; the derived results wait for both plates"
    again = assemble([p for p in parsed if isinstance(p, ParsedExport)], [], catalog)
    plates = again.activity_plates if carried.measures == Measures.ACTIVITY else again.protein_plates
    reads = plates.get(carried.plate_id)
    if reads is None:
        return f"{what}: it could not be assembled again from its archived files; the derived results wait for both plates"
    method = catalog.method_version(reads.method_id, reads.method_version)
    if kind_of(method).measures != carried.measures:
        return f"{what}: its method {reads.method_id} does not give {carried.measures}"
    extinction = {}
    for lot in again.lots:
        spec = catalog.specification_for_lot(lot.product_code, lot.manufactured_on, lot.assay_date)
        if spec.a280_extinction_ml_per_mg_per_cm:
            extinction[lot.lot_id] = spec.a280_extinction_ml_per_mg_per_cm
    return RereadPlate(reads, extinction, {s.file_name: s.sha256 for s in chosen if s.kind != REGISTRY})
