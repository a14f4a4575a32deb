"""The declared schemas of product specifications and assay methods (see pipeline.controlled.strict).

Each model says which keys a file may hold, their types and their bounds; ``specs.py`` (and a
method kind's own module) checks a file's mapping against its model, then builds the frozen
domain object from it. A new field is declared here first: a key that no model declares is
refused as unknown.
"""

from __future__ import annotations

from typing import Literal

from pydantic import Field, model_validator

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


class RateWindowFile(Strict):
    min_points: int
    min_r2: float
    linear_limit_au: float
    max_slope_change: float


class KineticSuitability(Strict):
    reference_lot: Text
    reference_assigned_u_per_ml: float = Positive
    recovery_pct: Limits
    replicate_cv_max_pct: float = Positive
    blank_rate_max_au_per_min: float = Positive
    recovery_trend: TrendSettings | None = None


class KineticSettings(Strict):
    model_selection_alpha: float = Field(0.05, gt=0, lt=1)
    km_max_relative_se: float = Field(0.25, gt=0)


class KineticMethodFile(MethodHeader):
    wavelength_nm: float = Positive
    temperature_c: float
    ph: float
    unit_definition: str = ""
    epsilon_per_mm_per_cm: float = Positive
    path_length_cm: float = Positive
    reaction_volume_ml: float = Positive
    sample_volume_ml: float = Positive
    assay_substrate_mm: float = Positive
    sample_preparation: Text | None = None
    rate_window: RateWindowFile
    suitability: KineticSuitability
    kinetics: KineticSettings | None = None


class ProteinSuitability(Strict):
    replicate_cv_max_pct: float = Field(10.0, gt=0)


class Uv280MethodFile(MethodHeader):
    wavelength_nm: float = Positive
    path_length_cm: float = Positive
    linear_range_au: Limits
    suitability: ProteinSuitability | None = None


class CurveFile(Strict):
    model: Text = Field(description="linear, quadratic or 4pl")
    weighting: str | None = Field(None, description="null, 1/x, 1/x2 or 1/y2")
    min_r2: float
    bias_limit_pct: float
    lowest_bias_limit_pct: float


class CurveMethodFile(MethodHeader):
    """A protein method read against a standard curve (each kind adds its reader's fields)."""

    standard: str = ""
    curve: CurveFile
    suitability: ProteinSuitability | None = None


class EndpointMethodFile(CurveMethodFile):
    wavelength_nm: float = Positive
