"""Which plate a lot's results come from (pure).

A lot is measured on one activity plate and one protein plate. A lot found on two plates of a
kind is not decided (a re-assay replaces the earlier export, it is not added to it), and an
activity plate run with another method than the product's specification names is not used.
"""

from __future__ import annotations

from dataclasses import dataclass

from pipeline.assay.plates import ActivityPlateResult
from pipeline.assay.protein_plates import ProteinPlateResult
from pipeline.controlled.specs import Specification


@dataclass(frozen=True)
class PlateChoice:
    """The plates a lot's activity and protein come from (None: none usable), and why not."""

    activity: ActivityPlateResult | None
    protein: ProteinPlateResult | None
    problems: tuple[str, ...]


def plates_by_lot(activity: list[ActivityPlateResult],
                  protein: list[ProteinPlateResult]) -> tuple[dict[str, list[ActivityPlateResult]],
                                                              dict[str, list[ProteinPlateResult]]]:
    """Each lot's activity plates (activity or kinetics wells) and protein plates, in plate order."""
    on_activity: dict[str, list[ActivityPlateResult]] = {}
    for plate in activity:
        for lot_id in set(plate.activity) | set(plate.kinetics):
            on_activity.setdefault(lot_id, []).append(plate)
    on_protein: dict[str, list[ProteinPlateResult]] = {}
    for plate in protein:
        for lot_id in plate.protein:
            on_protein.setdefault(lot_id, []).append(plate)
    return on_activity, on_protein


def choose_plates(lot_id: str, spec: Specification, activity: list[ActivityPlateResult],
                  protein: list[ProteinPlateResult]) -> PlateChoice:
    """The lot's one activity plate (with the specified method) and its one protein plate."""
    problems: list[str] = []
    chosen_activity = chosen_protein = None
    if len(activity) > 1:
        problems.append(f"lot {lot_id} is on {len(activity)} activity plates ({', '.join(p.plate_id for p in activity)}); "
                        "a re-assay must replace the earlier export, not add to it")
    elif activity:
        chosen_activity = activity[0]
        if chosen_activity.method_id != spec.activity_method:
            problems.append(f"plate {chosen_activity.plate_id} uses method {chosen_activity.method_id}; "
                            f"{spec.product_code} is specified with {spec.activity_method}")
            chosen_activity = None
    if len(protein) > 1:
        problems.append(f"lot {lot_id} is on {len(protein)} protein plates ({', '.join(p.plate_id for p in protein)})")
    elif protein:
        chosen_protein = protein[0]
    return PlateChoice(chosen_activity, chosen_protein, tuple(problems))
