"""Visible signatures on a certificate: a reserved, empty signature field and the stamp that fills it.

The certificate's layout keeps a box free for a person's approval (``release.signature.SignatureSlot``).
When the system signs the prepared certificate, ``reserve_field`` adds an empty signature field over
that box, in the same revision the system's signature covers, whose appearance says that the approval
is not yet given. A person's approval later fills that field (``approval_stamp``): pyHanko draws the
stamp into the field's box and replaces the empty appearance. Filling an existing signature field is
form filling in pyHanko's modification analysis, so the system's signature stays valid and
``lotgate verify`` accepts the update.

The stamps use the PDF standard font Courier (no font file to embed; its widths are exact, so the
text is fitted to the box correctly). It can show Latin-1 only: other letters lose their accents or
become "?" on the stamp; the signature itself carries the certificate's exact name.
"""

from __future__ import annotations

import unicodedata

from pyhanko.pdf_utils import generic
from pyhanko.pdf_utils.incremental_writer import IncrementalPdfFileWriter
from pyhanko.pdf_utils.layout import AxisAlignment, BoxConstraints, Margins, SimpleBoxLayoutRule
from pyhanko.pdf_utils.text import TextBoxStyle
from pyhanko.sign import fields
from pyhanko.stamp import TextStamp, TextStampStyle

from pipeline.release.signature import APPROVAL_SLOT_TITLE, SignatureSlot

STAMP_TEXT_PARAMETER = "stamp_lines"
_FONT_SIZE = 8
_LEADING = 10
_EMPTY_INK = (0.36, 0.40, 0.45)  # the certificate's muted grey
_STAMP_INK = (0.11, 0.15, 0.20)  # the certificate's ink


_PLAIN_LETTERS = str.maketrans({"Ł": "L", "ł": "l", "Đ": "D", "đ": "d", "Ħ": "H", "ħ": "h", "ı": "i", "Œ": "OE",
                                "œ": "oe", "—": "-", "–": "-", "‘": "'", "’": "'", "“": '"', "”": '"', "…": "..."})


def _latin1(char: str) -> bool:
    return " " <= char <= "~" or "\xa0" <= char <= "\xff"


def stamp_safe(text: str) -> str:
    """``text`` in the characters Courier can show (Latin-1): other letters without their accents, else '?'."""
    shown = []
    for char in text.translate(_PLAIN_LETTERS):
        if char == "\n" or _latin1(char):
            shown.append(char)
            continue
        base = "".join(c for c in unicodedata.normalize("NFKD", char) if not unicodedata.combining(c))
        shown.append(base if base and all(_latin1(c) for c in base) else "?")
    return "".join(shown)


def _style(ink: tuple[float, float, float]) -> TextStampStyle:
    left_top = SimpleBoxLayoutRule(x_align=AxisAlignment.ALIGN_MIN, y_align=AxisAlignment.ALIGN_MID,
                                   margins=Margins(8, 8, 4, 4))
    return TextStampStyle(stamp_text=f"%({STAMP_TEXT_PARAMETER})s", border_width=0, background=None,
                          inner_content_layout=left_top,
                          text_box_style=TextBoxStyle(font_size=_FONT_SIZE, leading=_LEADING, text_color=ink))


def approval_stamp(lines: tuple[str, ...]) -> tuple[TextStampStyle, dict[str, str]]:
    """The stamp style and text parameters that show ``lines`` in a signature field's box."""
    return _style(_STAMP_INK), {STAMP_TEXT_PARAMETER: stamp_safe("\n".join(lines))}


def reserve_field(writer: IncrementalPdfFileWriter, slot: SignatureSlot) -> None:
    """Add ``slot`` to ``writer`` as an empty, printable signature field showing ``slot.empty_lines``."""
    left, bottom, right, top = slot.box_pt
    fields.append_signature_field(writer, fields.SigFieldSpec(
        slot.field_name, on_page=slot.page_index, box=(left, bottom, right, top),  # type: ignore[arg-type]
        readable_field_name=APPROVAL_SLOT_TITLE))
    width, height = right - left, top - bottom
    empty = TextStamp(writer, _style(_EMPTY_INK), {STAMP_TEXT_PARAMETER: stamp_safe("\n".join(slot.empty_lines))},
                      box=BoxConstraints(width=width, height=height))
    field = _field(writer, slot.field_name)
    appearance = generic.DictionaryObject({generic.NameObject("/N"): writer.add_object(empty.as_form_xobject())})
    field[generic.NameObject("/AP")] = appearance
    writer.update_container(field)


def _field(writer: IncrementalPdfFileWriter, name: str) -> generic.DictionaryObject:
    for field_ref in writer.root["/AcroForm"]["/Fields"]:
        field = field_ref.get_object()
        if field.get("/T") == name:
            return field
    raise LookupError(f"signature field {name} was not added")  # pragma: no cover - append_signature_field adds it
