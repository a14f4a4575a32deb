"""Everything the batch report and the certificate show about one lot, as plain data (pure)."""

from __future__ import annotations

import datetime as dt
from typing import Any
from zoneinfo import ZoneInfo

from pipeline.controlled.specs import KineticMethod, ProteinMethod, Specification
from pipeline.plain_data import to_plain
from pipeline.release.decision import LotDecision

CAUTION = (
    "Caution: this document supports, and never replaces, the authorised person who decides on a "
    "lot. Results, limits, methods and decision rules must follow the plant's validated procedures "
    "and licensed specifications and local GMP and food- or pharma-safety regulation; an "
    "out-of-specification or out-of-trend result calls for an investigation under those procedures "
    "before any disposition."
)


def local_time_text(moment: dt.datetime, time_zone: str) -> str:
    """'2026-11-27 23:14:05 CET (UTC+01:00)' for a time-zone-aware moment."""
    local = moment.astimezone(ZoneInfo(time_zone))
    offset = local.strftime("%z")
    return f"{local:%Y-%m-%d %H:%M:%S} {local.tzname()} (UTC{offset[:3]}:{offset[3:]})"


def build_dossier(item: LotDecision, spec: Specification, activity_method: KineticMethod | None,
                  protein_method: ProteinMethod | None, *, plant_name: str, time_zone: str,
                  revision: int, decided_at: dt.datetime,
                  revisions: tuple[dict[str, Any], ...] = (), decided_by: str = "lotgate (nightly job)") -> dict[str, Any]:
    """``revisions``: the lot's earlier revisions (revision, decided_at_utc, decided_by, label); this one is added."""
    evaluation, decision = item.evaluation, item.decision
    this = {"revision": revision, "decided_at_utc": decided_at.astimezone(dt.UTC).isoformat(timespec="seconds"),
            "decided_by": decided_by, "label": decision.label}
    return to_plain({
        "plant": {"name": plant_name, "time_zone": time_zone},
        "lot": {"lot_id": evaluation.lot_id, "product_code": spec.product_code, "product_name": spec.product_name,
                "manufactured_on": evaluation.manufactured_on, "assay_date": evaluation.assay_date},
        "decision": {**decision.to_dict(), "label": decision.label, "revision": revision,
                     "spec_effective_from": spec.document.effective_from.isoformat(),
                     "spec_approved_by": spec.document.approved_by,
                     "decided_at_utc": decided_at.astimezone(dt.UTC).isoformat(timespec="seconds"),
                     "decided_at_local": local_time_text(decided_at, time_zone)},
        "verdicts": [v.to_dict() for v in evaluation.verdicts],
        "measurements": {k: m.to_dict() for k, m in evaluation.measurements.items()},
        "kinetics": evaluation.kinetics,
        "protein_curve": evaluation.report.get("protein_curve"),
        "traces": evaluation.report.get("traces"),
        "wells": evaluation.report.get("wells"),
        "plates": list(evaluation.plates),
        "trend": [f.to_dict() for f in item.trend],
        "trend_charts": list(item.charts),
        "methods": {
            "activity": None if activity_method is None else {
                "method_id": activity_method.method_id, "version": activity_method.document.version,
                "title": activity_method.title, "wavelength_nm": activity_method.wavelength_nm,
                "temperature_c": activity_method.temperature_c, "ph": activity_method.ph,
                "unit_definition": activity_method.unit_definition,
                "sample_preparation": activity_method.sample_preparation},
            "protein": None if protein_method is None else {
                "method_id": protein_method.method_id, "version": protein_method.document.version,
                "title": protein_method.title},
        },
        "record": None if item.record is None else item.record.to_dict(),
        "revisions": [*revisions, this],
        "caution": CAUTION,
    })
