"""Evaluating the night's plates and lots: suitability and per-well maths, then each lot's numbers."""

from __future__ import annotations

from typing import Any

from pipeline.assay.plate_choice import choose_plates, plates_by_lot
from pipeline.assay.plates import (
    ActivityPlateResult,
    ProteinPlateResult,
    evaluate_activity_plate,
    evaluate_protein_plate,
)
from pipeline.controlled.catalog import Catalog
from pipeline.intake.assembly import Assembly
from pipeline.release.lot_evaluation import LotEvaluation, LotInputs, evaluate_lots


def evaluate(assembly: Assembly, catalog: Catalog) -> tuple[list[LotEvaluation], list[dict[str, Any]]]:
    """Plate suitability and per-well maths, then each lot's numbers and verdicts; and the plates' summaries."""
    activity: dict[str, ActivityPlateResult] = {}
    protein: dict[str, ProteinPlateResult] = {}
    # Each plate's tables are let go as soon as the plate is evaluated: the night's reads and its
    # results are then never all in memory at once. Only file names and checksums go on.
    for plate_id in list(assembly.activity_plates):
        plate = assembly.activity_plates.pop(plate_id)
        activity[plate_id] = evaluate_activity_plate(plate_id, plate.plate_map, plate.reads,
                                                     catalog.kinetic_method(plate.method_id))
    extinction = {lot.lot_id: catalog.specifications[lot.product_code].a280_extinction_ml_per_mg_per_cm
                  for lot in assembly.lots if catalog.specifications[lot.product_code].a280_extinction_ml_per_mg_per_cm}
    for plate_id in list(assembly.protein_plates):
        plate = assembly.protein_plates.pop(plate_id)
        protein[plate_id] = evaluate_protein_plate(plate_id, plate.plate_map, plate.reads,
                                                   catalog.protein_method(plate.method_id), extinction)
    on_activity, on_protein = plates_by_lot(list(activity.values()), list(protein.values()))
    lots = []
    for lot in assembly.lots:
        choice = choose_plates(lot.lot_id, catalog.specifications[lot.product_code],
                               on_activity.get(lot.lot_id, []), on_protein.get(lot.lot_id, []))
        lots.append(LotInputs(lot.lot_id, lot.product_code, lot.manufactured_on, lot.assay_date, choice.activity,
                              choice.protein, lot.lims, lot.input_files, (*lot.problems, *choice.problems)))
    plate_summaries = [p.summary() for p in (*activity.values(), *protein.values())]
    return evaluate_lots(lots, catalog.specifications, catalog.methods), plate_summaries
