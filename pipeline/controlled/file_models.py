"""The declared schemas of product specifications and assay methods (see pipeline.controlled.strict).

Each model says which keys a file may hold, their types and their bounds; ``specs.py`` (and a
method kind's own module) checks a file's mapping against its model, then builds the frozen
domain object from it. A new field is declared here first: a key that no model declares is
refused as unknown.
"""

from __future__ import annotations

from typing import Literal

from pydantic import Field, field_validator, model_validator

from pipeline.controlled.strict import IsoDate, Strict, Text

Positive = Field(gt=0)


class Limits(Strict):
    """A range whose lower end is not above its upper end."""

    min: float
    max: float

    @model_validator(mode="after")
    def _in_order(self) -> Limits:
        if self.min > self.max:
            raise ValueError(f"has min {self.min:g} above max {self.max:g}; the lower limit comes first")
        return self


class TrendSettings(Strict):
    rules: list[int] | None = Field(None, description="a list of Nelson rule numbers 1–8")
    baseline_n: int | None = Field(None, ge=2)


class AttributeFile(TrendSettings):
    """One line of a specification's ``attributes``."""

    code: Text
    title: Text | None = None
    source: Text
    unit: str = ""
    digits: int = Field(0, ge=0)
    min: float | None = None
    max: float | None = None
    expect: Text | None = None
    test_code: Text | None = None
    trend: bool = False
    scientific: bool = False
    required: bool = True
    turnaround_days: int | None = Field(
        None, ge=0, le=366, description="whole days from manufacture within which the result is expected")


class DocumentHeader(Strict):
    """What identifies every controlled document: version, effective date, approver."""

    version: Text = Field(description="a version written as text, e.g. \"3.1\" (quoted)")
    effective_from: IsoDate
    approved_by: Text


class SpecificationFile(DocumentHeader):
    kind: Literal["product-specification"]
    product_code: Text
    product_name: Text
    molecular_weight_g_per_mol: float = Positive
    activity_method: Text
    protein_method: Text
    a280_extinction_ml_per_mg_per_cm: float | None = Field(None, gt=0)
    trend_defaults: TrendSettings | None = None
    attributes: list[AttributeFile] = Field(min_length=1)
    # --- verdicts: how results are rounded to their digits before they are compared (half-even: ASTM E29)
    rounding: Literal["half-up", "half-even"] = "half-up"
    release_mode: Literal["approval", "automatic"] | None = Field(
        None, description="'approval' or 'automatic' (absent: the plant's default)")
    release_procedure: Text | None = Field(
        None, description="the name of the plant's procedure allowing release by exception")


class MethodHeader(DocumentHeader):
    """The fields every assay method file has, whatever its measurement."""

    kind: Literal["assay-method"]
    method_id: Text
    title: Text | None = None
    measurement: Text

    @field_validator("plate_formats", check_fields=False)
    @classmethod
    def _formats_once(cls, formats: list[FormatFile]) -> list[FormatFile]:
        return _one_each(formats)


class RateWindowFile(Strict):
    # Initial-rate rules (docs/assay-rules.md, "Initial rates"): window from the first read,
    # limited by substrate conversion; lag and burst by a one-sided curvature test.
    min_points: int = Field(ge=5)
    linear_limit_au: float = Positive
    max_slope_change: float = Positive
    max_conversion_pct: float = Field(10.0, gt=0, le=50)
    curvature_alpha: float = Field(0.01, gt=0, le=0.5)
    lag_burst_action: Literal["exclude", "steady-state"] = "exclude"
    blank_window_min: float | None = Field(None, gt=0)


class ReferenceLotFile(Strict):
    """One lot of the method's reference standard: its assigned activity and the days it may be used."""

    lot: Text
    assigned_u_per_ml: float = Positive
    valid_from: IsoDate
    valid_to: IsoDate | None = Field(None, description="the last day the lot may be used; empty: until replaced")

    @model_validator(mode="after")
    def _in_order(self) -> ReferenceLotFile:
        if self.valid_to is not None and self.valid_to < self.valid_from:
            raise ValueError(f"has valid_to {self.valid_to} before valid_from {self.valid_from}")
        return self


