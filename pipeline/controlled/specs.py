"""Product specifications and assay methods as frozen objects (parsed from plain mappings).

The files live under ``specs/`` as YAML; ``pipeline.records.controlled_files`` reads them and computes their
SHA-256. Parsing is pure: a mapping in, a frozen object out, or a SpecificationError naming the
file and the field.
"""

from __future__ import annotations

import datetime as dt
from dataclasses import dataclass
from typing import Any, ClassVar, Protocol

from pipeline.errors import SpecificationError
from pipeline.vocabulary import NelsonRule

COMPUTED_SOURCES = ("activity", "protein", "specific_activity", "km", "vmax", "kcat", "kcat_over_km")


def _require(mapping: dict[str, Any], key: str, where: str) -> Any:
    if key not in mapping or mapping[key] is None:
        raise SpecificationError(f"{where}: the field '{key}' is missing")
    return mapping[key]


def _number(value: Any, key: str, where: str) -> float:
    if isinstance(value, bool) or not isinstance(value, int | float):
        raise SpecificationError(f"{where}: '{key}' must be a number, found {value!r}")
    return float(value)


def _date(value: Any, key: str, where: str) -> dt.date:
    if isinstance(value, dt.date):
        return value
    try:
        return dt.date.fromisoformat(str(value))
    except ValueError as exc:
        raise SpecificationError(f"{where}: '{key}' must be a date YYYY-MM-DD, found {value!r}") from exc


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

    @property
    def has_limit(self) -> bool:
        return self.minimum is not None or self.maximum is not None or self.expect is not None

    @property
    def limit_text(self) -> str:
        if self.expect is not None:
            return self.expect
        fmt = f"{{:.{self.digits}f}}"
        if self.minimum is not None and self.maximum is not None:
            return f"{fmt.format(self.minimum)} – {fmt.format(self.maximum)}"
        if self.minimum is not None:
            return f"≥ {fmt.format(self.minimum)}"
        if self.maximum is not None:
            return f"≤ {fmt.format(self.maximum)}"
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
class RateWindow:
    min_points: int
    min_r2: float
    linear_limit_au: float
    max_slope_change: float


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
    path_length_cm: float
    reaction_volume_ml: float
    sample_volume_ml: float
    assay_substrate_mm: float
    rate_window: RateWindow
    reference_lot: str
    reference_assigned_u_per_ml: float
    recovery_min_pct: float
    recovery_max_pct: float
    replicate_cv_max_pct: float
    blank_rate_max_au_per_min: float
    model_selection_alpha: float
    km_max_relative_se: float
    sample_preparation: str | None = None
    recovery_trend_rules: tuple[int, ...] = (1, 2, 3, 4)
    recovery_baseline_n: int = 20
    measurement: ClassVar[str] = "kinetic"  # the method file's 'measurement' (see pipeline.assay.method_kinds)

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
    path_length_cm: float | None = None  # A280 only
    linear_min_au: float | None = None  # A280 only: the photometer's linear range
    linear_max_au: float | None = None

    @property
    def measurement(self) -> str:
        """The method file's 'measurement' (see pipeline.assay.method_kinds)."""
        return "uv280" if self.kind == "uv280" else "endpoint"


def _document(raw: dict[str, Any], where: str, name_key: str, sha256: str) -> Document:
    return Document(
        name=str(_require(raw, name_key, where)),
        version=str(_require(raw, "version", where)),
        sha256=sha256,
        effective_from=_date(_require(raw, "effective_from", where), "effective_from", where),
        approved_by=str(_require(raw, "approved_by", where)),
    )


