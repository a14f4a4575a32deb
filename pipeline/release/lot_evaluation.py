"""From plate results and LIMS entries to each lot's numbers and verdicts (pure functions).

specific activity [U/mg] = activity [U/mL] / protein [mg/mL],
relative SE combined in quadrature: (se/x)² = (se_A/A)² + (se_P/P)²  (docs/assay-rules.md, "Specific activity").
Kinetic constants: v₀ against [S] in U/mL of lot, all lots of a night in one batched fit; Vmax
is then expressed per mg protein, kcat and kcat/Km from the product's molecular weight.
"""

from __future__ import annotations

import math
from collections.abc import Callable
from dataclasses import dataclass, field
from typing import Any

import numpy as np

from pipeline.assay.method_kinds import Measures
from pipeline.assay.plates import ActivityPlateResult, KineticSeries
from pipeline.assay.protein_plates import ProteinPlateResult
from pipeline.controlled.catalog import Catalog
from pipeline.controlled.specs import KineticMethod, Specification
from pipeline.errors import CalculationError
from pipeline.plain_data import to_plain
from pipeline.release.carried import DERIVED_SOURCES, OWN_SOURCES, CarriedPlate
from pipeline.release.records import AttributeVerdict
from pipeline.release.verdicts import judge_lims, judge_measurement
from pipeline.science.combined_uncertainty import RelativeTerm, combined, fit_ratio_term
from pipeline.science.kinetic_constants import km_determination
from pipeline.science.kinetic_error_models import ErrorModel, error_model_weights, residual_check
from pipeline.science.kinetic_model_choice import (
    KI_MAX_MULTIPLE,
    KineticModelChoice,
    choose_kinetic_models,
)
from pipeline.science.km_profile import km_profile_interval
from pipeline.science.measurement import Measurement
from pipeline.science.michaelis_menten import MICHAELIS_MENTEN, fit_michaelis_menten_batch
from pipeline.vocabulary import Verdict


@dataclass(frozen=True)
class LimsEntry:
    result: str
    unit: str | None
    file_name: str
    analyst: str | None = None
    tested_on: str | None = None


@dataclass(frozen=True)
class LotInputs:
    """Everything the night knows about one registered lot."""

    lot_id: str
    product_code: str
    manufactured_on: str
    assay_date: str
    activity_plate: ActivityPlateResult | None
    protein_plate: ProteinPlateResult | None
    lims: dict[str, LimsEntry]
    input_files: dict[str, str]
    problems: tuple[str, ...] = ()  # reasons the lot's data are incomplete (e.g. quarantined file)
    carried: tuple[CarriedPlate, ...] = ()  # a plate of the lot's record used in place of one not assayed tonight


@dataclass(frozen=True)
class LotEvaluation:
    lot_id: str
    product_code: str
    manufactured_on: str
    assay_date: str
    measurements: dict[str, Measurement]
    verdicts: tuple[AttributeVerdict, ...]
    incomplete: tuple[str, ...]
    kinetics: dict[str, Any] | None
    plates: tuple[dict[str, Any], ...]
    input_files: dict[str, str]
    report: dict[str, Any] = field(default_factory=dict)
    provenance: dict[str, dict[str, Any]] = field(default_factory=dict)  # per attribute: where its result came from
    record_only: bool = False  # no data tonight: decided again from its record alone (a result turned overdue)

    def verdict(self, code: str) -> AttributeVerdict:
        return next(v for v in self.verdicts if v.code == code)


def missing(name: str, unit: str, reason: str) -> Measurement:
    """A result whose data did not arrive: the lot is incomplete, not its assay invalid."""
    return Measurement(name, unit, None, valid=True, reasons=(reason,), detail={"missing": True})


def is_missing(measurement: Measurement | None) -> bool:
    return measurement is None or bool(measurement.detail.get("missing"))


