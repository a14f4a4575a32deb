"""The certificate of analysis of a released lot, as PDF bytes (reportlab platypus, A4).

Pure: a dossier and the signer's data in, bytes out; no file is read or written except the
font files. The digital signature is added afterwards by :mod:`pipeline.records.signing`; the
visible block drawn here shows what 21 CFR 11.50 asks a signed record to show: printed name,
date and time, and the meaning of the signature. A certificate awaiting approval keeps an empty
box for the approving person's stamp, which their signature draws there (nothing else is drawn in it).
"""

from __future__ import annotations

import io
from functools import lru_cache
from typing import Any

from reportlab.lib import colors
from reportlab.lib.pagesizes import A4
from reportlab.lib.units import mm
from reportlab.pdfbase.pdfmetrics import stringWidth
from reportlab.pdfgen.canvas import Canvas
from reportlab.platypus import (
    BaseDocTemplate,
    Flowable,
    Frame,
    KeepTogether,
    PageTemplate,
    Spacer,
    Table,
    TableStyle,
)

from pipeline.documents.text import (
    HEAD_FILL,
    HOLD_INK,
    INK,
    MUTED,
    PASS_INK,
    RULE,
    Paragraph,
    build_pdf,
    caution_markup,
    clean,
    draw_paragraph,
    escape,
    get,
    markup,
    mpara,
    num,
    para,
    short_hash,
    styles,
)
from pipeline.errors import InputError
from pipeline.release.signature import (
    APPROVAL_FIELD,
    APPROVAL_SLOT_CAPTION,
    APPROVAL_SLOT_TITLE,
    SignatureSlot,
)
from pipeline.vocabulary import Disposition, Verdict

KINETIC_CODES = ("km", "vmax", "kcat", "kcat_over_km")
SIGNATURE_KEYS = ("signer_name", "signed_at_local", "signed_at_utc", "meaning", "certificate_fingerprint")
PAGE_W, PAGE_H = A4
MARGIN_X = 18 * mm
CONTENT_W = PAGE_W - 2 * MARGIN_X
SLOT_HEIGHT = 35 * mm  # the box kept for an approval's stamp: seven lines of 8 pt Courier (10 pt apart) and margins


def _check(dossier: dict[str, Any], signature: dict[str, Any]) -> None:
    decision = get(dossier, "decision", {})
    disposition = get(decision, "disposition")
    lot = clean(get(get(dossier, "lot", {}), "lot_id", "?"), 60)
    if disposition not in (Disposition.RELEASED, Disposition.READY_FOR_RELEASE):
        raise InputError(f"lot {lot}: a certificate of analysis is issued only for a released lot or one ready for release; "
                         f"this lot's disposition is {clean(disposition, 60)!r}")
    if not isinstance(signature, dict):
        raise InputError(f"lot {lot}: the signature data must be a mapping with {', '.join(SIGNATURE_KEYS)}")
    missing = [k for k in SIGNATURE_KEYS if not str(signature.get(k) or "").strip()]
    if missing:
        raise InputError(f"lot {lot}: the certificate's signature block lacks {', '.join(missing)}; "
                         f"all of {', '.join(SIGNATURE_KEYS)} are required")


@lru_cache(maxsize=8192)
def _cleaned_fit(cell: str, available: float, font: str, size: float) -> tuple[str, bool]:
    """``clean(cell)`` and whether it fits on one line of ``available`` points.

    Remembered: most cells of a night's tables ("ok", "—", "yes", window bounds, counts)
    are values already seen.
    """
    text = clean(cell)
    return text, stringWidth(text, font, size) <= available


def _fit(cell: Any, available: float, style: Any) -> Any:
    """A plain-text cell stays a (cheap) string while it fits its column, else it wraps as a Paragraph."""
    if not isinstance(cell, str) or not cell:
        return cell
    text, fits = _cleaned_fit(cell, available, style.fontName, style.fontSize)
    return text if fits else Paragraph(escape(text), style)