def _attribute(raw: dict[str, Any], defaults: dict[str, Any], where: str) -> Attribute:
    code = str(_require(raw, "code", where))
    here = f"{where}, attribute '{code}'"
    source = str(_require(raw, "source", here))
    if source not in (*COMPUTED_SOURCES, "lims"):
        raise SpecificationError(
            f"{here}: source must be one of {', '.join((*COMPUTED_SOURCES, 'lims'))}, found {source!r}"
        )
    if source == "lims" and not raw.get("test_code"):
        raise SpecificationError(f"{here}: a LIMS attribute needs a 'test_code'")
    digits = raw.get("digits", 0)
    if not isinstance(digits, int) or digits < 0:
        raise SpecificationError(f"{here}: 'digits' must be a whole number ≥ 0, found {digits!r}")
    minimum = None if raw.get("min") is None else _number(raw["min"], "min", here)
    maximum = None if raw.get("max") is None else _number(raw["max"], "max", here)
    if minimum is not None and maximum is not None and minimum > maximum:
        raise SpecificationError(f"{here}: min {minimum} is above max {maximum}")
    rules = tuple(int(r) for r in raw.get("rules", defaults.get("rules", (1, 2, 3, 4))))
    if not set(rules) <= set(NelsonRule):
        raise SpecificationError(f"{here}: trend rules must be among 1–8, found {list(rules)}")
    baseline_n = int(raw.get("baseline_n", defaults.get("baseline_n", 20)))
    if baseline_n < 2:
        raise SpecificationError(f"{here}: baseline_n must be at least 2, found {baseline_n}")
    return Attribute(
        code=code,
        title=str(raw.get("title", code)),
        source=source,
        unit=str(raw.get("unit", "")),
        digits=digits,
        minimum=minimum,
        maximum=maximum,
        expect=None if raw.get("expect") is None else str(raw["expect"]),
        test_code=None if raw.get("test_code") is None else str(raw["test_code"]),
        trend=bool(raw.get("trend", False)),
        trend_rules=tuple(NelsonRule(r) for r in rules),
        baseline_n=baseline_n,
        scientific=bool(raw.get("scientific", False)),
        required=bool(raw.get("required", True)),
    )


def parse_specification(raw: dict[str, Any], where: str, sha256: str) -> Specification:
    """Build a Specification from a parsed YAML mapping; ``where`` names the file in errors."""
    if raw.get("kind") != "product-specification":
        raise SpecificationError(f"{where}: 'kind' must be product-specification, found {raw.get('kind')!r}")
    defaults = raw.get("trend_defaults") or {}
    attributes = tuple(_attribute(a, defaults, where) for a in _require(raw, "attributes", where))
    codes = [a.code for a in attributes]
    if len(set(codes)) != len(codes):
        raise SpecificationError(f"{where}: attribute codes repeat: {codes}")
    return Specification(
        document=_document(raw, where, "product_code", sha256),
        product_code=str(raw["product_code"]),
        product_name=str(_require(raw, "product_name", where)),
        molecular_weight_g_per_mol=_number(
            _require(raw, "molecular_weight_g_per_mol", where), "molecular_weight_g_per_mol", where
        ),
        activity_method=str(_require(raw, "activity_method", where)),
        protein_method=str(_require(raw, "protein_method", where)),
        attributes=attributes,
        a280_extinction_ml_per_mg_per_cm=(None if raw.get("a280_extinction_ml_per_mg_per_cm") is None else _number(
            raw["a280_extinction_ml_per_mg_per_cm"], "a280_extinction_ml_per_mg_per_cm", where)),
    )


def method_document(raw: dict[str, Any], where: str, sha256: str) -> Document:
    """The identity of an assay method file (``kind: assay-method``), whatever its measurement."""
    if raw.get("kind") != "assay-method":
        raise SpecificationError(f"{where}: 'kind' must be assay-method, found {raw.get('kind')!r}")
    return _document(raw, where, "method_id", sha256)


def required_number(mapping: dict[str, Any], key: str, where: str) -> float:
    """A number the file must give under ``key``."""
    return _number(_require(mapping, key, where), key, where)


