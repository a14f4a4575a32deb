"""Product specifications and assay methods as frozen objects (parsed from plain mappings).

The files live under ``specs/`` as YAML; ``pipeline.records.controlled_files`` reads them and computes their
SHA-256. Parsing is pure: a mapping in, checked against its declared schema
(``pipeline.controlled.file_models``: no unknown key, no NaN, no wrong type), a frozen object out,
or a SpecificationError naming the file and the field.
"""

from __future__ import annotations

import datetime as dt
from dataclasses import dataclass
from typing import Any, ClassVar, Protocol

from pipeline.controlled.file_models import (
    AttributeFile,
    CurveMethodFile,
    DocumentHeader,
    EndpointMethodFile,
    KineticMethodFile,
    KineticSettings,
    MethodHeader,
    ProteinSuitability,
    ReferenceLotFile,
    SpecificationFile,
    TrendSettings,
    Uv280MethodFile,
)
from pipeline.controlled.limit_precision import check_limit_precision, written_limit
from pipeline.controlled.strict import checked
from pipeline.errors import SpecificationError
from pipeline.vocabulary import NelsonRule, ReleaseMode, ReplicateScatter, Rounding

COMPUTED_SOURCES = ("activity", "protein", "specific_activity", "km", "vmax", "kcat", "kcat_over_km")


@dataclass(frozen=True)
class Document:
    """Identity of a controlled file: name, version and SHA-256 of its bytes."""

    name: str
    version: str
    sha256: str
    effective_from: dt.date
    approved_by: str


@dataclass(frozen=True)
class Attribute:
    """One line of a specification: what is tested, its unit, limits and reported digits."""

    code: str
    title: str
    source: str  # one of COMPUTED_SOURCES or "lims"
    unit: str
    digits: int
    minimum: float | None = None
    maximum: float | None = None
    expect: str | None = None  # for qualitative results such as "absent"
    test_code: str | None = None
    trend: bool = False
    trend_rules: tuple[int, ...] = (1, 2, 3, 4)
    baseline_n: int = 20
    scientific: bool = False
    required: bool = True
    # --- verdicts: the specification's rounding of results to their digits (half-up or half-even, ASTM E29)
    rounding: Rounding = Rounding.HALF_UP
    turnaround_days: int | None = None  # expected within these days of manufacture; None: with the lot's data

    @property
    def has_limit(self) -> bool:
        return self.minimum is not None or self.maximum is not None or self.expect is not None

    @property
    def limit_text(self) -> str:
        if self.expect is not None:
            return self.expect
        def show(limit: float) -> str:  # verdicts: a scientific limit as written (≤ 3 significant figures)
            return written_limit(limit) if self.scientific else f"{limit:.{self.digits}f}"

        if self.minimum is not None and self.maximum is not None:
            return f"{show(self.minimum)} – {show(self.maximum)}"
        if self.minimum is not None:
            return f"≥ {show(self.minimum)}"
        if self.maximum is not None:
            return f"≤ {show(self.maximum)}"
        return "report"


@dataclass(frozen=True)
class Specification:
    document: Document
    product_code: str
    product_name: str
    molecular_weight_g_per_mol: float
    activity_method: str
    protein_method: str
    attributes: tuple[Attribute, ...]
    a280_extinction_ml_per_mg_per_cm: float | None = None  # for protein by A280
    release_mode: ReleaseMode | None = None  # None: the plant's default (workspace settings)
    release_procedure: str | None = None  # the procedure allowing release by exception (automatic)

    def attribute(self, code: str) -> Attribute:
        for attribute in self.attributes:
            if attribute.code == code:
                return attribute
        raise SpecificationError(f"specification {self.product_code}: no attribute '{code}'")


class AssayMethod(Protocol):
    """What every kind of assay method has (each kind adds its own constants and criteria)."""

    document: Document
    method_id: str
    title: str

    @property
    def measurement(self) -> str: ...


@dataclass(frozen=True)
class PlateFormatSettings:
    """A method's settings on one plate format (96 or 384 wells); None where the kind has no such setting."""

    plate_format: int
    path_length_cm: float | None = None
    reaction_volume_ml: float | None = None
    sample_volume_ml: float | None = None


