"""System suitability and per-well computation of one plate (pure functions).

An activity plate carries a reference standard, substrate blanks (at the assay substrate and at
each kinetic level) and lot wells; a protein plate (``pipeline.assay.protein_plates``) carries a standard curve and lot
wells. A failed criterion invalidates exactly what it touches — a well, a lot's result, or the whole
plate — and says why (docs/assay-rules.md, "Assay validity"). Nothing is dropped without a stated reason.
"""

from __future__ import annotations

import datetime as dt
from dataclasses import dataclass, field
from typing import Any

import numpy as np
import pandas as pd

from pipeline.assay.plate_reads import LOT_ROLES
from pipeline.controlled.specs import (
    KineticMethod,
    PlateFormatSettings,
    declared_formats,
    format_settings,
)
from pipeline.errors import CalculationError, LotgateError
from pipeline.plain_data import to_plain
from pipeline.science import integrated_michaelis_menten, protein_readings, rates, units
from pipeline.science.combined_uncertainty import RelativeTerm, combined
from pipeline.science.measurement import Measurement

SUBSTRATE_MATCH_MM = 1e-6
# The reads per well a kinetic plate may have are capped by its export layout
# (``max_reads_per_well`` in schemas/kinetic-read.yaml): intake quarantines a larger export before
# any fit, so that one file cannot hold the night's memory.


@dataclass(frozen=True)
class KineticSeries:
    """A lot's initial rates against substrate, as U/mL of lot (blank-corrected)."""

    substrate_mm: tuple[float, ...]
    rate_u_per_ml: tuple[float, ...]
    excluded: tuple[str, ...] = ()
    valid: bool = True
    reasons: tuple[str, ...] = ()
    integrated: dict[str, Any] | None = None  # whole-curve cross-check (integrated Michaelis–Menten)


@dataclass(frozen=True)
class ActivityPlateResult:
    plate_id: str
    method_id: str
    method_version: str
    valid: bool
    reasons: tuple[str, ...]
    reference_recovery_pct: float | None
    blank_rate_au_per_min: float | None
    activity: dict[str, Measurement]
    kinetics: dict[str, KineticSeries]
    wells: dict[str, dict[str, Any]]  # well -> rate details, for the report
    traces: dict[str, dict[str, Any]] = field(default_factory=dict)  # a few progress curves per lot

    def summary(self) -> dict[str, Any]:
        return to_plain({"plate_id": self.plate_id, "method": f"{self.method_id} v{self.method_version}",
                       "method_id": self.method_id, "method_version": self.method_version, "kind": "activity",
                       "valid": self.valid, "reasons": list(self.reasons),
                       "reference_recovery_pct": self.reference_recovery_pct,
                       "blank_rate_au_per_min": self.blank_rate_au_per_min})


def replicate_measurement(name: str, unit: str, values: np.ndarray, cv_max_pct: float, what: str) -> Measurement:
    """Mean, SE = SD/√n and CV of replicate results; CV above the method limit invalidates."""
    n = int(values.size)
    if n == 0:
        return Measurement(name, unit, None, valid=False, reasons=(f"no usable replicate of {what}",))
    summary = protein_readings.replicate_summary(values)
    mean, cv = summary.mean, summary.cv_pct
    se = summary.se if n > 1 else None
    reasons: list[str] = []
    valid = True
    if n < 2:
        valid = False
        reasons.append(f"only {n} usable replicate of {what}; at least 2 are needed")
    elif cv > cv_max_pct:
        valid = False
        reasons.append(f"replicate CV {cv:.1f} % of {what} exceeds the method limit {cv_max_pct:.1f} %")
    dof = n - 1 if se is not None else None
    ci95 = combined(mean, [RelativeTerm(abs(se / mean), dof)]).ci95 if se is not None and dof and mean else None
    return Measurement(name, unit, mean, se=se, n=n, valid=valid, reasons=tuple(reasons),
                       detail={"replicates": [float(v) for v in values], "cv_pct": cv}, dof=dof, ci95=ci95)