def _ratio(name: str, unit: str, top: Measurement, bottom: Measurement) -> Measurement:
    if is_missing(top) or is_missing(bottom):
        reasons = tuple(r for m in (top, bottom) if is_missing(m) for r in m.reasons)
        return Measurement(name, unit, None, valid=True, reasons=reasons, detail={"missing": True})
    if not top.valid or not bottom.valid:
        reasons = tuple(dict.fromkeys((*(() if top.valid else top.reasons), *(() if bottom.valid else bottom.reasons))))
        return Measurement(name, unit, None, valid=False, reasons=reasons)
    if top.value is None or bottom.value is None or bottom.value == 0:
        return Measurement(name, unit, None, valid=False, reasons=(*top.reasons, *bottom.reasons) or ("no value",))
    value = top.value / bottom.value
    # Welch–Satterthwaite effective dof over the two independent relative SEs (GUM G.2b).
    result = combined(value, [_term(top), _term(bottom)])
    return Measurement(name, unit, value, se=result.se, n=min(top.n, bottom.n), dof=result.dof, ci95=result.ci95)


def _term(m: Measurement) -> RelativeTerm:
    """A measurement's relative SE and its dof (a result without an SE counts as exact)."""
    return RelativeTerm(m.relative_se or 0.0, m.dof if m.dof and m.dof > 0 else math.inf)


def _fit_batch(series: dict[str, KineticSeries], alpha: dict[str, tuple[float, float, str]]) -> dict[str, KineticModelChoice | str]:
    """The night's kinetic fits in vectorised solves: Michaelis–Menten for every lot's substrate
    series, then the model choice (substrate inhibition by the F test) for those that fitted."""
    usable = {lot: s for lot, s in series.items() if s.valid and len(s.substrate_mm) >= 3}
    out: dict[str, KineticModelChoice | str] = {}
    if not usable:
        return out

    def stack(lots: list[str]) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
        width = max(len(usable[lot].substrate_mm) for lot in lots)
        s = np.ones((len(lots), width))
        v = np.zeros((len(lots), width))
        mask = np.zeros((len(lots), width), dtype=bool)
        for i, lot in enumerate(lots):
            n = len(usable[lot].substrate_mm)
            s[i, :n] = usable[lot].substrate_mm
            v[i, :n] = usable[lot].rate_u_per_ml
            mask[i, :n] = True
        return s, v, mask

    lots = sorted(usable)
    s_all, v_all, mask_all = stack(lots)
    batch = fit_michaelis_menten_batch(s_all, v_all, mask=mask_all)
    fitted = []
    for i, lot in enumerate(lots):
        try:
            batch.fit(i)
            fitted.append(lot)
        except CalculationError as exc:
            out[lot] = str(exc)
    for level in sorted({alpha[lot] for lot in fitted}):
        group = [lot for lot in fitted if alpha[lot] == level]
        s, v, mask = stack(group)
        weights = error_model_weights(s, v, mask, level[2])  # the method's declared error model
        choices = choose_kinetic_models(s, v, weights=weights, mask=mask, alpha=level[0], ki_max_multiple=level[1])
        for lot, choice in zip(group, choices, strict=True):
            out[lot] = choice
    return out


