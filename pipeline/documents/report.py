"""The batch report of one lot, released or held, as PDF bytes (reportlab platypus, A4).

Audit-ready: the disposition with every reason, each result with its standard error and
interval, the validity of every plate, the kinetic fit and its charts, the trend, and the
identities (SHA-256) of every input, specification and method that produced the decision.
Pure: a dossier in, bytes out. The caution statement is printed on page 1 and in every footer.
"""

from __future__ import annotations

import io
from typing import Any

from reportlab.lib import colors
from reportlab.lib.units import mm
from reportlab.pdfgen.canvas import Canvas
from reportlab.platypus import CondPageBreak, KeepTogether, Spacer, Table, TableStyle

from pipeline.documents import charts
from pipeline.documents.certificate import (
    CONTENT_W,
    MARGIN_X,
    PAGE_W,
    doc_template,
    grid_table,
    header_flowables,
    key_value_table,
    method_label,
)
from pipeline.documents.kinetic_checks import kinetic_checks
from pipeline.documents.record_section import record_section
from pipeline.documents.text import (
    DASH,
    HOLD_FILL,
    HOLD_INK,
    MUTED,
    PASS_FILL,
    PASS_INK,
    RULE,
    Paragraph,
    Trusted,
    build_pdf,
    caution_markup,
    clean,
    draw_paragraph,
    escape,
    fixed,
    get,
    interval,
    markup,
    mpara,
    num,
    para,
    styles,
    value_pm,
)
from pipeline.vocabulary import Disposition, TrendStatus, Verdict

_VERDICT_COLOURS = {Verdict.PASS: PASS_INK, Verdict.REPORTED: MUTED}


def _items(values: Any) -> list[Any]:
    return list(values) if isinstance(values, list | tuple) else []


def _yes_no(value: Any, yes: str = "yes", no: str = "NO") -> str:
    return DASH if value is None else (yes if value else no)


def _bullets(reasons: list[Any], style: str = "cell") -> list[Paragraph]:
    return [Paragraph("•&nbsp;" + escape(r, 600), styles()[style]) for r in reasons]


def _reasons_cell(reasons: list[Any]) -> Any:
    st = styles()
    if not reasons:
        return Paragraph(DASH, st["cell"])
    return Paragraph("<br/>".join("• " + escape(r, 400) for r in reasons), st["cell"])


# ---------------------------------------------------------------- disposition


def _disposition_box(dossier: dict[str, Any]) -> Table:
    st = styles()
    decision = get(dossier, "decision", {})
    released = get(decision, "disposition") in (Disposition.RELEASED, Disposition.READY_FOR_RELEASE)
    ink, fill = (PASS_INK, PASS_FILL) if released else (HOLD_INK, HOLD_FILL)
    label = get(decision, "label", get(decision, "disposition", "undecided"))
    rows: list[list[Any]] = [[mpara("<font color='#{c}'>Disposition: {label}</font>", st["boxtitle"],
                                    c=Trusted(ink.hexval()[2:]), label=label)]]
    categories = _items(get(decision, "hold_categories", []))
    if categories:
        rows.append([mpara("<b>Hold categories:</b> {c}", "body", c=", ".join(clean(c, 60) for c in categories))])
    reasons = _items(get(decision, "reasons", []))
    if reasons:
        rows.append([Paragraph(f"<b>Reasons ({len(reasons)}):</b>", st["body"])])
        rows += [[p] for p in _bullets(reasons, "body")]
    elif released:
        rows.append([Paragraph("Every required test is valid, within specification and in trend."
                               + (" Not released until an authorised person approves it."
                                  if get(decision, "disposition") == Disposition.READY_FOR_RELEASE else ""), st["body"])])
    else:
        rows.append([Paragraph("No reason was recorded for this hold: review the decision log.", st["body"])])
    rows.append([mpara("Decided {local} ({utc}) · revision {rev}", "note", local=get(decision, "decided_at_local"),
                       utc=get(decision, "decided_at_utc"), rev=get(decision, "revision", 0))])
    box = Table(rows, colWidths=[CONTENT_W])
    box.setStyle(TableStyle([("BOX", (0, 0), (-1, -1), 1.6, ink), ("BACKGROUND", (0, 0), (-1, -1), fill),
                             ("LEFTPADDING", (0, 0), (-1, -1), 9), ("RIGHTPADDING", (0, 0), (-1, -1), 9),
                             ("TOPPADDING", (0, 0), (-1, -1), 1.5), ("BOTTOMPADDING", (0, 0), (-1, -1), 1.5),
                             ("TOPPADDING", (0, 0), (-1, 0), 7), ("BOTTOMPADDING", (0, -1), (-1, -1), 7)]))
    return box