def _reads_matrix(plate_id: str, reads: pd.DataFrame, wells: list[str]) -> tuple[np.ndarray, np.ndarray]:
    """Absorbance (W, T) on the plate's common read times (min); error if a well differs."""
    counts = reads["well"].value_counts()
    missing = [w for w in wells if w not in counts.index]
    if missing:
        raise CalculationError(f"plate {plate_id}: the kinetic read has no data for mapped well(s) {', '.join(missing[:8])}")
    if counts.loc[wells].nunique() != 1:
        odd = counts.loc[wells].idxmin()
        raise CalculationError(f"plate {plate_id}: well {odd} has {counts[odd]} reads, other wells {counts.loc[wells].max()}")
    order = {w: i for i, w in enumerate(wells)}
    subset = reads[reads["well"].isin(order)]
    key = subset["well"].map(order).to_numpy()
    time_s = subset["time_s"].to_numpy(dtype=float)
    sort = np.lexsort((time_s, key))
    n_reads = int(counts.loc[wells].iloc[0])
    times = time_s[sort].reshape(len(wells), n_reads)
    matrix = subset["absorbance"].to_numpy(dtype=float)[sort].reshape(len(wells), n_reads)
    if n_reads < 2 or np.any(np.diff(times[0]) <= 0):
        raise CalculationError(f"plate {plate_id}: well {wells[0]} read times do not increase")
    differs = np.flatnonzero(np.any(np.abs(times - times[0]) > 0.5, axis=1))
    if differs.size:
        raise CalculationError(f"plate {plate_id}: well {wells[differs[0]]} was read at other times than well {wells[0]}")
    return times[0] / 60.0, matrix


def rate_settings(method: KineticMethod) -> rates.RateWindowSettings:
    """The method's initial-rate rules (docs/assay-rules.md, "Initial rates")."""
    w = method.rate_window
    return rates.RateWindowSettings(
        min_points=w.min_points, linear_limit_au=w.linear_limit_au, max_conversion=w.max_conversion_pct / 100.0,
        max_slope_change=w.max_slope_change, curvature_alpha=w.curvature_alpha,
        shape_action=rates.ShapeAction(w.lag_burst_action), blank_window_min=w.blank_window_min)


def _activity_u_per_ml(method: KineticMethod, well: PlateFormatSettings, rate_au_per_min: np.ndarray,
                       dilution: np.ndarray) -> np.ndarray:
    """Activity with the light path and volumes of the plate's format (``well``)."""
    return np.asarray(units.activity_u_per_ml(
        rate_au_per_min, method.epsilon_per_mm_per_cm, well.path_length_cm,
        well.reaction_volume_ml, well.sample_volume_ml, dilution))


def _invalid_plate(plate_id: str, method: KineticMethod, lots: list[str], reasons: list[str]) -> ActivityPlateResult:
    activity = {lot: Measurement("activity", "U/mL", None, valid=False, reasons=tuple(reasons)) for lot in lots}
    kinetics = {lot: KineticSeries((), (), valid=False, reasons=tuple(reasons)) for lot in lots}
    return ActivityPlateResult(plate_id, method.method_id, method.document.version, False, tuple(reasons),
                               None, None, activity, kinetics, {})