def _kinetic_measurements(lot: str, series: KineticSeries | None, choice: KineticModelChoice | str | None,
                          protein: Measurement, method: KineticMethod | None,
                          spec: Specification) -> tuple[dict[str, Measurement], dict[str, Any] | None]:
    names = {"km": "mM", "vmax": "U/mg", "kcat": "1/s", "kcat_over_km": "1/(M·s)"}
    if series is None or method is None:
        reason = f"no substrate series for lot {lot} arrived tonight"
        return {k: missing(k, u, reason) for k, u in names.items()}, None
    if not series.valid:
        return {k: Measurement(k, u, None, valid=False, reasons=series.reasons) for k, u in names.items()}, {
            "model": None, "fit": None, "flagged": False, "reason": "; ".join(series.reasons),
            "points": {"substrate_mm": list(series.substrate_mm), "rate_u_per_ml": list(series.rate_u_per_ml)},
            "excluded": list(series.excluded), "km_quality": None}
    if not isinstance(choice, KineticModelChoice):
        reason = f"the Michaelis–Menten fit failed: {choice}"
        return {k: Measurement(k, u, None, valid=False, reasons=(reason,)) for k, u in names.items()}, None
    fit = choice.michaelis_menten
    model = choice.model
    declared = getattr(method, "km_model", MICHAELIS_MENTEN)
    # The reported (and trended) constants always come from the method's declared model; the
    # model choice is reported beside them and flags the lot for review when it disagrees.
    vmax, vmax_se, km, km_se, cov = fit.vmax, fit.vmax_se, fit.km, fit.km_se, fit.cov_vmax_km
    km_ci, dof, n = fit.km_ci95, fit.dof, fit.n
    fit_dict, curve = fit.to_dict(), fit.curve(series.substrate_mm)
    si = choice.substrate_inhibition
    if declared != MICHAELIS_MENTEN:
        if si is None or not si.converged:
            reason = f"the method declares {declared} for Km, and that fit is not available: {choice.reason}"
            return {k: Measurement(k, u, None, valid=False, reasons=(reason,)) for k, u in names.items()}, None
        vmax, vmax_se, km, km_se, cov = si.vmax, si.vmax_se, si.km, si.km_se, si.cov_vmax_km
        km_ci, dof, n = si.km_ci95, si.dof, si.n
        fit_dict, curve = si.to_dict(), si.curve(series.substrate_mm)
    quality = km_determination(_KmView(km, km_se, fit.converged), series.substrate_mm, method.km_max_relative_se)
    notes = [choice.reason] if choice.flagged else []
    error_model = getattr(method, "error_model", ErrorModel.CONSTANT.value)
    weights = error_model_weights(series.substrate_mm, series.rate_u_per_ml, None, error_model)
    check = residual_check(series.substrate_mm, series.rate_u_per_ml, fit.vmax, fit.km,
                           None if weights is None else weights[0], error_model)
    if not check.holds:
        notes.append(check.text)
    detail = {"model": declared, "chosen_model": model, "fit": fit_dict, "flagged": choice.flagged,
              "reason": choice.reason, "f_statistic": choice.f_statistic, "p_value": choice.p_value,
              "points": {"substrate_mm": list(series.substrate_mm), "rate_u_per_ml": list(series.rate_u_per_ml)},
              "excluded": list(series.excluded), "km_quality": quality.to_dict(), "curve": curve.to_dict(),
              "error_model": error_model, "residual_check": to_plain(check),
              "integrated_check": _integrated_check(series, km),
              "km_profile_ci95": (km_profile_interval(series.substrate_mm, series.rate_u_per_ml, km,
                                                      None if weights is None else weights[0])
                                  if declared == MICHAELIS_MENTEN else None)}
    out: dict[str, Measurement] = {}
    if quality.well_determined:
        # Km's interval from the declared fit: t on its own n − p degrees of freedom.
        out["km"] = Measurement("km", "mM", km, se=km_se, ci95=(float(km_ci[0]), float(km_ci[1])), n=n,
                                reasons=tuple(notes), dof=float(dof))
    else:
        out["km"] = Measurement("km", "mM", None, reasons=(f"Km poorly determined: {quality.reason}",))
    if is_missing(protein) or not protein.valid or protein.value is None:
        reason = "Vmax per mg needs the protein result, which is not available"
        for k in ("vmax", "kcat", "kcat_over_km"):
            out[k] = missing(k, names[k], reason) if is_missing(protein) else \
                Measurement(k, names[k], None, valid=False, reasons=(reason,))
        return out, detail
    protein_term = _term(protein)
    rel_v = vmax_se / vmax if vmax else 0.0
    fit_term = RelativeTerm(abs(rel_v), float(dof))
    vmax_mg = vmax / protein.value
    # kcat [1/s] = Vmax [U/mg] · MW [g/mol] / 60 / 1000 (MW exact): the same relative terms.
    kcat = vmax_mg * spec.molecular_weight_g_per_mol / 60.0 / 1000.0
    for code, value in (("vmax", vmax_mg), ("kcat", kcat)):
        out[code] = _with_uncertainty(code, names[code], value, n, lambda: [fit_term, protein_term])
    if quality.well_determined:
        # kcat/Km [1/(M·s)] = kcat / (Km/1000); Vmax and Km from one fit: full covariance (GUM 5.2.2).
        efficiency = kcat / (km / 1000.0)
        out["kcat_over_km"] = _with_uncertainty(
            "kcat_over_km", names["kcat_over_km"], efficiency, n,
            lambda: [fit_ratio_term(rel_v, km_se / km, cov / (vmax * km), float(dof)), protein_term])
    else:
        out["kcat_over_km"] = Measurement("kcat_over_km", "1/(M·s)", None, reasons=("Km poorly determined",))
    return out, detail