# ---------------------------------------------------------------- results


def _results(dossier: dict[str, Any]) -> list[Any]:
    st = styles()
    measurements = get(dossier, "measurements", {})
    head = ["Attribute and method", "Limit", "Reported", "Value ± SE", "95 % interval", "n", "Verdict"]
    rows: list[list[Any]] = [list(head)]
    extra: list[tuple[Any, ...]] = []
    for v in [v for v in _items(get(dossier, "verdicts", [])) if isinstance(v, dict)]:
        m = get(measurements, str(get(v, "code", "")), {})
        verdict = str(get(v, "verdict", ""))
        colour = _VERDICT_COLOURS.get(verdict, HOLD_INK)
        value = get(v, "value", get(m, "value"))
        se = get(v, "se", get(m, "se"))
        unit = clean(get(v, "unit", ""), 30)
        extra.append(("TEXTCOLOR", (6, len(rows)), (6, len(rows)), colour))
        method = method_label(dossier, get(v, "method"))
        rows.append([
            mpara("<b>{t}</b><br/><font size=6.8 color='#5b6773'>{m}</font>", "cell",
                  t=get(v, "title", get(v, "code")), m=method) if method else clean(get(v, "title", get(v, "code")), 100),
            clean(get(v, "limit_text", ""), 80) or "none",
            f"{clean(get(v, 'reported'), 40)} {unit}".strip(),
            value_pm(value, se) if not isinstance(value, str) else clean(value, 60),
            interval(get(m, "ci95")),
            clean(get(m, "n", DASH), 10),
            clean(verdict.upper(), 20),
        ])
        notes = _items(get(v, "reasons", [])) + [r for r in _items(get(m, "reasons", []))
                                                  if r not in _items(get(v, "reasons", []))]
        if notes:
            rows.append([_reasons_cell(notes)] + [""] * 6)
            extra.append(("SPAN", (0, len(rows) - 1), (-1, len(rows) - 1)))
    widths = [36 * mm, 20 * mm, 26 * mm, 29 * mm, 29 * mm, 8 * mm]
    t = grid_table(rows, [*widths, CONTENT_W - sum(widths)], col_styles={0: "cellb", 6: "cellb"}, extra=extra)
    return [Paragraph("Results", st["h2"]), t,
            Paragraph("Reported: rounded to the digits of the limit, as compared. Value ± SE: unrounded, with its "
                      "standard error; the interval is the 95 % confidence interval where one was computed.",
                      st["note"])]


# ---------------------------------------------------------------- validity