@dataclass(frozen=True)
class ReferenceLot:
    """One lot of a reference standard: its assigned activity, usable from ``valid_from`` to ``valid_to``."""

    lot: str
    assigned_u_per_ml: float
    valid_from: dt.date
    valid_to: dt.date | None = None  # None: until a later lot takes over

    def valid_on(self, day: dt.date) -> bool:
        return self.valid_from <= day and (self.valid_to is None or day <= self.valid_to)


def declared_formats(method: Any) -> tuple[int, ...]:
    """The plate formats a method declares (every method kind has ``plate_formats``)."""
    return tuple(f.plate_format for f in getattr(method, "plate_formats", ()))


def format_settings(method: Any, plate_format: int) -> PlateFormatSettings | None:
    return next((f for f in getattr(method, "plate_formats", ()) if f.plate_format == plate_format), None)


@dataclass(frozen=True)
class RateWindow:
    min_points: int
    linear_limit_au: float
    max_slope_change: float
    # initial-rate rules (docs/assay-rules.md, "Initial rates")
    max_conversion_pct: float = 10.0
    curvature_alpha: float = 0.01
    lag_burst_action: str = "exclude"
    blank_window_min: float | None = None


@dataclass(frozen=True)
class KineticMethod:
    """A kinetic activity method: Beer–Lambert constants, volumes and suitability criteria."""

    document: Document
    method_id: str
    title: str
    wavelength_nm: float
    temperature_c: float
    ph: float
    unit_definition: str
    epsilon_per_mm_per_cm: float
    plate_formats: tuple[PlateFormatSettings, ...]
    assay_substrate_mm: float
    rate_window: RateWindow
    reference_lots: tuple[ReferenceLot, ...]
    recovery_min_pct: float
    recovery_max_pct: float
    replicate_cv_max_pct: float
    blank_rate_max_au_per_min: float
    model_selection_alpha: float
    km_max_relative_se: float
    sample_preparation: str | None = None
    recovery_trend_rules: tuple[int, ...] = (1, 2, 3, 4)
    recovery_baseline_n: int = 20
    # kinetic model choice (docs/assay-rules.md, "Kinetic constants")
    km_model: str = "michaelis-menten"
    ki_max_multiple: float = 10.0
    error_model: str = "constant"
    measurement: ClassVar[str] = "kinetic"  # the method file's 'measurement' (see pipeline.assay.method_kinds)

    def reference_on(self, day: dt.date) -> ReferenceLot | None:
        """The reference standard lot valid on ``day`` (the latest to take over, if validities overlap)."""
        valid = [r for r in self.reference_lots if r.valid_on(day)]
        return max(valid, key=lambda r: r.valid_from) if valid else None

    def recovery_attribute(self) -> Attribute:
        """The reference standard's recovery as a charted attribute of this method."""
        return Attribute(code="reference_recovery", title=f"Reference standard recovery ({self.method_id})",
                         source="reference", unit="%", digits=1, minimum=self.recovery_min_pct,
                         maximum=self.recovery_max_pct, trend=True, trend_rules=self.recovery_trend_rules,
                         baseline_n=self.recovery_baseline_n, required=False)


@dataclass(frozen=True)
class ProteinMethod:
    """Protein by a dye or copper assay against a standard curve, or by A280 (``kind``)."""

    document: Document
    method_id: str
    title: str
    wavelength_nm: float
    standard: str
    curve_model: str
    curve_weighting: str | None
    curve_min_r2: float
    bias_limit_pct: float
    lowest_bias_limit_pct: float
    replicate_cv_max_pct: float
    kind: str = "standard-curve"  # or "uv280"
    plate_formats: tuple[PlateFormatSettings, ...] = ()  # per format: A280's path length, curve volumes
    linear_min_au: float | None = None  # A280 only: the photometer's linear range
    linear_max_au: float | None = None
    # standard-curve acceptance (docs/assay-rules.md, "Protein")
    min_calibrator_pct: float = 75.0
    min_curve_levels: int = 6
    replicate_scatter: ReplicateScatter = ReplicateScatter.POOLED_PER_PLATE

    @property
    def measurement(self) -> str:
        """The method file's 'measurement' (see pipeline.assay.method_kinds)."""
        return "uv280" if self.kind == "uv280" else "endpoint"


def _document(header: DocumentHeader, name: str, sha256: str) -> Document:
    return Document(name=name, version=header.version, sha256=sha256, effective_from=header.effective_from,
                    approved_by=header.approved_by)


