"""The batch report's lot record: each attribute's results across nights with their standing, and every revision.

Plain dossier in, reportlab flowables out; nothing here reads the store.
"""

from __future__ import annotations

from typing import Any

from reportlab.lib.units import mm
from reportlab.platypus import CondPageBreak

from pipeline.documents.certificate import CONTENT_W, grid_table
from pipeline.documents.text import DASH, HOLD_INK, MUTED, PASS_INK, Paragraph, clean, get, styles
from pipeline.vocabulary import ResultStatus

_STANDING_INK = {ResultStatus.VALID: PASS_INK, ResultStatus.INVALID: HOLD_INK, ResultStatus.SUPERSEDED: MUTED,
                 ResultStatus.INVALIDATED: MUTED}


def _list(value: Any) -> list[Any]:
    return [v for v in value if isinstance(v, dict)] if isinstance(value, list) else []


def record_section(dossier: dict[str, Any]) -> list[Any]:
    """'Lot record' (results in order, the reportable one marked) and 'Revisions' (every decision of the lot)."""
    st = styles()
    record = get(dossier, "record", {})
    attributes = _list(get(record, "attributes", []))
    out: list[Any] = [CondPageBreak(40 * mm), Paragraph("Lot record", st["h2"])]
    rows: list[list[Any]] = [["Attribute", "Tested", "From", "Result", "Verdict", "Standing"]]
    extra: list[tuple[Any, ...]] = []
    for attribute in attributes:
        results = _list(get(attribute, "results", []))
        chosen = get(attribute, "reportable_index")
        if not results:
            rows.append([clean(get(attribute, "title"), 60), DASH, DASH, "no result yet", DASH, DASH])
            continue
        for index, result in enumerate(results):
            status = str(get(result, "status", ""))
            standing = status + (" — reportable" if index == chosen else "")
            why = get(result, "status_reason")
            extra.append(("TEXTCOLOR", (5, len(rows)), (5, len(rows)), _STANDING_INK.get(status, MUTED)))
            rows.append([clean(get(attribute, "title"), 60) if index == 0 else "",
                         clean(get(result, "tested_on"), 12), clean(get(result, "source"), 60),
                         f"{clean(get(result, 'reported'), 40)} {clean(get(result, 'unit', ''), 20)}".strip() or DASH,
                         clean(str(get(result, "verdict", "")).upper(), 12),
                         Paragraph(clean(standing, 40) + (f"<br/><font size=6.5>{clean(why, 200)}</font>" if why else ""),
                                   st["cell"])])
    widths = [30 * mm, 21 * mm, 40 * mm, 24 * mm, 21 * mm]
    out.append(grid_table(rows, [*widths, CONTENT_W - sum(widths)], col_styles={0: "cellb"}, extra=extra))
    awaited = _list(get(record, "awaited", []))
    if awaited:
        text = "; ".join(f"{clean(get(a, 'title'), 60)} (" + (f"due by {clean(get(a, 'due_on'), 12)}"
                                                               + (", OVERDUE" if get(a, "overdue") else "")
                                                               if get(a, "due_on") else "due with the lot's data") + ")"
                         for a in awaited)
        out.append(Paragraph(f"Awaited: {text}.", st["note"]))
    out.append(Paragraph("Results accumulate across nights and are never overwritten. An invalid result is superseded "
                         "by the next valid result of the test; an out-of-specification result stands until an "
                         "authorised person records an investigation outcome; results are never averaged across an "
                         "OOS result and a retest.", st["note"]))
    revisions = _list(get(dossier, "revisions", []))
    out += [Paragraph("Revisions", st["h2"])]
    rev_rows: list[list[Any]] = [["Rev.", "Decided (UTC)", "By", "Disposition"]]
    for r in revisions:
        when = str(get(r, "decided_at_utc", "")).replace("T", " ").replace("+00:00", " UTC")
        rev_rows.append([clean(get(r, "revision"), 6), clean(when, 30), clean(get(r, "decided_by"), 60),
                         clean(get(r, "label"), 80)])
    widths = [12 * mm, 40 * mm, 50 * mm]
    out.append(grid_table(rev_rows, [*widths, CONTENT_W - sum(widths)], col_styles={0: "cellb"}))
    return out