def _plates(dossier: dict[str, Any]) -> list[Any]:
    st = styles()
    out: list[Any] = [Paragraph("Assay validity", st["h2"])]
    plates = [p for p in _items(get(dossier, "plates", [])) if isinstance(p, dict)]
    if not plates:
        out.append(Paragraph("No plate of this lot was read for this revision: its results are taken from the lot "
                             "record (below, with the plates and files each came from)."
                             if _items(get(get(dossier, "record", {}), "attributes", [])) else
                             "No plate results in this dossier.", st["body"]))
    known = {"plate_id", "method", "valid", "reasons", "reference_recovery_pct", "blank_rate_au_per_min",
             "curve_accepted", "curve_r2", "method_version"}
    rows: list[list[Any]] = [["Plate", "Method", "Valid", "Criteria", "Reasons"]]
    extra: list[tuple[Any, ...]] = []
    for p in plates:
        crit: list[str] = []
        if "reference_recovery_pct" in p:
            crit.append(f"reference recovery {num(get(p, 'reference_recovery_pct'))} %")
        if "blank_rate_au_per_min" in p:
            crit.append(f"blank rate {num(get(p, 'blank_rate_au_per_min'), 3)} AU/min")
        if "curve_accepted" in p:
            crit.append(f"standard curve accepted: {_yes_no(get(p, 'curve_accepted'))}")
        if "curve_r2" in p:
            crit.append(f"curve R² {num(get(p, 'curve_r2'), 5)}")
        for key in sorted(k for k in p if k not in known and isinstance(p[k], str | int | float | bool | None)):
            crit.append(f"{clean(key, 40).replace('_', ' ')}: {clean(num(p[key]) if isinstance(p[key], float) else p[key], 60)}")
        valid = get(p, "valid")
        extra.append(("TEXTCOLOR", (2, len(rows)), (2, len(rows)), PASS_INK if valid else HOLD_INK))
        rows.append([clean(get(p, "plate_id"), 40), clean(get(p, "method"), 40), _yes_no(valid),
                     Paragraph("<br/>".join(escape(c, 120) for c in crit) or DASH, st["cell"]),
                     _reasons_cell(_items(get(p, "reasons", [])))])
    if plates:
        out.append(grid_table(rows, [24 * mm, 28 * mm, 12 * mm, 52 * mm, CONTENT_W - 116 * mm],
                              col_styles={0: "cellb", 2: "cellb"}, extra=extra))
    out += _protein_curve(get(dossier, "protein_curve"))
    out += _protein_scatter(get(get(get(get(dossier, "measurements", {}), "protein", {}), "detail", {}), "repeatability"))
    out += _windows(get(dossier, "wells"), get(dossier, "traces"))
    return out


def _protein_curve(curve: Any) -> list[Any]:
    st = styles()
    out: list[Any] = [Paragraph("Protein standard curve", st["h3"])]
    if not isinstance(curve, dict):
        return out + [Paragraph("No standard curve in this dossier.", st["body"])]
    params = ", ".join(num(p, 5) for p in _items(get(curve, "params", [])))
    out.append(mpara("Model {m}, parameters [{p}], R² {r2}, calibrated range {lo} to {hi} mg/mL, accepted: <b>{a}</b>",
                     "body", m=get(curve, "model"), p=params, r2=num(get(curve, "r2"), 5),
                     lo=num(get(curve, "range_low_mg_per_ml")), hi=num(get(curve, "range_high_mg_per_ml")),
                     a=_yes_no(get(curve, "accepted"))))
    out += _bullets(_items(get(curve, "reasons", [])), "body")
    if get(curve, "calibrators") is not None:
        out.append(mpara("{k} of {n} standards kept on {lv} levels; excluded and refitted without:", "body",
                         k=get(curve, "calibrators_kept"), n=get(curve, "calibrators"), lv=get(curve, "levels_kept"))
                   if _items(get(curve, "exclusions", [])) else
                   mpara("All {n} standards kept on {lv} levels.", "body", n=get(curve, "calibrators"),
                         lv=get(curve, "levels_kept")))
        out += _bullets(_items(get(curve, "exclusions", [])), "body")
    rows: list[list[Any]] = [["Nominal (mg/mL)", "Back-calculated (mg/mL)", "Bias (%)", "Within limit"]]
    extra: list[tuple[Any, ...]] = []
    for b in [b for b in _items(get(curve, "back_calculated", [])) if isinstance(b, dict)]:
        ok = get(b, "within_limit")
        extra.append(("TEXTCOLOR", (3, len(rows)), (3, len(rows)), PASS_INK if ok or ok is None else HOLD_INK))
        rows.append([num(get(b, "nominal_mg_per_ml")), num(get(b, "back_calculated_mg_per_ml")),
                     num(get(b, "bias_pct"), 3), _yes_no(ok)])
    samples = [s for s in _items(get(curve, "samples", [])) if isinstance(s, dict)]
    srows: list[list[Any]] = [["Sample well", clean(get(curve, "signal_heading") or "Signal", 24), "Dilution",
                               "Protein (mg/mL)", "In range"]]
    for s in samples:
        srows.append([clean(get(s, "well"), 20), num(get(s, "signal")),
                      num(get(s, "dilution_factor")), num(get(s, "mg_per_ml")),
                      _yes_no(get(s, "in_range"))])
    half = (CONTENT_W - 6 * mm) / 2
    left = (grid_table(rows, [half * 0.25, half * 0.32, half * 0.18, half * 0.25], col_styles={3: "cellb"}, extra=extra)
            if len(rows) > 1 else Spacer(1, 1))
    right = grid_table(srows, [half * 0.17, half * 0.25, half * 0.18, half * 0.22, half * 0.18]) if samples else Spacer(1, 1)
    pair = Table([[left, right]], colWidths=[half + 3 * mm, half + 3 * mm])
    pair.setStyle(TableStyle([("VALIGN", (0, 0), (-1, -1), "TOP"), ("LEFTPADDING", (0, 0), (-1, -1), 0),
                              ("RIGHTPADDING", (0, 0), (-1, -1), 0)]))
    return out + [Spacer(1, 3), pair]


