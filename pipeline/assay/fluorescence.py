"""Protein by a fluorescent protein-binding dye against a standard curve (method kind ``fluorescence-endpoint``).

The plate carries standards and lot wells like an absorbance dye assay; the reader gives one
emission intensity per well (RFU) at the method's excitation and emission wavelengths. A well at
or above the reader's saturation cannot be placed on the curve and invalidates the plate (a
saturated standard) or the lot (a saturated sample), saying which wells.
"""

from __future__ import annotations

from dataclasses import dataclass, replace
from typing import Any, ClassVar

import pandas as pd
from pydantic import Field

from pipeline.assay.plate_reads import PlateContext, PlateReads
from pipeline.assay.protein_plates import (
    ProteinPlateResult,
    Signal,
    evaluate_standard_curve_plate,
    invalid_protein_plate,
)
from pipeline.controlled.file_models import CurveMethodFile
from pipeline.controlled.specs import Document, PlateFormatSettings, curve_fields, method_document
from pipeline.controlled.strict import checked
from pipeline.errors import SpecificationError
from pipeline.science.measurement import Measurement
from pipeline.science.plate_wells import listed_wells
from pipeline.vocabulary import ReplicateScatter


@dataclass(frozen=True)
class FluorescenceMethod:
    """Protein by fluorescence against a standard: wavelengths, the reader's saturation, curve and criteria."""

    document: Document
    method_id: str
    title: str
    excitation_nm: float
    emission_nm: float
    reader_max_rfu: float
    standard: str
    curve_model: str
    curve_weighting: str | None
    curve_min_r2: float
    bias_limit_pct: float
    lowest_bias_limit_pct: float
    replicate_cv_max_pct: float
    plate_formats: tuple[PlateFormatSettings, ...] = ()  # the volumes per well on each plate format
    min_calibrator_pct: float = 75.0  # standard-curve acceptance (docs/assay-rules.md, "Protein")
    min_curve_levels: int = 6
    replicate_scatter: ReplicateScatter = ReplicateScatter.POOLED_PER_PLATE
    measurement: ClassVar[str] = "fluorescence-endpoint"


class FluorescenceMethodFile(CurveMethodFile):
    """The declared schema of a fluorescence method file (see pipeline.controlled.file_models)."""

    excitation_nm: float
    emission_nm: float
    reader_max_rfu: float = Field(gt=0)


def parse_fluorescence_method(raw: dict[str, Any], where: str, sha256: str) -> FluorescenceMethod:
    """A fluorescence standard-curve protein method from a parsed YAML mapping."""
    m = checked(FluorescenceMethodFile, raw, where)
    if not 200 <= m.excitation_nm < m.emission_nm <= 1000:
        raise SpecificationError(f"{where}: the emission wavelength must lie above the excitation wavelength, both "
                                 f"within 200–1000 nm; found excitation {m.excitation_nm:g} nm, emission "
                                 f"{m.emission_nm:g} nm")
    return FluorescenceMethod(document=method_document(m, sha256), method_id=m.method_id,
                              title=m.title or m.method_id, excitation_nm=m.excitation_nm,
                              emission_nm=m.emission_nm, reader_max_rfu=m.reader_max_rfu, **curve_fields(m, where))


def evaluate_fluorescence_plate(plate_id: str, plate: PlateReads, method: FluorescenceMethod,
                                context: PlateContext) -> ProteinPlateResult:
    """Reader settings and saturation checked, then the standard curve and each lot's protein.

    protein [mg/mL] = in-well concentration read off the curve at the well's RFU · dilution factor
    """
    used = plate.plate_map[plate.plate_map["role"] != "empty"]
    merged = used.merge(plate.reads[["well", "intensity_rfu", "excitation_nm", "emission_nm"]], on="well", how="left")
    lots = sorted({str(x) for x in used.loc[used["role"] == "sample", "lot_id"].dropna()})
    missing = merged.loc[merged["intensity_rfu"].isna(), "well"].astype(str).tolist()
    if missing:
        return invalid_protein_plate(plate_id, method, lots, [
            f"plate {plate_id}: the read has no value for mapped well(s) {listed_wells(missing)}"])
    settings = sorted({(int(x), int(m)) for x, m in zip(merged["excitation_nm"], merged["emission_nm"], strict=True)})
    wanted = (int(method.excitation_nm), int(method.emission_nm))
    if settings != [wanted]:
        read_at = ", ".join(f"ex {x} / em {m} nm" for x, m in settings)
        return invalid_protein_plate(plate_id, method, lots, [
            f"plate {plate_id}: read at {read_at}; method {method.method_id} requires ex {wanted[0]} / em {wanted[1]} nm"])
    saturated = merged.loc[merged["intensity_rfu"] >= method.reader_max_rfu]
    standards = saturated.loc[saturated["role"] == "standard", "well"].tolist()
    if standards:
        return invalid_protein_plate(plate_id, method, lots, [
            f"plate {plate_id}: standard well(s) {listed_wells(standards)} at or above the reader's saturation "
            f"({method.reader_max_rfu:g} RFU); the standard curve cannot be built"])
    signal = Signal(column="intensity_rfu", label="fluorescence (RFU)", heading="Intensity (RFU)")
    result = evaluate_standard_curve_plate(plate_id, merged, method, lots, signal)
    return _saturated_samples_invalid(result, saturated, method)


def _saturated_samples_invalid(result: ProteinPlateResult, saturated: pd.DataFrame,
                               method: FluorescenceMethod) -> ProteinPlateResult:
    """A lot with a saturated well has no protein result: its wells say why."""
    protein = dict(result.protein)
    for lot, wells in saturated[saturated["role"] == "sample"].groupby("lot_id"):
        names = wells["well"].astype(str).tolist()
        protein[str(lot)] = Measurement("protein", "mg/mL", None, valid=False, reasons=(
            f"well(s) {listed_wells(names)} at or above the reader's saturation ({method.reader_max_rfu:g} RFU): "
            "dilute the sample further and read again",))
    return replace(result, protein=protein)