def evaluate_activity_plate(plate_id: str, plate_map: pd.DataFrame, reads: pd.DataFrame,
                            method: KineticMethod, assay_date: dt.date | None) -> ActivityPlateResult:
    """Rates, blanks, reference recovery, lot activities and kinetic series of one plate.

    activity [U/mL] = (ΔA/min − blank ΔA/min) / (ε·l) · V_reaction / V_sample · DF, with the path
    length l and the volumes the method declares for the plate's format (96 or 384 wells);
    recovery [%] = mean reference activity / assigned activity · 100, against the reference
    standard lot valid on the plate's assay date.
    """
    used = plate_map[plate_map["role"] != "empty"].reset_index(drop=True)
    lots = sorted({str(x) for x in used.loc[used["role"].isin(LOT_ROLES), "lot_id"].dropna()})
    plate_format = int(plate_map["plate_format"].iloc[0])
    well_settings = format_settings(method, plate_format)
    if well_settings is None:
        return _invalid_plate(plate_id, method, lots, [
            f"plate {plate_id}: method {method.method_id} v{method.document.version} declares no settings for "
            f"{plate_format}-well plates (it declares {', '.join(map(str, declared_formats(method)))})"])
    reference = method.reference_on(assay_date) if assay_date is not None else None
    if reference is None:
        return _invalid_plate(plate_id, method, lots, [
            f"plate {plate_id}: no reference standard lot of method {method.method_id} v{method.document.version} "
            f"is valid on the assay date {assay_date or '(unknown: no registered lot on the plate)'}"])
    reasons: list[str] = []
    wavelengths = sorted(set(int(x) for x in reads["wavelength_nm"]))
    if wavelengths != [int(method.wavelength_nm)]:
        reasons.append(f"read at {', '.join(map(str, wavelengths))} nm; method {method.method_id} requires {method.wavelength_nm:.0f} nm")
    temps = reads["temperature_c"].to_numpy(dtype=float)
    if np.any(np.abs(temps - method.temperature_c) > 1.0):
        reasons.append(f"read at {temps.min():.1f}–{temps.max():.1f} °C; method requires {method.temperature_c:.1f} ± 1.0 °C")
    if reasons:
        return _invalid_plate(plate_id, method, lots, reasons)
    wells = used["well"].tolist()
    try:
        time_min, absorbance = _reads_matrix(plate_id, reads, wells)
        blank_names = used.loc[used["role"] == "blank", "well"].tolist()
        well_rates = rates.initial_rates(time_min, absorbance, wells, rate_settings(method), blank_wells=blank_names,
                                         substrate_mm=used["substrate_mm"].to_numpy(dtype=float),
                                         au_per_mm=method.epsilon_per_mm_per_cm * well_settings.path_length_cm)
    except LotgateError as exc:
        return _invalid_plate(plate_id, method, lots, [str(exc)])
    by_well = {r.well: r for r in well_rates}
    plate = _Columns(used, by_well)
    details = {w: {**by_well[w].to_dict(), "role": role, "lot_id": lot, "substrate_mm": sub}
               for w, role, lot, sub in zip(plate.wells, plate.roles, plate.lots, plate.substrate_list, strict=True)}

    # Blank at the assay substrate concentration: needed for every activity on the plate.
    assay_blanks = plate.blanks_at(method.assay_substrate_mm)
    plate_reasons: list[str] = []
    blank_rate = None
    if assay_blanks.size == 0:
        plate_reasons.append(f"no substrate blank at the assay concentration {method.assay_substrate_mm:g} mM")
    elif not plate.ok[assay_blanks].all():
        bad = [plate.wells[i] for i in assay_blanks if not plate.ok[i]]
        plate_reasons.append(f"substrate blank well(s) {', '.join(bad)} have no usable rate: {by_well[bad[0]].reason}")
    else:
        blank_rate = float(plate.slope[assay_blanks].mean())
        if blank_rate > method.blank_rate_max_au_per_min:
            plate_reasons.append(f"substrate blank rate {blank_rate:.4f} AU/min exceeds the limit {method.blank_rate_max_au_per_min:.4f} AU/min")

    recovery = None
    refs = np.flatnonzero(plate.roles == "reference")
    if not plate_reasons:
        if refs.size == 0:
            plate_reasons.append(f"no reference standard ({reference.lot}) on the plate")
        elif set(plate.lots[refs]) - {"", reference.lot}:  # a map that names its reference wells' lot is checked
            found = ", ".join(sorted({str(x) for x in plate.lots[refs]} - {""}))
            plate_reasons.append(f"the reference wells hold {found}; the reference standard lot valid on "
                                 f"{assay_date} is {reference.lot}")
        else:
            good = refs[plate.ok[refs]]
            if good.size < 2:
                plate_reasons.append(f"reference standard: only {good.size} of {refs.size} wells have a usable rate")
            else:
                ref_activity = _activity_u_per_ml(method, well_settings, plate.slope[good] - blank_rate,
                                                  plate.dilution[good])
                recovery = float(ref_activity.mean() / reference.assigned_u_per_ml * 100.0)
                if not method.recovery_min_pct <= recovery <= method.recovery_max_pct:
                    plate_reasons.append(
                        f"reference standard {reference.lot} recovered {recovery:.1f} % of its assigned "
                        f"{reference.assigned_u_per_ml:g} U/mL; the method allows "
                        f"{method.recovery_min_pct:g}–{method.recovery_max_pct:g} %")
    traces = _traces(plate, time_min, absorbance, by_well)
    if plate_reasons:
        result = _invalid_plate(plate_id, method, lots, [f"plate {plate_id}: {r}" for r in plate_reasons])
        return ActivityPlateResult(plate_id, method.method_id, method.document.version, False, result.reasons,
                                   recovery, blank_rate, result.activity, result.kinetics, details, traces)
    assert blank_rate is not None

    activity: dict[str, Measurement] = {}
    kinetics: dict[str, KineticSeries] = {}
    for lot in lots:
        samples = np.flatnonzero((plate.roles == "sample") & (plate.lots == lot))
        excluded = [f"well {plate.wells[i]}: {by_well[plate.wells[i]].reason}" for i in samples if not plate.ok[i]]
        good = samples[plate.ok[samples]]
        values = _activity_u_per_ml(method, well_settings, plate.slope[good] - blank_rate, plate.dilution[good])
        m = replicate_measurement("activity", "U/mL", values, method.replicate_cv_max_pct, f"lot {lot} activity")
        se, dof, ci95, blank_detail = _with_blank_share(m, method, well_settings, plate, assay_blanks, good)
        activity[lot] = Measurement(m.name, m.unit, m.value, se=se, n=m.n, valid=m.valid, dof=dof, ci95=ci95,
                                    reasons=(*m.reasons, *excluded) if not m.valid else m.reasons,
                                    detail={**m.detail, **blank_detail, "excluded_wells": excluded,
                                            "wells": [plate.wells[i] for i in good]})
        kinetics[lot] = with_integrated_check(_kinetic_series(lot, plate, method, well_settings, by_well), lot,
                                              plate, method, well_settings, time_min, absorbance)
    return ActivityPlateResult(plate_id, method.method_id, method.document.version, True, (), recovery,
                               blank_rate, activity, kinetics, details, traces)


