"""Protein plates: a standard curve read by absorbance or fluorescence, or A280 (pure functions).

Each evaluator checks the plate's reads against its method, then gives every lot on the plate a
protein result (mg/mL) or the reasons it has none; a failed curve invalidates the whole plate.
"""

from __future__ import annotations

from dataclasses import dataclass, replace
from typing import Any

import numpy as np
import pandas as pd

from pipeline.assay.plates import replicate_measurement
from pipeline.controlled.specs import ProteinMethod, declared_formats, format_settings
from pipeline.errors import LotgateError
from pipeline.plain_data import to_plain
from pipeline.science import protein_readings
from pipeline.science.combined_uncertainty import RelativeTerm, combined
from pipeline.science.curve_acceptance import accept_standard_curve
from pipeline.science.curve_uncertainty import inverse_prediction_se
from pipeline.science.measurement import Measurement
from pipeline.science.repeatability import pool_relative_repeatability
from pipeline.vocabulary import ReplicateScatter


@dataclass(frozen=True)
class Signal:
    """What the reader measured in each well: its column in the read export and its name for a person."""

    column: str
    label: str  # the chart's axis, e.g. "absorbance (AU)"
    heading: str  # the sample table's column heading, short enough for its column


ABSORBANCE = Signal(column="absorbance", label="absorbance (AU)", heading="Absorbance (AU)")


@dataclass(frozen=True)
class ProteinPlateResult:
    plate_id: str
    method_id: str
    method_version: str
    valid: bool
    reasons: tuple[str, ...]
    protein: dict[str, Measurement]
    curve: dict[str, Any]
    samples: dict[str, list[dict[str, Any]]]

    def summary(self) -> dict[str, Any]:
        return to_plain({"plate_id": self.plate_id, "method": f"{self.method_id} v{self.method_version}",
                       "valid": self.valid, "reasons": list(self.reasons),
                       "curve_accepted": self.curve.get("accepted"), "curve_r2": self.curve.get("r2")})


def invalid_protein_plate(plate_id: str, method: Any, lots: list[str], reasons: list[str],
                          curve: dict[str, Any] | None = None) -> ProteinPlateResult:
    """A plate whose lots get no protein result, each with the plate's reasons."""
    protein_by_lot = {lot: Measurement("protein", "mg/mL", None, valid=False, reasons=tuple(reasons)) for lot in lots}
    return ProteinPlateResult(plate_id, method.method_id, method.document.version, False, tuple(reasons),
                              protein_by_lot, curve or {}, {})


def evaluate_a280_plate(plate_id: str, merged: pd.DataFrame, method: ProteinMethod, lots: list[str],
                        extinction_by_lot: dict[str, float]) -> ProteinPlateResult:
    """Protein by absorbance at 280 nm, blank-corrected, inside the photometer's linear range only.

    protein [mg/mL] = (A280 − mean buffer blank) / (ε [mL·mg⁻¹·cm⁻¹] · l [cm]) · DF, with the
    path length l the method declares for the plate's format (96 or 384 wells)
    """
    version = method.document.version
    plate_format = int(merged["plate_format"].iloc[0])
    well = format_settings(method, plate_format)
    if well is None or well.path_length_cm is None:
        return invalid_protein_plate(plate_id, method, lots, [
            f"plate {plate_id}: method {method.method_id} v{version} declares no path length for {plate_format}-well "
            f"plates (it declares {', '.join(map(str, declared_formats(method)))})"])
    path_length_cm = well.path_length_cm
    blanks = merged.loc[merged["role"] == "blank", "absorbance"].to_numpy(dtype=float)
    if blanks.size == 0:
        return invalid_protein_plate(plate_id, method, lots, [f"plate {plate_id}: no buffer blank wells for the A280 reading"])
    blank = float(blanks.mean())
    low, high = float(method.linear_min_au or 0.0), float(method.linear_max_au or 0.0)
    result: dict[str, Measurement] = {}
    samples_out: dict[str, list[dict[str, Any]]] = {}
    for lot in lots:
        wells = merged[(merged["role"] == "sample") & (merged["lot_id"] == lot)]
        corrected = wells["absorbance"].to_numpy(dtype=float) - blank
        dilution = wells["dilution_factor"].to_numpy(dtype=float)
        epsilon = extinction_by_lot.get(lot)
        inside = (corrected >= low) & (corrected <= high)
        samples_out[lot] = [{"well": w, "signal": float(a), "dilution_factor": float(d), "in_range": bool(i)}
                            for w, a, d, i in zip(wells["well"], corrected, dilution, inside, strict=True)]
        if epsilon is None:
            result[lot] = Measurement("protein", "mg/mL", None, valid=False,
                                      reasons=(f"lot {lot}: the product gives no A280 extinction coefficient",))
            continue
        if not inside.all():
            side = "above" if (corrected > high).any() else "below"
            result[lot] = Measurement("protein", "mg/mL", None, valid=False, n=int(corrected.size), reasons=(
                f"{int((~inside).sum())} of {corrected.size} replicates read {side} the linear range "
                f"{low:g}–{high:g} AU at 280 nm: re-assay at another dilution",))
            continue
        values = np.asarray(protein_readings.protein_from_a280(corrected, epsilon, path_length_cm, dilution),
                            dtype=float)
        result[lot] = replicate_measurement("protein", "mg/mL", values, method.replicate_cv_max_pct, f"lot {lot} protein")
    result = with_plate_scatter(result, method.replicate_scatter)
    curve = {"model": "A280", "blank_au": blank, "linear_range_au": [low, high], "signal_label": ABSORBANCE.label, "signal_heading": ABSORBANCE.heading,
             "path_length_cm": path_length_cm, "plate_format": plate_format, "accepted": True, "reasons": []}
    return ProteinPlateResult(plate_id, method.method_id, version, True, (), result, curve, samples_out)


