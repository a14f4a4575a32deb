"""Evaluating the night's plates and lots: suitability and per-well maths, then each lot's numbers.

A lot that came with one plate tonight gets the other from its record when ``reread`` brought
it back from the archive (``pipeline.night.reread``): that plate is evaluated again as on its
night and used only if it gives exactly the value on record; otherwise the lot is told why.
"""

from __future__ import annotations

from dataclasses import replace
from typing import Any

from pipeline.assay.method_kinds import Measures, kind_of
from pipeline.assay.plate_choice import choose_plates, plates_by_lot
from pipeline.assay.plate_reads import PlateContext
from pipeline.assay.plates import ActivityPlateResult
from pipeline.assay.protein_plates import ProteinPlateResult
from pipeline.controlled.catalog import Catalog
from pipeline.intake.assembly import Assembly
from pipeline.night.reread import Reread
from pipeline.release.carried import same_value
from pipeline.release.lot_evaluation import LotEvaluation, LotInputs, evaluate_lots


def evaluate(assembly: Assembly, catalog: Catalog,
             reread: Reread | None = None) -> tuple[list[LotEvaluation], list[dict[str, Any]]]:
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
    earlier = _earlier_plates(reread, catalog)
    lots = []
    for lot in assembly.lots:
        choice = choose_plates(lot.lot_id, specs[lot.lot_id],
                               on_activity.get(lot.lot_id, []), on_protein.get(lot.lot_id, []))
        inputs = LotInputs(lot.lot_id, lot.product_code, lot.manufactured_on, lot.assay_date, choice.activity,
                           choice.protein, lot.lims, lot.input_files, (*lot.problems, *choice.problems))
        lots.append(_with_earlier_plate(inputs, reread, earlier))
    plate_summaries = [p.summary() for p in (*activity.values(), *protein.values())]
    return evaluate_lots(lots, catalog), plate_summaries


def _earlier_plates(reread: Reread | None, catalog: Catalog) -> dict[tuple[int, str], Any]:
    """Each re-read plate evaluated by its method version, with its own lots' constants."""
    out: dict[tuple[int, str], Any] = {}
    for key, plate in (reread.plates.items() if reread else ()):
        method = catalog.method_version(plate.reads.method_id, plate.reads.method_version)
        out[key] = kind_of(method).evaluate(key[1], plate.reads, method, PlateContext(plate.extinction))
    return out


def _with_earlier_plate(lot: LotInputs, reread: Reread | None, earlier: dict[tuple[int, str], Any]) -> LotInputs:
    """The lot with the plate its record holds in place of the missing one, when it gives the recorded value."""
    if reread is None:
        return lot
    if (why := reread.problems.get(lot.lot_id)) is not None:
        return replace(lot, problems=(*lot.problems, why))
    carried = reread.wanted.get(lot.lot_id)
    if carried is None:
        return lot
    key = (carried.night_id, carried.plate_id)
    result = earlier.get(key)
    if result is None:
        return lot
    activity = carried.measures == Measures.ACTIVITY
    if (lot.activity_plate if activity else lot.protein_plate) is not None:
        return lot
    measurement = (result.activity if activity else result.protein).get(lot.lot_id)
    value = measurement.value if measurement is not None and measurement.valid else None
    if not same_value(value, carried.recorded_value):
        shown = "no valid result" if value is None else f"{value:.6g}"
        return replace(lot, problems=(*lot.problems, (
            f"plate {carried.plate_id} (night {carried.night_id}), read again from the archive, gives {shown} for "
            f"lot {lot.lot_id} where its record holds {carried.recorded_value:.6g}: it is not used, and the "
            "derived results wait for both plates")))
    files = {**lot.input_files, **reread.plates[key].files}
    if activity:
        return replace(lot, activity_plate=result, input_files=files, carried=(carried,))
    return replace(lot, protein_plate=result, input_files=files, carried=(carried,))
