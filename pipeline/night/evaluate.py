"""Evaluating the night's plates and lots: suitability and per-well maths, then each lot's numbers."""

from __future__ import annotations

from typing import Any

from pipeline.assay.method_kinds import kind_of
from pipeline.assay.plate_choice import choose_plates, plates_by_lot
from pipeline.assay.plate_reads import PlateContext
from pipeline.assay.plates import ActivityPlateResult
from pipeline.assay.protein_plates import ProteinPlateResult
from pipeline.controlled.catalog import Catalog
from pipeline.intake.assembly import Assembly
from pipeline.release.lot_evaluation import LotEvaluation, LotInputs, evaluate_lots


def evaluate(assembly: Assembly, catalog: Catalog) -> tuple[list[LotEvaluation], list[dict[str, Any]]]:
    """Plate suitability and per-well maths, then each lot's numbers and verdicts; and the plates' summaries."""
    activity: dict[str, ActivityPlateResult] = {}
    protein: dict[str, ProteinPlateResult] = {}
    # Each plate's tables are let go as soon as the plate is evaluated: the night's reads and its
    # results are then never all in memory at once. Only file names and checksums go on.
    specs = {lot.lot_id: catalog.specification_for_lot(lot.product_code, lot.manufactured_on, lot.assay_date)
             for lot in assembly.lots}
    context = PlateContext({lot: spec.a280_extinction_ml_per_mg_per_cm
                            for lot, spec in specs.items() if spec.a280_extinction_ml_per_mg_per_cm})
    for plates, results in ((assembly.activity_plates, activity), (assembly.protein_plates, protein)):
        for plate_id in list(plates):
            plate = plates.pop(plate_id)
            method = catalog.method_version(plate.method_id, plate.method_version)  # in force on its assay date
            results[plate_id] = kind_of(method).evaluate(plate_id, plate, method, context)
    on_activity, on_protein = plates_by_lot(list(activity.values()), list(protein.values()))
    lots = []
    for lot in assembly.lots:
        choice = choose_plates(lot.lot_id, specs[lot.lot_id],
                               on_activity.get(lot.lot_id, []), on_protein.get(lot.lot_id, []))
        lots.append(LotInputs(lot.lot_id, lot.product_code, lot.manufactured_on, lot.assay_date, choice.activity,
                              choice.protein, lot.lims, lot.input_files, (*lot.problems, *choice.problems)))
    plate_summaries = [p.summary() for p in (*activity.values(), *protein.values())]
    return evaluate_lots(lots, catalog), plate_summaries