def grid_table(rows: list[list[Any]], widths: list[float], header: bool = True, zebra: bool = False,
               col_styles: dict[int, str] | None = None, extra: list[tuple[Any, ...]] | None = None) -> Table:
    """A ruled table; str cells are data shown literally (a Table never parses them as markup).

    ``col_styles`` gives some columns another paragraph style ("cellb", "mono"); ``extra``
    adds TableStyle commands (colours, spans).
    """
    st = styles()
    body, head = st["cell"], st["head"]
    by_col = {j: st[name] for j, name in (col_styles or {}).items()}

    def style_of(i: int, j: int) -> Any:
        return head if header and i == 0 else by_col.get(j, body)

    fitted = [[_fit(cell, widths[j] - 8, style_of(i, j)) for j, cell in enumerate(row)] for i, row in enumerate(rows)]
    t = Table(fitted, colWidths=widths, repeatRows=1 if header else 0)
    cmds: list[tuple[Any, ...]] = [
        ("FONT", (0, 0), (-1, -1), body.fontName, body.fontSize, body.leading),
        ("TEXTCOLOR", (0, 0), (-1, -1), body.textColor),
        ("VALIGN", (0, 0), (-1, -1), "TOP"),
        ("LEFTPADDING", (0, 0), (-1, -1), 4),
        ("RIGHTPADDING", (0, 0), (-1, -1), 4),
        ("TOPPADDING", (0, 0), (-1, -1), 2.5),
        ("BOTTOMPADDING", (0, 0), (-1, -1), 2.5),
        ("LINEBELOW", (0, 0), (-1, -1), 0.4, RULE),
    ]
    cmds += [("FONT", (j, 1 if header else 0), (j, -1), sty.fontName, sty.fontSize, sty.leading)
             for j, sty in by_col.items()]
    if header:
        cmds += [("FONT", (0, 0), (-1, 0), head.fontName, head.fontSize, head.leading),
                 ("TEXTCOLOR", (0, 0), (-1, 0), head.textColor)]
    if header:
        cmds += [("BACKGROUND", (0, 0), (-1, 0), HEAD_FILL), ("LINEBELOW", (0, 0), (-1, 0), 0.8, MUTED)]
    if zebra:
        cmds += [("ROWBACKGROUNDS", (0, 1), (-1, -1), [colors.white, colors.HexColor("#f7f9fb")])]
    t.setStyle(TableStyle(cmds + list(extra or [])))
    return t


def method_label(dossier: dict[str, Any], method_id: Any) -> str:
    """"LIP-PNPB v1.2" from the method id and the decision's method versions (plain text)."""
    if method_id is None:
        return ""
    version = get(get(get(dossier, "decision", {}), "method_versions", {}), str(method_id))
    return f"{clean(method_id, 40)} v{clean(version, 20)}" if version is not None else clean(method_id, 40)


_VERDICT_WORDS = {Verdict.PASS: "complies", Verdict.REPORTED: "for information", Verdict.FAIL: "DOES NOT COMPLY",
                  Verdict.INVALID: "INVALID ASSAY", Verdict.MISSING: "NOT TESTED"}


def _result_rows(dossier: dict[str, Any]) -> tuple[list[list[Any]], list[tuple[Any, ...]]]:
    colours: list[tuple[Any, ...]] = []
    rows: list[list[Any]] = [["Attribute", "Method", "Specification", "Result", "Verdict"]]
    verdicts = [v for v in get(dossier, "verdicts", []) if isinstance(v, dict)]
    def has_limit(v: dict[str, Any]) -> bool:  # "report" (or nothing): reported without a limit
        return str(get(v, "limit_text", "")).strip() not in ("", "report")

    limited = [v for v in verdicts if has_limit(v)]
    info = [v for v in verdicts if not has_limit(v) and get(v, "code") in KINETIC_CODES]
    for v, is_info in [(v, False) for v in limited] + [(v, True) for v in info]:
        verdict = str(get(v, "verdict", ""))
        word = "for information" if is_info else _VERDICT_WORDS.get(verdict, verdict)
        colour = PASS_INK if verdict == Verdict.PASS else (MUTED if is_info or verdict == Verdict.REPORTED else HOLD_INK)
        unit = clean(get(v, "unit", ""), 30)
        result = f"{clean(get(v, 'reported', num(get(v, 'value'))), 60)} {unit}".strip()
        if get(v, "code") == "km" and get(get(get(dossier, "kinetics", {}), "km_quality", {}), "well_determined") is False:
            result += " (poorly determined)"
        limit = f"{clean(get(v, 'limit_text', ''), 100)} {unit}".strip() if not is_info else "not specified"
        colours.append(("TEXTCOLOR", (4, len(rows)), (4, len(rows)), colour))
        rows.append([clean(get(v, "title", get(v, "code")), 120), method_label(dossier, get(v, "method")),
                     limit, result, word])
    if len(rows) == 1:
        rows.append(["No results in this dossier.", "", "", "", ""])
    return rows, colours


