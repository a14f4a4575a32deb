"""Method kinds: what each kind of assay method measures, the plate reads it takes, its evaluator.

One entry per value of ``measurement:`` in a method file. The controlled-file loader parses a
method file with its kind's parser; assembly pairs a plate map with the reads of its method's
kind; the night evaluates each plate with its kind's evaluator. A new kind of method is a new
entry here and the module that holds its method object, parser and evaluator.
"""

from __future__ import annotations

from collections.abc import Callable
from dataclasses import dataclass
from enum import StrEnum
from typing import Any

from pipeline.assay.fluorescence import evaluate_fluorescence_plate, parse_fluorescence_method
from pipeline.assay.plate_reads import PlateContext, PlateReads
from pipeline.assay.plates import ActivityPlateResult, evaluate_activity_plate
from pipeline.assay.protein_plates import ProteinPlateResult, evaluate_protein_plate
from pipeline.controlled.specs import (
    parse_endpoint_method,
    parse_kinetic_method,
    parse_uv280_method,
)
from pipeline.errors import SpecificationError


class Measures(StrEnum):
    """What a plate of a method kind gives a lot."""

    ACTIVITY = "activity"  # activity (U/mL) and the kinetic constants
    PROTEIN = "protein"  # protein (mg/mL)


Evaluator = Callable[[str, PlateReads, Any, PlateContext], ActivityPlateResult | ProteinPlateResult]


@dataclass(frozen=True)
class MethodKind:
    """One kind of assay method.

    ``read_kind`` is the export layout kind (``lotgate_export.kind``) of the plate reads it takes;
    ``read_label`` is how an analyst calls such a read in a message ("a kinetic read").
    """

    measurement: str
    measures: Measures
    read_kind: str
    read_label: str
    parse: Callable[[dict[str, Any], str, str], Any]
    evaluate: Evaluator


def _activity(plate_id: str, plate: PlateReads, method: Any, context: PlateContext) -> ActivityPlateResult:
    return evaluate_activity_plate(plate_id, plate.plate_map, plate.reads, method, plate.assay_date)


def _protein(plate_id: str, plate: PlateReads, method: Any, context: PlateContext) -> ProteinPlateResult:
    return evaluate_protein_plate(plate_id, plate.plate_map, plate.reads, method,
                                  dict(context.a280_extinction_ml_per_mg_per_cm))


KINDS: tuple[MethodKind, ...] = (
    MethodKind("kinetic", Measures.ACTIVITY, "kinetic-read", "kinetic", parse_kinetic_method, _activity),
    MethodKind("endpoint", Measures.PROTEIN, "endpoint-read", "endpoint", parse_endpoint_method, _protein),
    MethodKind("uv280", Measures.PROTEIN, "endpoint-read", "endpoint", parse_uv280_method, _protein),
    MethodKind("fluorescence-endpoint", Measures.PROTEIN, "fluorescence-read", "fluorescence",
               parse_fluorescence_method, evaluate_fluorescence_plate),
)
_BY_MEASUREMENT = {kind.measurement: kind for kind in KINDS}


def kind_of(method: Any) -> MethodKind:
    """The kind of a parsed method object (by its ``measurement``)."""
    return _BY_MEASUREMENT[method.measurement]


def read_kinds() -> tuple[str, ...]:
    """Every export kind that holds plate reads, in the registry's order, once each."""
    return tuple(dict.fromkeys(kind.read_kind for kind in KINDS))


def read_label(read_kind: str) -> str:
    """How an analyst calls a read of this export kind: "kinetic", "endpoint", …"""
    return next(kind.read_label for kind in KINDS if kind.read_kind == read_kind)


def parse_method(raw: dict[str, Any], where: str, sha256: str) -> Any:
    """A method object from a method file's mapping, parsed by the kind its ``measurement`` names."""
    measurement = raw.get("measurement")
    kind = _BY_MEASUREMENT.get(str(measurement)) if measurement is not None else None
    if kind is None:
        known = ", ".join(_BY_MEASUREMENT)
        found = "nothing" if measurement is None else repr(measurement)
        raise SpecificationError(f"{where}: measurement must be one of {known}, found {found}")
    return kind.parse(raw, where, sha256)