def evaluate_protein_plate(plate_id: str, plate_map: pd.DataFrame, reads: pd.DataFrame,
                           method: ProteinMethod, extinction_by_lot: dict[str, float] | None = None) -> ProteinPlateResult:
    """Standard curve acceptance, then protein of each lot inside the calibrated range only.

    protein [mg/mL] = in-well concentration from the curve · dilution factor
    (or, for an A280 method, see ``evaluate_a280_plate``)
    """
    used = plate_map[plate_map["role"] != "empty"]
    lots = sorted({str(x) for x in used.loc[used["role"] == "sample", "lot_id"].dropna()})
    merged = used.merge(reads[["well", "absorbance", "wavelength_nm"]], on="well", how="left")

    def invalid(reasons: list[str]) -> ProteinPlateResult:
        return invalid_protein_plate(plate_id, method, lots, reasons)

    missing = merged.loc[merged["absorbance"].isna(), "well"].tolist()
    if missing:
        return invalid([f"plate {plate_id}: the read has no value for mapped well(s) {', '.join(missing[:8])}"])
    wavelengths = sorted(set(int(x) for x in merged["wavelength_nm"]))
    if wavelengths != [int(method.wavelength_nm)]:
        return invalid([f"plate {plate_id}: read at {', '.join(map(str, wavelengths))} nm; method {method.method_id} requires {method.wavelength_nm:.0f} nm"])
    if method.kind == "uv280":
        return evaluate_a280_plate(plate_id, merged, method, lots, extinction_by_lot or {})
    return evaluate_standard_curve_plate(plate_id, merged, method, lots, ABSORBANCE)


def evaluate_standard_curve_plate(plate_id: str, merged: pd.DataFrame, method: Any, lots: list[str],
                                  signal: Signal) -> ProteinPlateResult:
    """The standard curve from the standards' signal, then each lot's protein inside the calibrated range.

    ``merged`` is the plate map's used wells with the reader's ``signal.column``; ``method`` gives the
    curve model, weighting, acceptance limits and replicate CV limit.
    protein [mg/mL] = in-well concentration read off the curve · dilution factor
    """
    version = method.document.version
    standards = merged[merged["role"] == "standard"]
    column = signal.column
    if standards.empty:
        return invalid_protein_plate(plate_id, method, lots, [f"plate {plate_id}: no standard curve wells"])
    try:
        acceptance = accept_standard_curve(
            standards["nominal_mg_per_ml"].to_numpy(dtype=float), standards[column].to_numpy(dtype=float),
            method.curve_model, weighting=method.curve_weighting, min_r2=method.curve_min_r2,
            bias_limit_pct=method.bias_limit_pct, lowest_bias_limit_pct=method.lowest_bias_limit_pct,
            min_fraction=method.min_calibrator_pct / 100.0, min_levels=method.min_curve_levels)
    except LotgateError as exc:
        return invalid_protein_plate(plate_id, method, lots, [f"plate {plate_id}: the standard curve cannot be fitted: {exc}"])
    curve = acceptance.curve
    curve_dict = {**curve.to_dict(), **acceptance.to_dict(), "accepted": acceptance.accepted,
                  "reasons": list(acceptance.reasons),
                  "params": [float(v) for v in curve.params], "points": curve.response_curve(),
                  "param_names": list(curve.param_names), "standards": [[float(x), float(y)] for x, y in
                                                   zip(standards["nominal_mg_per_ml"], standards[column], strict=True)],
                  "signal_label": signal.label, "signal_heading": signal.heading}
    if not acceptance.accepted:
        why = "; ".join((*acceptance.reasons, *acceptance.exclusions))
        return invalid_protein_plate(plate_id, method, lots, [f"plate {plate_id}: standard curve not accepted: {why}"],
                                     curve_dict)
    result: dict[str, Measurement] = {}
    in_well: dict[str, float] = {}
    samples_out: dict[str, list[dict[str, Any]]] = {}
    for lot in lots:
        wells = merged[(merged["role"] == "sample") & (merged["lot_id"] == lot)]
        readings = []
        for value, dilution in zip(wells[column], wells["dilution_factor"], strict=True):
            readings.extend(protein_readings.back_calculate(curve, np.array([float(value)]), dilution_factor=float(dilution)))
        samples_out[lot] = [{"well": w, "signal": float(a), "dilution_factor": float(d),
                             "mg_per_ml": r.concentration_mg_per_ml, "in_well_mg_per_ml": r.in_well_mg_per_ml,
                             "in_range": r.in_range}
                            for w, a, d, r in zip(wells["well"], wells[column], wells["dilution_factor"], readings, strict=True)]
        outside = [r for r in readings if not r.in_range]
        if outside:
            result[lot] = Measurement("protein", "mg/mL", None, valid=False, n=len(readings),
                                      reasons=(f"{len(outside)} of {len(readings)} replicates {outside[0].reason}",))
            continue
        values = np.array([r.concentration_mg_per_ml for r in readings], dtype=float)
        result[lot] = replicate_measurement("protein", "mg/mL", values, method.replicate_cv_max_pct, f"lot {lot} protein")
        in_well[lot] = float(np.mean([r.in_well_mg_per_ml for r in readings]))
    result = with_plate_scatter(result, method.replicate_scatter)
    result = {lot: with_curve_uncertainty(m, curve, in_well[lot]) if lot in in_well else m for lot, m in result.items()}
    return ProteinPlateResult(plate_id, method.method_id, version, True, (), result, curve_dict, samples_out)