def key_value_table(rows: list[tuple[str, Any]], key_w: float, val_w: float, value_style: str = "body") -> Table:
    st = styles()
    data = [[Paragraph(escape(k), st["head"]), v if isinstance(v, Paragraph | Table) else para(v, value_style)]
            for k, v in rows]
    t = Table(data, colWidths=[key_w, val_w])
    t.setStyle(TableStyle([("VALIGN", (0, 0), (-1, -1), "TOP"), ("LEFTPADDING", (0, 0), (-1, -1), 0),
                           ("RIGHTPADDING", (0, 0), (-1, -1), 4), ("TOPPADDING", (0, 0), (-1, -1), 1.5),
                           ("BOTTOMPADDING", (0, 0), (-1, -1), 1.5)]))
    return t


class _SlotBox(Flowable):
    """An empty framed box kept for a later signature's stamp; remembers where it was drawn.

    Nothing but its frame is drawn inside it, so a stamp placed in it covers no text.
    """

    def __init__(self, width: float, height: float) -> None:
        super().__init__()
        self.width, self.height = width, height
        self.drawn_at: tuple[int, tuple[float, float, float, float]] | None = None

    def wrap(self, available_width: float, available_height: float) -> tuple[float, float]:
        return self.width, self.height

    def draw(self) -> None:
        canvas = self.canv
        canvas.saveState()
        canvas.setStrokeColor(MUTED)
        canvas.setLineWidth(0.6)
        canvas.setDash(3, 2)
        canvas.rect(0, 0, self.width, self.height, stroke=1, fill=0)
        canvas.restoreState()
        x, y = canvas.absolutePosition(0, 0)
        self.drawn_at = (canvas.getPageNumber() - 1, (x, y, x + self.width, y + self.height))


def _approval_rows(slot: _SlotBox) -> list[list[Any]]:
    """The reserved approval: its heading, what it means for the certificate, and the empty box."""
    st = styles()
    return [[Spacer(1, 4)], [Paragraph(escape(APPROVAL_SLOT_TITLE), st["h3"])],
            [Paragraph(f"<b>{escape(APPROVAL_SLOT_CAPTION)}</b>", st["cell"])], [slot]]


def _signature_block(signature: dict[str, Any], slot: _SlotBox | None) -> Table:
    st = styles()
    system = signature.get("signer_kind") == "system"
    title = "Electronic signature of the lotgate system (not a person)" if system else \
        "Electronic signature (21 CFR 11.50)"
    inner = key_value_table([
        ("Signed by" if system else "Signed by (printed name)", para(signature["signer_name"], "cellb", 120)),
        ("Date and time", mpara("{local}<br/>{utc}", "cell", local=signature["signed_at_local"],
                                utc=signature["signed_at_utc"])),
        ("Meaning of the signature", para(signature["meaning"], "cell", 600)),
        ("Certificate fingerprint", para(signature["certificate_fingerprint"], "mono", 200)),
    ], 44 * mm, CONTENT_W - 44 * mm - 16)
    rows = [[Paragraph(escape(title), st["h3"])], [inner],
            [Paragraph("The digital signature embedded in this file (PAdES) carries the signer's certificate; "
                       "verify it with any PDF signature validator. A printed copy is not a signed record.",
                       st["note"])]]
    if slot is not None:
        rows += _approval_rows(slot)
    box = Table(rows, colWidths=[CONTENT_W])
    box.setStyle(TableStyle([("BOX", (0, 0), (-1, -1), 1.0, INK), ("LEFTPADDING", (0, 0), (-1, -1), 8),
                             ("RIGHTPADDING", (0, 0), (-1, -1), 8), ("TOPPADDING", (0, 0), (-1, -1), 3),
                             ("BOTTOMPADDING", (0, 0), (-1, -1), 4),
                             ("BACKGROUND", (0, 0), (-1, -1), colors.HexColor("#fbfbf8"))]))
    return box