def _with_uncertainty(code: str, unit: str, value: float, n: int,
                      terms: Callable[[], list[RelativeTerm]]) -> Measurement:
    """The value with its combined SE, dof and 95 % interval; without them (and saying why) when the
    fit gives no usable SE, so that one odd curve never stops the night."""
    try:
        result = combined(value, terms())
    except (CalculationError, ZeroDivisionError, ValueError) as exc:
        return Measurement(code, unit, value, n=n, reasons=(f"no uncertainty could be combined: {exc}",))
    return Measurement(code, unit, value, se=result.se, ci95=result.ci95, n=n, dof=result.dof)


def _integrated_check(series: KineticSeries, km: float) -> dict[str, Any] | None:
    """The whole-curve Km beside the reported one, with their relative difference (a cross-check)."""
    check = getattr(series, "integrated", None)
    if not isinstance(check, dict) or "km_mm" not in check or not km:
        return check
    return {**check, "difference_pct": 100.0 * (check["km_mm"] - km) / km}


@dataclass(frozen=True)
class _KmView:
    km: float
    km_se: float
    converged: bool


def evaluate_lots(lots: list[LotInputs], catalog: Catalog) -> list[LotEvaluation]:
    """Numbers and verdicts of every lot of the night (trend comes after, in pipeline.oot).

    Each lot is judged against its own specification version (in force on its assay or
    manufacture date) and the methods in force on its assay date (pipeline.controlled.catalog).
    """
    series = {lot.lot_id: lot.activity_plate.kinetics.get(lot.lot_id) for lot in lots if lot.activity_plate}
    specs = {lot.lot_id: catalog.specification_for_lot(lot.product_code, lot.manufactured_on, lot.assay_date)
             for lot in lots}
    alpha = {}
    for lot in lots:
        method = catalog.lot_methods(specs[lot.lot_id], lot.assay_date).get(specs[lot.lot_id].activity_method)
        alpha[lot.lot_id] = (getattr(method, "model_selection_alpha", 0.05),
                             getattr(method, "ki_max_multiple", KI_MAX_MULTIPLE),
                             getattr(method, "error_model", ErrorModel.CONSTANT.value))
    fits = _fit_batch({k: v for k, v in series.items() if v is not None}, alpha)
    evaluations = []
    for lot in lots:
        spec = specs[lot.lot_id]
        method = catalog.lot_methods(spec, lot.assay_date).get(spec.activity_method)
        plate = lot.activity_plate
        activity = (plate.activity.get(lot.lot_id) if plate else None) or missing(
            "activity", "U/mL", f"no activity plate for lot {lot.lot_id} arrived tonight")
        protein = (lot.protein_plate.protein.get(lot.lot_id) if lot.protein_plate else None) or missing(
            "protein", "mg/mL", f"no protein plate for lot {lot.lot_id} arrived tonight")
        specific = _ratio("specific_activity", "U/mg", activity, protein)
        kinetic_values, kinetic_detail = _kinetic_measurements(
            lot.lot_id, series.get(lot.lot_id), fits.get(lot.lot_id), protein, method, spec)
        measurements = {"activity": activity, "protein": protein, "specific_activity": specific, **kinetic_values}
        incomplete = list(lot.problems)
        not_in_force = catalog.not_in_force(spec, lot.manufactured_on, lot.assay_date)
        if not_in_force is not None:
            incomplete.append(not_in_force)
        verdicts = []
        for attribute in spec.attributes:
            if attribute.source == "lims":
                entry = lot.lims.get(attribute.test_code or "")
                verdicts.append(judge_lims(attribute, entry.result if entry else None, entry.unit if entry else None))
                continue
            measurement = measurements.get(attribute.source)
            method_label = (f"{spec.activity_method}" if attribute.source != "protein" else spec.protein_method)
            verdict = judge_measurement(attribute, measurement, method_label)
            if not attribute.has_limit and not is_missing(measurement) and measurement is not None \
                    and measurement.valid and measurement.value is None:
                verdict = AttributeVerdict(attribute.code, attribute.title, attribute.unit, None, "not determined",
                                           None, attribute.limit_text, Verdict.REPORTED, measurement.reasons, method_label)
            verdicts.append(verdict)
        plates = tuple({**p.summary(), **_carried_from(lot, p.plate_id)} for p in (plate, lot.protein_plate)
                       if p is not None)
        provenance = _provenance(lot, spec)
        report = {
            "traces": plate.traces.get(lot.lot_id) if plate else None,
            "protein_curve": ({**lot.protein_plate.curve, "samples": lot.protein_plate.samples.get(lot.lot_id, [])}
                              if lot.protein_plate and lot.protein_plate.curve else None),
            "wells": ({w: d for w, d in plate.wells.items() if d.get("lot_id") in (lot.lot_id, None)
                       or d.get("role") in ("reference", "blank")} if plate else {}),
        }
        evaluations.append(LotEvaluation(
            lot_id=lot.lot_id, product_code=lot.product_code, manufactured_on=lot.manufactured_on,
            assay_date=lot.assay_date, measurements=measurements, verdicts=tuple(verdicts),
            incomplete=tuple(incomplete), kinetics=to_plain(kinetic_detail) if kinetic_detail else None,
            plates=plates, input_files=dict(lot.input_files), report=report,  # shared, already JSON-clean
            provenance=provenance))
    return evaluations