def _protein_scatter(note: Any) -> list[Any]:
    """Whose scatter gave this lot's protein SE: the plate's pooled repeatability, or its own."""
    if not isinstance(note, dict):
        return []
    if get(note, "own") is not None:
        return [mpara("Protein replicate SE from this lot's own replicates, not the plate's pooled repeatability: "
                      "{why}.", "body", why=get(note, "own"))]
    return [mpara("Protein replicate SE from the plate's pooled repeatability: CV {cv} % with {dof} degrees of freedom "
                  "over lots {lots} (this lot's own replicates alone: SE {own} mg/mL).", "body",
                  cv=num(get(note, "pooled_cv_pct"), 3), dof=get(note, "dof"),
                  lots=", ".join(str(x) for x in _items(get(note, "lots", []))), own=num(get(note, "own_se"), 3))]


def _windows(wells: Any, traces: Any) -> list[Any]:
    """Every well behind the lot's numbers: its role, window, slope ± SE, substrate converted, flag."""
    st = styles()
    out: list[Any] = [Paragraph("Initial-rate windows (every well behind this lot's activity)", st["h3"])]
    rows_in = [dict(w, well=name) for name, w in (wells or {}).items() if isinstance(w, dict)] if isinstance(wells, dict) else []
    if not rows_in:
        rows_in = [c for c in _items(get(traces, "curves", [])) if isinstance(c, dict)]
    if not rows_in:
        return out + [Paragraph("No kinetic wells in this dossier.", st["body"])]
    order = {"reference": 0, "blank": 1, "sample": 2, "kinetic": 3}
    rows_in.sort(key=lambda w: (order.get(str(get(w, "role")), 9), get(w, "substrate_mm") or 0.0, str(get(w, "well"))))
    rows: list[list[Any]] = [["Well", "Role", "[S] (mM)", "Window (min)", "n", "Slope ± SE (AU/min)", "Conv. %",
                              "Flag / note"]]
    extra: list[tuple[Any, ...]] = []
    for w in rows_in:
        flag = get(w, "flag")
        note = get(w, "reason") or ""
        if flag:
            extra.append(("TEXTCOLOR", (7, len(rows)), (7, len(rows)), HOLD_INK))
        window = (f"{num(get(w, 'window_start_min'), 3)}–{num(get(w, 'window_end_min'), 3)}"
                  if get(w, "window_start_min") is not None else DASH)
        slope, se, converted = get(w, "slope_au_per_min"), get(w, "slope_se_au_per_min"), get(w, "conversion_pct")
        role = str(get(w, "role") or "")
        shaped = get(w, "slope_kind") == "steady-state"
        rows.append([clean(get(w, "well"), 8), clean(role, 12), num(get(w, "substrate_mm"), 3), window,
                     clean(get(w, "n_points"), 4),
                     DASH if not isinstance(slope, float) else
                     f"{fixed(slope, 4)} ± {se:.4f}" if isinstance(se, float) else fixed(slope, 4),
                     DASH if not isinstance(converted, float) else f"{converted:.1f}",
                     clean(f"{flag}: {note}" if flag else (note if "excluded" in note or shaped else "ok"), 160)])
    out.append(Paragraph("Each window starts at the first read and ends before the method's limit on substrate "
                         "converted; its slope is a quadratic's slope at the first read. Substrate blanks get a "
                         "straight line over their whole read and are judged by their rate against the method's "
                         "limit (docs/assay-rules.md).", st["small"] if "small" in st else st["body"]))
    return out + [grid_table(rows, [12 * mm, 18 * mm, 14 * mm, 18 * mm, 8 * mm, 34 * mm, 15 * mm, CONTENT_W - 119 * mm],
                             col_styles={0: "cellb"}, extra=extra)]