def with_plate_scatter(replicates: dict[str, Measurement], scatter: ReplicateScatter) -> dict[str, Measurement]:
    """Each lot's replicate SE from the plate's pooled repeatability, where the method pools it.

    Lots whose replicates met the method's CV limit are pooled (``pipeline.science.repeatability``);
    a lot whose scatter is larger than the others' keeps its own SD and n − 1 dof, and says so.
    """
    if scatter is not ReplicateScatter.POOLED_PER_PLATE:
        return replicates
    usable = {lot: m.detail["replicates"] for lot, m in replicates.items()
              if m.valid and m.value and m.se is not None and m.n >= 2}
    pool = pool_relative_repeatability(usable)
    if pool is None:
        return replicates
    out = dict(replicates)
    for lot in pool.pooled_lots:
        m = replicates[lot]
        if m.value is None:  # never: pooled lots have a value (see ``usable``)
            continue
        relative_se = pool.relative_se(m.n)
        note = {"pooled_cv_pct": 100.0 * pool.relative_sd, "dof": pool.dof, "lots": list(pool.pooled_lots),
                "own_se": m.se}
        out[lot] = replace(m, se=abs(m.value) * relative_se, dof=pool.dof,
                           ci95=combined(m.value, [RelativeTerm(relative_se, pool.dof)]).ci95,
                           detail={**m.detail, "repeatability": note})
    for lot in pool.own_scatter_lots:
        m = replicates[lot]
        out[lot] = replace(m, detail={**m.detail, "repeatability": {
            "own": "its replicates scatter more than the plate's other lots (Cochran's test at 5 %)"}})
    return out


def with_curve_uncertainty(replicates: Measurement, curve: Any, in_well_mg_per_ml: float) -> Measurement:
    """The replicates' SE (n − 1 dof) combined with the curve's inverse-prediction SE (its n − p dof).

    Both as relative SEs, Welch–Satterthwaite dof, 95 % interval (docs/assay-rules.md, "Protein").
    """
    curve_se = inverse_prediction_se(curve, in_well_mg_per_ml)
    if replicates.value is None or replicates.se is None or replicates.dof is None or not np.isfinite(curve_se) \
            or not in_well_mg_per_ml:
        return replicates
    terms = [RelativeTerm(abs(replicates.se / replicates.value), replicates.dof),
             RelativeTerm(curve_se / in_well_mg_per_ml, float(curve.dof))]
    total = combined(replicates.value, terms)
    detail = {**replicates.detail, "replicate_se": replicates.se, "replicate_dof": replicates.dof,
              "curve_se_mg_per_ml": abs(replicates.value) * curve_se / in_well_mg_per_ml, "curve_dof": curve.dof}
    return Measurement(replicates.name, replicates.unit, replicates.value, se=total.se, ci95=total.ci95,
                       n=replicates.n, valid=replicates.valid, reasons=replicates.reasons, detail=detail,
                       dof=total.dof)