def _with_blank_share(m: Measurement, method: KineticMethod, well: PlateFormatSettings, plate: _Columns, blanks: np.ndarray,
                      good: np.ndarray) -> tuple[float | None, float | None, tuple[float, float] | None, dict[str, Any]]:
    """The replicates' SE (n − 1 dof) with the mean blank's SE, which every replicate shares (nb − 1 dof).

    u_blank [U/mL] = SE(mean blank slope) / (ε·l) · V_reaction / V_sample · mean DF; the two by
    Welch–Satterthwaite (docs/assay-rules.md, "Specific activity and its uncertainty").
    """
    if m.value is None or m.se is None or m.dof is None or blanks.size < 2 or good.size == 0 or not m.value:
        return m.se, m.dof, m.ci95, {}
    blank_se = float(np.std(plate.slope[blanks], ddof=1) / np.sqrt(blanks.size))
    blank_u = float(_activity_u_per_ml(method, well, np.array([blank_se]), np.array([plate.dilution[good].mean()]))[0])
    total = combined(m.value, [RelativeTerm(abs(m.se / m.value), m.dof),
                               RelativeTerm(abs(blank_u / m.value), float(blanks.size - 1))])
    return total.se, total.dof, total.ci95, {"replicate_se": m.se, "blank_se_u_per_ml": blank_u}


class _Columns:
    """A plate map's used wells as numpy columns, with each well's rate (vectorised selections)."""

    def __init__(self, used: pd.DataFrame, by_well: dict[str, rates.WellRate]):
        self.wells = used["well"].tolist()
        self.roles = used["role"].to_numpy(dtype=object).astype(str)
        self.lots = np.array([x if isinstance(x, str) else "" for x in used["lot_id"]], dtype=object)
        self.substrate_list = [None if x is None or (isinstance(x, float) and np.isnan(x)) else float(x)
                               for x in used["substrate_mm"]]
        self.substrate = np.array([np.nan if x is None else x for x in self.substrate_list], dtype=float)
        self.dilution = used["dilution_factor"].to_numpy(dtype=float)
        self.slope = np.array([by_well[w].slope_au_per_min for w in self.wells], dtype=float)
        self.ok = np.array([by_well[w].ok for w in self.wells], dtype=bool)
        self._blank = self.roles == "blank"

    def blanks_at(self, level: float) -> np.ndarray:
        return np.flatnonzero(self._blank & (np.abs(self.substrate - level) < SUBSTRATE_MATCH_MM))