# ---------------------------------------------------------------- kinetics


def _kinetics(dossier: dict[str, Any]) -> list[Any]:
    st = styles()
    out: list[Any] = [CondPageBreak(60 * mm), Paragraph("Kinetic constants", st["h2"])]
    k = get(dossier, "kinetics")
    if not isinstance(k, dict):
        return out + [Paragraph("No kinetic data in this dossier.", st["body"])]
    fit = get(k, "fit")
    quality = get(k, "km_quality", {})
    out.append(mpara("Model: <b>{m}</b>{flag}", "body", m=get(k, "model"),
                     flag=Trusted(" (flagged)" if get(k, "flagged") else "")))
    if get(k, "reason"):
        out.append(mpara("Model choice: {r}", "body", r=get(k, "reason")))
    out.append(mpara("Km determination: <b>{w}</b>. {r}", "body",
                     w="well determined" if get(quality, "well_determined") else "poorly determined",
                     r=get(quality, "reason", "")))
    rows: list[list[Any]] = [["Quantity", "Value ± SE", "95 % interval", "Unit"]]
    if isinstance(fit, dict):
        rows.append(["Vmax (fit, per mL of lot)", value_pm(get(fit, "vmax"), get(fit, "vmax_se")),
                     interval(get(fit, "vmax_ci95")), "U/mL"])
        rows.append(["Km (fit)", value_pm(get(fit, "km"), get(fit, "km_se")), interval(get(fit, "km_ci95")), "mM"])
    measurements = get(dossier, "measurements", {})
    for key in ("vmax", "km", "kcat", "kcat_over_km"):
        m = get(measurements, key)
        if isinstance(m, dict) and not (key == "km" and isinstance(fit, dict)):
            rows.append([clean(get(m, "name", key), 60), value_pm(get(m, "value"), get(m, "se")),
                         interval(get(m, "ci95")), clean(get(m, "unit"), 30)])
    out.append(grid_table(rows, [50 * mm, 45 * mm, 45 * mm, CONTENT_W - 140 * mm], col_styles={0: "cellb"}))
    if isinstance(fit, dict):
        out.append(mpara("cov(Vmax, Km) = {cov}; residual SE {rse} U/mL on {dof} degrees of freedom; n = {n}; "
                         "converged: {conv}.", "note", cov=num(get(fit, "cov_vmax_km")), rse=num(get(fit, "residual_se")),
                         dof=get(fit, "dof"), n=get(fit, "n"), conv=_yes_no(get(fit, "converged"))))
        out += kinetic_checks(k)
    else:
        out.append(Paragraph("No fit: the data could not support kinetic constants.", st["body"]))
    return out