def _provenance(lot: LotInputs, spec: Specification) -> dict[str, dict[str, Any]]:
    """Where each attribute's result of tonight came from: source, files (with SHA-256), plate, analyst, date."""
    def plate_files(*plate_ids: str) -> dict[str, str]:
        named = {f: sha for f, sha in lot.input_files.items() if any(p in f for p in plate_ids)}
        return named or dict(lot.input_files)

    out: dict[str, dict[str, Any]] = {}
    activity = lot.activity_plate.plate_id if lot.activity_plate else None
    protein = lot.protein_plate.plate_id if lot.protein_plate else None
    for attribute in spec.attributes:
        if attribute.source == "lims":
            entry = lot.lims.get(attribute.test_code or "")
            if entry is not None:
                out[attribute.code] = {
                    "source": f"LIMS test {attribute.test_code}", "tested_on": entry.tested_on or lot.assay_date,
                    "files": {entry.file_name: lot.input_files.get(entry.file_name, "")}, "analyst": entry.analyst}
            continue
        used = ([protein] if attribute.source in OWN_SOURCES[Measures.PROTEIN] else
                [activity, protein] if attribute.source in DERIVED_SOURCES else [activity])
        plates = [p for p in used if p]
        out[attribute.code] = {"source": f"plate {' and '.join(plates)}" if plates else "no plate",
                               "tested_on": lot.assay_date, "files": plate_files(*plates) if plates else {},
                               "plate_id": plates[0] if plates else None, "analyst": None}
    for carried in lot.carried:  # its own results are on record already: not recorded again
        for attribute in spec.attributes:
            if attribute.source in OWN_SOURCES[carried.measures]:
                out[attribute.code] = {"source": f"plate {carried.plate_id} (on record, night {carried.night_id})",
                                       "tested_on": carried.tested_on, "files": dict(carried.files),
                                       "plate_id": carried.plate_id, "analyst": None, "carried": True}
    return out


def _carried_from(lot: LotInputs, plate_id: str) -> dict[str, Any]:
    """The summary's note that a plate is the lot's record's, read again (empty for a plate of tonight)."""
    for carried in lot.carried:
        if carried.plate_id == plate_id:
            return {"from_the_lot_record": f"night {carried.night_id} (assayed {carried.tested_on}), read again "
                                           "from the archive"}
    return {}