class KineticSuitability(Strict):
    reference_lots: list[ReferenceLotFile] = Field(min_length=1)
    recovery_pct: Limits
    replicate_cv_max_pct: float = Positive
    blank_rate_max_au_per_min: float = Positive
    recovery_trend: TrendSettings | None = None


class KineticSettings(Strict):
    model_selection_alpha: float = Field(0.05, gt=0, lt=1)
    km_max_relative_se: float = Field(0.25, gt=0)
    # Model choice (docs/assay-rules.md, "Kinetic constants"): the model Km is reported and trended
    # from, and how far beyond the highest substrate tested a Ki may lie for inhibition to be chosen.
    km_model: Literal["michaelis-menten", "substrate-inhibition"] = "michaelis-menten"
    ki_max_multiple: float = Field(10.0, gt=0)
    error_model: Literal["constant", "proportional"] = "constant"  # the rates' SD: fit weights


class FormatFile(Strict):
    """One plate format a method declares: 96 or 384 wells."""

    wells: Literal[96, 384]


def _one_each(formats: list[FormatFile]) -> list[FormatFile]:
    wells = [f.wells for f in formats]
    if len(set(wells)) != len(wells):
        raise ValueError(f"declares a plate format twice: {wells}; one entry per format")
    return formats


class KineticFormatFile(FormatFile):
    """A kinetic method's settings on one plate format: light path and volumes per well."""

    path_length_cm: float = Positive
    reaction_volume_ml: float = Positive
    sample_volume_ml: float = Positive


class OpticalFormatFile(FormatFile):
    """An A280 method's light path on one plate format."""

    path_length_cm: float = Positive


class CurveFormatFile(FormatFile):
    """A standard-curve method's volumes on one plate format (recorded; the curve absorbs the path)."""

    reaction_volume_ml: float | None = Field(None, gt=0)
    sample_volume_ml: float | None = Field(None, gt=0)


class KineticMethodFile(MethodHeader):
    wavelength_nm: float = Positive
    temperature_c: float
    ph: float
    unit_definition: str = ""
    epsilon_per_mm_per_cm: float = Positive
    plate_formats: list[KineticFormatFile] = Field(
        min_length=1, description="a list of plate formats, each with wells (96 or 384) and path_length_cm and volumes")
    assay_substrate_mm: float = Positive
    sample_preparation: Text | None = None
    rate_window: RateWindowFile
    suitability: KineticSuitability
    kinetics: KineticSettings | None = None


class ProteinSuitability(Strict):
    replicate_cv_max_pct: float = Field(10.0, gt=0)
    # docs/assay-rules.md, "Protein": the replicate SE from the plate's pooled scatter or the lot's own
    replicate_scatter: Literal["pooled-per-plate", "per-lot"] = "pooled-per-plate"


class Uv280MethodFile(MethodHeader):
    wavelength_nm: float = Positive
    plate_formats: list[OpticalFormatFile] = Field(
        min_length=1, description="a list of plate formats, each with wells (96 or 384) and path_length_cm")
    linear_range_au: Limits
    suitability: ProteinSuitability | None = None


class CurveFile(Strict):
    model: Text = Field(description="linear, quadratic or 4pl")
    weighting: str | None = Field(None, description="null, 1/x, 1/x2 or 1/y2")
    min_r2: float
    bias_limit_pct: float
    lowest_bias_limit_pct: float
    # Acceptance (docs/assay-rules.md, "Protein"): share of non-zero standards and levels within limits.
    min_calibrator_pct: float = Field(75.0, gt=0, le=100)
    min_levels: int = Field(6, ge=1)


class CurveMethodFile(MethodHeader):
    """A protein method read against a standard curve (each kind adds its reader's fields)."""

    standard: str = ""
    plate_formats: list[CurveFormatFile] = Field(
        min_length=1, description="a list of plate formats, each with wells (96 or 384) and the volumes per well")
    curve: CurveFile
    suitability: ProteinSuitability | None = None


class EndpointMethodFile(CurveMethodFile):
    wavelength_nm: float = Positive