def _charts(dossier: dict[str, Any]) -> list[Any]:
    st = styles()
    curve = get(dossier, "protein_curve")
    return [
        CondPageBreak(90 * mm), Paragraph("Charts", st["h2"]),
        KeepTogether([charts.standard_curve_chart(curve, get(curve, "samples", []))]), Spacer(1, 8),
        KeepTogether([charts.michaelis_menten_chart(get(dossier, "kinetics")),
                      Paragraph("Band: pointwise 95 % confidence band of the fitted curve by the delta method, "
                                "t(0.975, dof)·√(gᵀCg).", st["note"])]), Spacer(1, 8),
        KeepTogether([charts.progress_curves_chart(get(dossier, "traces"))]),
    ]


# ---------------------------------------------------------------- trend and traceability


def _trend(dossier: dict[str, Any]) -> list[Any]:
    st = styles()
    out: list[Any] = [CondPageBreak(50 * mm), Paragraph("Trend", st["h2"])]
    findings = [f for f in _items(get(dossier, "trend", [])) if isinstance(f, dict)]
    if not findings:
        out.append(Paragraph("No trend findings in this dossier.", st["body"]))
    else:
        rows: list[list[Any]] = [["Attribute", "Status", "Centre", "σ", "Limits v.", "Baseline n", "Signals and lots"]]
        extra: list[tuple[Any, ...]] = []
        for f in findings:
            status = str(get(f, "status", ""))
            colour = HOLD_INK if status == TrendStatus.OUT_OF_TREND else (PASS_INK if status == TrendStatus.IN_TREND else MUTED)
            signals = _items(get(f, "signals", []))
            lots = _items(get(f, "lots_involved", []))
            text = "<br/>".join(["• " + escape(s, 300) for s in signals] +
                                ([markup("lots: {l}", l=", ".join(clean(x, 30) for x in lots))] if lots else [])) or DASH
            extra.append(("TEXTCOLOR", (1, len(rows)), (1, len(rows)), colour))
            rows.append([clean(get(f, "attribute"), 60), clean(status, 60), num(get(f, "center")), num(get(f, "sigma")),
                         clean(get(f, "limits_version", DASH), 20), clean(get(f, "baseline_n", DASH), 20),
                         Paragraph(text, st["cell"])])
        out.append(grid_table(rows, [30 * mm, 26 * mm, 17 * mm, 15 * mm, 15 * mm, 16 * mm, CONTENT_W - 119 * mm],
                              col_styles={0: "cellb", 1: "cellb"}, extra=extra))
    for chart in [c for c in _items(get(dossier, "trend_charts", [])) if isinstance(c, dict)]:
        out += [Spacer(1, 8), KeepTogether([charts.imr_chart(chart)])]
    return out


def _traceability(dossier: dict[str, Any]) -> list[Any]:
    st = styles()
    decision = get(dossier, "decision", {})
    out: list[Any] = [CondPageBreak(50 * mm), Paragraph("Traceability", st["h2"])]
    rows: list[list[Any]] = [["Record", "Version / name", "SHA-256"]]
    rows.append(["Specification", f"{clean(get(get(dossier, 'lot', {}), 'product_code'), 40)} "
                                  f"v{clean(get(decision, 'spec_version'), 20)}", clean(get(decision, "spec_sha256"), 100)])
    versions = get(decision, "method_versions", {})
    shas = get(decision, "method_sha256", {})
    for mid in sorted(set(versions) | set(shas)) if isinstance(versions, dict) and isinstance(shas, dict) else []:
        rows.append(["Method", f"{clean(mid, 40)} v{clean(get(versions, mid, DASH), 20)}", clean(get(shas, mid), 100)])
    files = get(decision, "input_files", {})
    for name in sorted(files) if isinstance(files, dict) else []:
        rows.append(["Input file", clean(name, 160), clean(files[name], 100)])
    out.append(grid_table(rows, [25 * mm, 45 * mm, CONTENT_W - 70 * mm], col_styles={0: "cellb", 2: "mono"}))
    out.append(Spacer(1, 4))
    out.append(key_value_table([("Code version", para(get(decision, "code_version"), "mono", 100)),
                    ("Decision fingerprint", para(get(decision, "fingerprint"), "mono", 100)),
                    ("Decided at", mpara("{l} · {u}", "cell", l=get(decision, "decided_at_local"),
                                         u=get(decision, "decided_at_utc"))),
                    ("Revision", para(get(decision, "revision", 0), "cell"))], 38 * mm, CONTENT_W - 38 * mm))
    out.append(Paragraph("Same input files, specification, methods and code version give the same fingerprint, "
                         "the same numbers and the same disposition.", st["note"]))
    return out