def _attribute(raw: AttributeFile, defaults: TrendSettings, where: str,
               rounding: Rounding = Rounding.HALF_UP) -> Attribute:
    here = f"{where}, attribute '{raw.code}'"
    if raw.source not in (*COMPUTED_SOURCES, "lims"):
        raise SpecificationError(
            f"{here}: source must be one of {', '.join((*COMPUTED_SOURCES, 'lims'))}, found {raw.source!r}"
        )
    if raw.source == "lims" and not raw.test_code:
        raise SpecificationError(f"{here}: a LIMS attribute needs a 'test_code'")
    if raw.min is not None and raw.max is not None and raw.min > raw.max:
        raise SpecificationError(f"{here}: min {raw.min:g} is above max {raw.max:g}; the lower limit comes first")
    for side, limit in (("lower", raw.min), ("upper", raw.max)):  # verdicts: no limit finer than the result
        check_limit_precision(where, raw.code, side, limit, raw.digits, raw.scientific)
    rules = _rules(raw.rules if raw.rules is not None else defaults.rules, here)
    baseline_n = raw.baseline_n if raw.baseline_n is not None else defaults.baseline_n
    return Attribute(
        code=raw.code, title=raw.title or raw.code, source=raw.source, unit=raw.unit, digits=raw.digits,
        minimum=raw.min, maximum=raw.max, expect=raw.expect, test_code=raw.test_code, trend=raw.trend,
        trend_rules=rules, baseline_n=20 if baseline_n is None else baseline_n, scientific=raw.scientific,
        required=raw.required, rounding=rounding, turnaround_days=raw.turnaround_days,
    )


def _rules(rules: list[int] | None, where: str) -> tuple[int, ...]:
    """Nelson rule numbers (default 1–4), each among 1–8."""
    chosen = (1, 2, 3, 4) if rules is None else tuple(rules)
    if not set(chosen) <= set(NelsonRule):
        raise SpecificationError(f"{where}: trend rules must be among 1–8, found {list(chosen)}")
    return tuple(NelsonRule(r) for r in chosen)


def parse_specification(raw: dict[str, Any], where: str, sha256: str) -> Specification:
    """Build a Specification from a parsed YAML mapping; ``where`` names the file in errors."""
    spec = checked(SpecificationFile, raw, where)
    defaults = spec.trend_defaults or TrendSettings()
    attributes = tuple(_attribute(a, defaults, where, Rounding(spec.rounding)) for a in spec.attributes)
    codes = [a.code for a in attributes]
    if len(set(codes)) != len(codes):
        raise SpecificationError(f"{where}: attribute codes repeat: {codes}")
    return Specification(
        document=_document(spec, spec.product_code, sha256), product_code=spec.product_code,
        product_name=spec.product_name, molecular_weight_g_per_mol=spec.molecular_weight_g_per_mol,
        activity_method=spec.activity_method, protein_method=spec.protein_method, attributes=attributes,
        a280_extinction_ml_per_mg_per_cm=spec.a280_extinction_ml_per_mg_per_cm,
        release_mode=None if spec.release_mode is None else ReleaseMode(spec.release_mode),
        release_procedure=spec.release_procedure,
    )


def method_document(method: MethodHeader, sha256: str) -> Document:
    """The identity of a checked assay method file, whatever its measurement."""
    return _document(method, method.method_id, sha256)


def _formats(raw: list[Any]) -> tuple[PlateFormatSettings, ...]:
    """The per-format settings of a checked method file, by plate format."""
    out = []
    for entry in sorted(raw, key=lambda f: f.wells):
        settings = entry.model_dump()
        out.append(PlateFormatSettings(plate_format=settings.pop("wells"), **settings))
    return tuple(out)


def _reference_lots(raw: list[ReferenceLotFile], where: str) -> tuple[ReferenceLot, ...]:
    """The reference standard lots, by first valid day; two lots may not share one."""
    lots = tuple(sorted((ReferenceLot(r.lot, r.assigned_u_per_ml, r.valid_from, r.valid_to) for r in raw),
                        key=lambda r: r.valid_from))
    for earlier, later in zip(lots, lots[1:], strict=False):
        if earlier.valid_from == later.valid_from:
            raise SpecificationError(f"{where}: reference lots {earlier.lot} and {later.lot} are both valid from "
                                     f"{later.valid_from}; which one a plate of that day uses would be undecided")
    return lots