def _caution_box(dossier: dict[str, Any]) -> Table:
    st = styles()
    box = Table([[Paragraph(caution_markup(get(dossier, "caution", "")), st["caution"])]], colWidths=[CONTENT_W])
    box.setStyle(TableStyle([("BOX", (0, 0), (-1, -1), 0.6, MUTED), ("LEFTPADDING", (0, 0), (-1, -1), 6),
                             ("RIGHTPADDING", (0, 0), (-1, -1), 6), ("TOPPADDING", (0, 0), (-1, -1), 4),
                             ("BOTTOMPADDING", (0, 0), (-1, -1), 5)]))
    return box


def _footer(dossier: dict[str, Any], document: str) -> Any:
    lot = get(dossier, "lot", {})
    plant = get(dossier, "plant", {})
    revision = get(get(dossier, "decision", {}), "revision", 0)

    def draw(canvas: Canvas, page: int, total: int) -> None:
        st = styles()
        canvas.saveState()
        canvas.setStrokeColor(RULE)
        canvas.setLineWidth(0.5)
        canvas.line(MARGIN_X, 16 * mm, PAGE_W - MARGIN_X, 16 * mm)
        left = Paragraph(markup("{plant} · {doc} · lot {lot}", plant=get(plant, "name", ""), doc=document,
                                lot=get(lot, "lot_id", "")), st["footer"])
        right = Paragraph(markup("revision {rev} · page {p} of {t}", rev=revision, p=page, t=total),
                          st["footer"].clone("footer_r", alignment=2))
        draw_paragraph(canvas, left, MARGIN_X, 14.5 * mm, CONTENT_W * 0.72)
        draw_paragraph(canvas, right, MARGIN_X + CONTENT_W * 0.72, 14.5 * mm, CONTENT_W * 0.28)
        canvas.restoreState()

    return draw


def doc_template(buffer: io.BytesIO, dossier: dict[str, Any], title: str, bottom: float) -> BaseDocTemplate:
    lot = get(dossier, "lot", {})
    doc = BaseDocTemplate(buffer, pagesize=A4, invariant=1, leftMargin=MARGIN_X, rightMargin=MARGIN_X,
                          topMargin=14 * mm, bottomMargin=bottom,
                          title=f"{title}: lot {clean(get(lot, 'lot_id', ''), 60)}",
                          author=clean(get(get(dossier, "plant", {}), "name", ""), 120),
                          subject=clean(get(lot, "product_name", ""), 120), creator="lotgate")
    frame = Frame(MARGIN_X, bottom, CONTENT_W, PAGE_H - 14 * mm - bottom, id="body",
                  leftPadding=0, rightPadding=0, topPadding=0, bottomPadding=0)
    doc.addPageTemplates([PageTemplate(id="page", frames=[frame])])
    return doc


def header_flowables(dossier: dict[str, Any], title: str) -> list[Any]:
    st = styles()
    lot = get(dossier, "lot", {})
    return [
        para(get(get(dossier, "plant", {}), "name", ""), "plant", 160),
        Paragraph(escape(title), st["title"]),
        mpara("{name} <font color='#5b6773'>({code})</font>", "subtitle", name=get(lot, "product_name", ""),
              code=get(lot, "product_code", "")),
        Spacer(1, 6),
    ]


def render_certificate(dossier: dict[str, Any], signature: dict[str, Any]) -> bytes:
    """The certificate of analysis of a lot released or ready for release, with its visible signature block.

    A lot ready for release says, beside the system's signature, that it is not valid for release
    until an authorised person signs in the box kept for it (see ``render_certificate_with_slot``).
    Raises InputError for another disposition or incomplete signature data.
    """
    return render_certificate_with_slot(dossier, signature)[0]