# ---------------------------------------------------------------- the document


FOOTER_H = 26 * mm


def _footer(dossier: dict[str, Any]) -> Any:
    lot = get(dossier, "lot", {})
    revision = get(get(dossier, "decision", {}), "revision", 0)
    st = styles()
    # The caution is the same on every page: parsed and wrapped once, drawn on each page.
    caution = Paragraph(escape(get(dossier, "caution", ""), 600), st["footer"])  # four lines at most
    line_style = st["footer"].clone("footer_b", fontSize=7, textColor=colors.black)

    def draw(canvas: Canvas, page: int, total: int) -> None:
        canvas.saveState()
        canvas.setStrokeColor(RULE)
        canvas.setLineWidth(0.5)
        top = FOOTER_H - 4 * mm
        canvas.line(MARGIN_X, top, PAGE_W - MARGIN_X, top)
        used = draw_paragraph(canvas, caution, MARGIN_X, top - 2, CONTENT_W)
        line = Paragraph(markup("Batch report · lot {lot} · {code} · revision {rev} · page {p} of {t}",
                                lot=get(lot, "lot_id", ""), code=get(lot, "product_code", ""), rev=revision,
                                p=page, t=total), line_style)
        draw_paragraph(canvas, line, MARGIN_X, top - 4 - used, CONTENT_W)
        canvas.restoreState()

    return draw


def render_batch_report(dossier: dict[str, Any]) -> bytes:
    """The batch report of one lot (every lot gets one, held lots included), as PDF bytes."""
    st = styles()
    lot = get(dossier, "lot", {})
    story: list[Any] = header_flowables(dossier, "Batch report")
    story.append(key_value_table([("Lot", para(get(lot, "lot_id"), "cellb", 80)),
                      ("Dates", mpara("manufactured {m} · assayed {a}", "cell", m=get(lot, "manufactured_on"),
                                      a=get(lot, "assay_date"))),
                      ("Plant", mpara("{n} (time zone {z})", "cell", n=get(get(dossier, "plant", {}), "name"),
                                      z=get(get(dossier, "plant", {}), "time_zone")))],
                     30 * mm, CONTENT_W - 30 * mm))
    story += [Spacer(1, 6), _disposition_box(dossier), Spacer(1, 6)]
    caution = Table([[Paragraph(caution_markup(get(dossier, "caution", "")), st["caution"])]], colWidths=[CONTENT_W])
    caution.setStyle(TableStyle([("BOX", (0, 0), (-1, -1), 0.6, MUTED), ("LEFTPADDING", (0, 0), (-1, -1), 6),
                                 ("RIGHTPADDING", (0, 0), (-1, -1), 6), ("TOPPADDING", (0, 0), (-1, -1), 4),
                                 ("BOTTOMPADDING", (0, 0), (-1, -1), 5)]))
    story.append(caution)
    story += _results(dossier)
    story += _plates(dossier)
    story += _kinetics(dossier)
    story += _charts(dossier)
    story += _trend(dossier)
    story += record_section(dossier)
    story += _traceability(dossier)
    buffer = io.BytesIO()
    doc = doc_template(buffer, dossier, "Batch report", FOOTER_H)
    build_pdf(doc, story, _footer(dossier))
    return buffer.getvalue()