def parse_kinetic_method(raw: dict[str, Any], where: str, sha256: str) -> KineticMethod:
    """A kinetic activity method (``measurement: kinetic``) from a parsed YAML mapping."""
    document = method_document(raw, where, sha256)
    num = lambda m, k: required_number(m, k, where)  # noqa: E731
    window = _require(raw, "rate_window", where)
    suit = _require(raw, "suitability", where)
    recovery = _require(suit, "recovery_pct", where)
    kin = raw.get("kinetics") or {}
    positive = ("epsilon_per_mm_per_cm", "path_length_cm", "reaction_volume_ml", "sample_volume_ml")
    for key in positive:
        if num(raw, key) <= 0:
            raise SpecificationError(f"{where}: '{key}' must be above zero, found {raw[key]!r}")
    return KineticMethod(
        document=document,
        method_id=document.name,
        title=str(raw.get("title", document.name)),
        wavelength_nm=num(raw, "wavelength_nm"),
        temperature_c=num(raw, "temperature_c"),
        ph=num(raw, "ph"),
        unit_definition=str(raw.get("unit_definition", "")),
        epsilon_per_mm_per_cm=num(raw, "epsilon_per_mm_per_cm"),
        path_length_cm=num(raw, "path_length_cm"),
        reaction_volume_ml=num(raw, "reaction_volume_ml"),
        sample_volume_ml=num(raw, "sample_volume_ml"),
        assay_substrate_mm=num(raw, "assay_substrate_mm"),
        rate_window=RateWindow(
            min_points=int(num(window, "min_points")),
            min_r2=num(window, "min_r2"),
            linear_limit_au=num(window, "linear_limit_au"),
            max_slope_change=num(window, "max_slope_change"),
        ),
        reference_lot=str(_require(suit, "reference_lot", where)),
        reference_assigned_u_per_ml=num(suit, "reference_assigned_u_per_ml"),
        recovery_min_pct=num(recovery, "min"),
        recovery_max_pct=num(recovery, "max"),
        replicate_cv_max_pct=num(suit, "replicate_cv_max_pct"),
        blank_rate_max_au_per_min=num(suit, "blank_rate_max_au_per_min"),
        model_selection_alpha=float(kin.get("model_selection_alpha", 0.05)),
        km_max_relative_se=float(kin.get("km_max_relative_se", 0.25)),
        sample_preparation=raw.get("sample_preparation"),
        recovery_trend_rules=tuple(int(r) for r in (suit.get("recovery_trend") or {}).get("rules", (1, 2, 3, 4))),
        recovery_baseline_n=int((suit.get("recovery_trend") or {}).get("baseline_n", 20)),
    )


def parse_uv280_method(raw: dict[str, Any], where: str, sha256: str) -> ProteinMethod:
    """Protein by absorbance at 280 nm (``measurement: uv280``) from a parsed YAML mapping."""
    document = method_document(raw, where, sha256)
    num = lambda m, k: required_number(m, k, where)  # noqa: E731
    suit = raw.get("suitability") or {}
    linear = _require(raw, "linear_range_au", where)
    path = num(raw, "path_length_cm")
    if path <= 0:
        raise SpecificationError(f"{where}: 'path_length_cm' must be above zero, found {path}")
    low, high = num(linear, "min"), num(linear, "max")
    if not 0 <= low < high:
        raise SpecificationError(f"{where}: linear_range_au must have 0 ≤ min < max, found {low}–{high}")
    return ProteinMethod(
        document=document, method_id=document.name, title=str(raw.get("title", document.name)),
        wavelength_nm=num(raw, "wavelength_nm"), standard="", curve_model="none", curve_weighting=None,
        curve_min_r2=0.0, bias_limit_pct=0.0, lowest_bias_limit_pct=0.0,
        replicate_cv_max_pct=float(suit.get("replicate_cv_max_pct", 10.0)), kind="uv280",
        path_length_cm=path, linear_min_au=low, linear_max_au=high)


def curve_fields(raw: dict[str, Any], where: str) -> dict[str, Any]:
    """A standard-curve method's standard, curve model, weighting and acceptance limits (method fields)."""
    curve = _require(raw, "curve", where)
    model = str(_require(curve, "model", where))
    if model not in ("linear", "quadratic", "4pl"):
        raise SpecificationError(f"{where}: curve model must be linear, quadratic or 4pl, found {model!r}")
    weighting = curve.get("weighting")
    if weighting not in (None, "1/x", "1/x2", "1/y2"):
        raise SpecificationError(f"{where}: curve weighting must be null, 1/x, 1/x2 or 1/y2, found {weighting!r}")
    suit = raw.get("suitability") or {}
    return dict(standard=str(raw.get("standard", "")), curve_model=model, curve_weighting=weighting,
                curve_min_r2=required_number(curve, "min_r2", where),
                bias_limit_pct=required_number(curve, "bias_limit_pct", where),
                lowest_bias_limit_pct=required_number(curve, "lowest_bias_limit_pct", where),
                replicate_cv_max_pct=float(suit.get("replicate_cv_max_pct", 10.0)))


def parse_endpoint_method(raw: dict[str, Any], where: str, sha256: str) -> ProteinMethod:
    """Protein against a standard curve read at one wavelength (``measurement: endpoint``)."""
    document = method_document(raw, where, sha256)
    return ProteinMethod(document=document, method_id=document.name, title=str(raw.get("title", document.name)),
                         wavelength_nm=required_number(raw, "wavelength_nm", where), **curve_fields(raw, where))