def render_certificate_with_slot(dossier: dict[str, Any],
                                 signature: dict[str, Any]) -> tuple[bytes, SignatureSlot | None]:
    """The certificate, and for a lot ready for release the box its approval's stamp goes in (else None)."""
    _check(dossier, signature)
    awaiting = get(get(dossier, "decision", {}), "disposition") == Disposition.READY_FOR_RELEASE
    slot = _SlotBox(CONTENT_W - 16, SLOT_HEIGHT) if awaiting else None
    st = styles()
    lot = get(dossier, "lot", {})
    decision = get(dossier, "decision", {})
    act = get(get(dossier, "methods", {}), "activity", {})
    prot = get(get(dossier, "methods", {}), "protein", {})
    story: list[Any] = header_flowables(dossier, "Certificate of analysis")
    rows, colours = _result_rows(dossier)
    story.append(key_value_table([
        ("Lot", para(get(lot, "lot_id"), "cellb", 80)),
        ("Product", mpara("{n} ({c})", "cell", n=get(lot, "product_name"), c=get(lot, "product_code"))),
        ("Manufactured on", para(get(lot, "manufactured_on"), "cell", 60)),
        ("Assay date", para(get(lot, "assay_date"), "cell", 60)),
        ("Disposition", mpara("<b>{d}</b>, decided {t}", "cell", d=get(decision, "label", Disposition.RELEASED),
                              t=get(decision, "decided_at_local"))
                        if not awaiting else
                        mpara("<b>{d}</b>, decided {t}; released only by the authorised person's signature in the "
                              "approval box at the end of this certificate", "cell",
                              d=get(decision, "label"), t=get(decision, "decided_at_local"))),
    ], 34 * mm, CONTENT_W - 34 * mm))
    story += [Paragraph("Results", st["h2"]),
              grid_table(rows, [50 * mm, 30 * mm, 30 * mm, 36 * mm, CONTENT_W - 146 * mm], zebra=True,
                         col_styles={0: "cellb", 4: "cellb"}, extra=colours),
              Spacer(1, 2),
              Paragraph("Results are rounded to the digits of the specification limit before comparison. "
                        "Kinetic constants are given for information and are not release criteria.", st["note"])]
    sha = get(decision, "spec_sha256", "")
    story += [Paragraph("Specification", st["h2"]), key_value_table([
        ("Version", mpara("{code} version {v}, effective from {eff}, approved by {who}", "cell",
                          code=get(lot, "product_code"), v=get(decision, "spec_version"),
                          eff=get(decision, "spec_effective_from"), who=get(decision, "spec_approved_by"))),
        ("SHA-256", mpara("{short}<br/><font size=6>{full}</font>", "mono", short=short_hash(sha), full=sha)),
    ], 34 * mm, CONTENT_W - 34 * mm)]
    story += [Paragraph("Assay conditions", st["h2"]), key_value_table([
        ("Activity method", mpara("{t} ({m})", "cell", t=get(act, "title"),
                                  m=method_label(dossier, get(act, "method_id")))),
        ("Conditions", mpara("{temp} °C, pH {ph}, read at {wl} nm", "cell", temp=num(get(act, "temperature_c"), 3),
                             ph=num(get(act, "ph"), 3), wl=num(get(act, "wavelength_nm"), 3))),
        ("Unit definition", para(get(act, "unit_definition"), "cell")),
        ("Protein method", mpara("{t} ({m})", "cell", t=get(prot, "title"),
                                 m=method_label(dossier, get(prot, "method_id")))),
    ], 34 * mm, CONTENT_W - 34 * mm)]
    story += [Spacer(1, 6), _caution_box(dossier), Spacer(1, 6), KeepTogether([_signature_block(signature, slot)])]
    buffer = io.BytesIO()
    doc = doc_template(buffer, dossier, "Certificate of analysis", 22 * mm)
    build_pdf(doc, story, _footer(dossier, "Certificate of analysis"))
    if slot is None:
        return buffer.getvalue(), None
    if slot.drawn_at is None:  # pragma: no cover - a flowable in the story is always drawn
        raise InputError(f"lot {clean(get(lot, 'lot_id', '?'), 60)}: the approval box was not laid out")
    page, (left, bottom, right, top) = slot.drawn_at
    box = (round(left, 2), round(bottom, 2), round(right, 2), round(top, 2))
    return buffer.getvalue(), SignatureSlot(APPROVAL_FIELD, page, box)