def parse_kinetic_method(raw: dict[str, Any], where: str, sha256: str) -> KineticMethod:
    """A kinetic activity method (``measurement: kinetic``) from a parsed YAML mapping."""
    m = checked(KineticMethodFile, raw, where)
    suit, kin = m.suitability, m.kinetics or KineticSettings()
    trend = suit.recovery_trend or TrendSettings()
    return KineticMethod(
        document=method_document(m, sha256), method_id=m.method_id, title=m.title or m.method_id,
        wavelength_nm=m.wavelength_nm, temperature_c=m.temperature_c, ph=m.ph, unit_definition=m.unit_definition,
        epsilon_per_mm_per_cm=m.epsilon_per_mm_per_cm, plate_formats=_formats(m.plate_formats),
        assay_substrate_mm=m.assay_substrate_mm, rate_window=RateWindow(**m.rate_window.model_dump()),
        reference_lots=_reference_lots(suit.reference_lots, where),
        recovery_min_pct=suit.recovery_pct.min, recovery_max_pct=suit.recovery_pct.max,
        replicate_cv_max_pct=suit.replicate_cv_max_pct, blank_rate_max_au_per_min=suit.blank_rate_max_au_per_min,
        model_selection_alpha=kin.model_selection_alpha, km_max_relative_se=kin.km_max_relative_se,
        sample_preparation=m.sample_preparation,
        recovery_trend_rules=_rules(trend.rules, f"{where}, suitability.recovery_trend"),
        recovery_baseline_n=20 if trend.baseline_n is None else trend.baseline_n,
        km_model=kin.km_model, ki_max_multiple=kin.ki_max_multiple, error_model=kin.error_model,
    )


def parse_uv280_method(raw: dict[str, Any], where: str, sha256: str) -> ProteinMethod:
    """Protein by absorbance at 280 nm (``measurement: uv280``) from a parsed YAML mapping."""
    m = checked(Uv280MethodFile, raw, where)
    low, high = m.linear_range_au.min, m.linear_range_au.max
    if not 0 <= low < high:
        raise SpecificationError(f"{where}: linear_range_au must have 0 ≤ min < max, found {low}–{high}")
    return ProteinMethod(
        document=method_document(m, sha256), method_id=m.method_id, title=m.title or m.method_id,
        wavelength_nm=m.wavelength_nm, standard="", curve_model="none", curve_weighting=None,
        curve_min_r2=0.0, bias_limit_pct=0.0, lowest_bias_limit_pct=0.0,
        replicate_cv_max_pct=(m.suitability or ProteinSuitability()).replicate_cv_max_pct, kind="uv280",
        replicate_scatter=ReplicateScatter((m.suitability or ProteinSuitability()).replicate_scatter),
        plate_formats=_formats(m.plate_formats), linear_min_au=low, linear_max_au=high)


def curve_fields(m: CurveMethodFile, where: str) -> dict[str, Any]:
    """A checked standard-curve method's standard, curve model, weighting and acceptance limits (method fields)."""
    curve = m.curve
    if curve.model not in ("linear", "quadratic", "4pl"):
        raise SpecificationError(f"{where}: curve model must be linear, quadratic or 4pl, found {curve.model!r}")
    if curve.weighting not in (None, "1/x", "1/x2", "1/y2"):
        raise SpecificationError(
            f"{where}: curve weighting must be null, 1/x, 1/x2 or 1/y2, found {curve.weighting!r}")
    return dict(standard=m.standard, curve_model=curve.model, curve_weighting=curve.weighting,
                curve_min_r2=curve.min_r2, bias_limit_pct=curve.bias_limit_pct,
                lowest_bias_limit_pct=curve.lowest_bias_limit_pct,
                min_calibrator_pct=curve.min_calibrator_pct, min_curve_levels=curve.min_levels,
                replicate_cv_max_pct=(m.suitability or ProteinSuitability()).replicate_cv_max_pct,
                replicate_scatter=ReplicateScatter((m.suitability or ProteinSuitability()).replicate_scatter),
                plate_formats=_formats(m.plate_formats))


def parse_endpoint_method(raw: dict[str, Any], where: str, sha256: str) -> ProteinMethod:
    """Protein against a standard curve read at one wavelength (``measurement: endpoint``)."""
    m = checked(EndpointMethodFile, raw, where)
    return ProteinMethod(document=method_document(m, sha256), method_id=m.method_id, title=m.title or m.method_id,
                         wavelength_nm=m.wavelength_nm, **curve_fields(m, where))