def _kinetic_series(lot: str, plate: _Columns, method: KineticMethod, well: PlateFormatSettings,
                    by_well: dict[str, rates.WellRate]) -> KineticSeries:
    wells = np.flatnonzero((plate.roles == "kinetic") & (plate.lots == lot))
    if wells.size == 0:
        return KineticSeries((), (), valid=False, reasons=(f"lot {lot}: no kinetic (substrate series) wells on the plate",))
    s_out: list[float] = []
    v_out: list[float] = []
    excluded: list[str] = []
    for level in np.unique(plate.substrate[wells]):
        group = wells[plate.substrate[wells] == level]
        blanks = plate.blanks_at(float(level))
        if blanks.size == 0 or not plate.ok[blanks].all():
            excluded.append(f"{float(level):g} mM: no usable substrate blank at this level")
            continue
        blank = float(plate.slope[blanks].mean())
        if blank > method.blank_rate_max_au_per_min:
            excluded.append(f"{float(level):g} mM: blank rate {blank:.4f} AU/min above the limit")
            continue
        for i in group:
            if not plate.ok[i]:
                excluded.append(f"well {plate.wells[i]} ({float(level):g} mM): {by_well[plate.wells[i]].reason}")
        good = group[plate.ok[group]]
        s_out.extend([float(level)] * good.size)
        v_out.extend(float(v) for v in _activity_u_per_ml(method, well, plate.slope[good] - blank, plate.dilution[good]))
    levels = len(set(s_out))
    if levels < 4:
        return KineticSeries(tuple(s_out), tuple(v_out), tuple(excluded), False,
                             (f"lot {lot}: only {levels} substrate levels with usable rates; at least 4 are needed",))
    return KineticSeries(tuple(s_out), tuple(v_out), tuple(excluded))


def with_integrated_check(series: KineticSeries, lot: str, plate: _Columns, method: KineticMethod,
                          well: PlateFormatSettings, time_min: np.ndarray, absorbance: np.ndarray) -> KineticSeries:
    """The series with the integrated Michaelis–Menten fit of the lot's usable substrate-series wells.

    A cross-check only (pipeline.science.integrated_michaelis_menten): a fit that fails is said so,
    never an error of the plate. Each well's substrate blank rate (at its level) is subtracted.
    """
    if not series.valid:
        return series
    wells = np.flatnonzero((plate.roles == "kinetic") & (plate.lots == lot) & plate.ok)
    blank = np.array([plate.slope[plate.blanks_at(float(level))].mean() for level in plate.substrate[wells]])
    a = absorbance[wells]
    stop = ~np.isfinite(a) | (a >= method.rate_window.linear_limit_au)
    usable = np.where(stop.any(axis=1), stop.argmax(axis=1), a.shape[1])
    au_per_mm = method.epsilon_per_mm_per_cm * well.path_length_cm
    vmax0 = float(np.nanmax(plate.slope[wells])) / au_per_mm * 1.5
    try:
        fit = integrated_michaelis_menten.fit_integrated(time_min, a, plate.substrate[wells], au_per_mm, blank,
                                                         usable, (vmax0, float(np.median(plate.substrate[wells]))))
        check: dict[str, Any] = fit.to_dict()
    except (LotgateError, ValueError, FloatingPointError, np.linalg.LinAlgError) as exc:
        check = {"failed": f"the whole-curve fit could not be made: {exc}"}
    return KineticSeries(series.substrate_mm, series.rate_u_per_ml, series.excluded, series.valid, series.reasons,
                         check)


def _traces(plate: _Columns, time_min: np.ndarray, absorbance: np.ndarray,
            by_well: dict[str, rates.WellRate]) -> dict[str, dict[str, Any]]:
    """Up to three progress curves per lot (lowest, middle, highest substrate), for the report."""
    out: dict[str, dict[str, Any]] = {}
    kinetic = plate.roles == "kinetic"
    times = [float(t) for t in time_min]
    for lot in sorted(set(plate.lots[kinetic]) - {""}):
        idx = np.flatnonzero(kinetic & (plate.lots == lot))
        idx = idx[np.argsort(plate.substrate[idx], kind="stable")]
        picks = idx[[0, idx.size // 2, idx.size - 1]]
        curves = []
        for i in picks:
            rate = by_well[plate.wells[i]].to_dict()  # JSON-clean: NaN already None
            curves.append({"well": plate.wells[i], "substrate_mm": float(plate.substrate[i]),
                           "absorbance": [float(a) if np.isfinite(a) else None for a in absorbance[i]],
                           **{k: rate[k] for k in ("window_start_min", "window_end_min", "slope_au_per_min",
                                                   "intercept_au", "flag")}})
        out[str(lot)] = {"time_min": times, "curves": curves}
    return out
