"""What the documents' shortcuts must never change: a document is the same whatever was rendered before.

The renderers keep a few things per process (parsed paragraph markup, whether a cell's text
fits its column, embedded font subsets and their compressed form) and a paragraph keeps its
last wrap. These tests render with those memories empty and full, in different orders, and
compare bytes; and they check that a paragraph copied from a parsed one is independent of it.
"""

from __future__ import annotations

import copy
from typing import Any

from reportlab.pdfbase import pdfmetrics

from pipeline.documents import certificate, render_batch_report, render_certificate, text
from pipeline.documents.text import Paragraph, fonts, styles
from tests.dossiers import SIGNATURE


def forget_everything() -> None:
    """Empty every per-process memory of the documents package."""
    text._parsed.cache_clear()
    text._deflate.cache_clear()
    certificate._cleaned_fit.cache_clear()
    for name in fonts():
        face = pdfmetrics.getFont(name).face
        if hasattr(face, "_subset_file"):
            face._subset_file.cache_clear()


def other_lot(dossier: dict[str, Any]) -> dict[str, Any]:
    """Another lot with other characters, other reasons and a long table: other subsets, other cells."""
    d = copy.deepcopy(dossier)
    d["lot"]["lot_id"] = "ZQ-9/éøß"
    d["decision"].update(disposition="held", label="held: out of specification",
                         reasons=[f"reason {i}: Ω ≥ {i}·σ <b>not bold</b> & so on " * 3 for i in range(40)])
    d["verdicts"][0]["title"] = "A title long enough to need wrapping in its narrow column " * 2
    return d


def test_a_report_is_the_same_with_empty_or_full_memories(dossier: dict[str, Any]) -> None:
    forget_everything()
    cold = render_batch_report(dossier)
    render_batch_report(other_lot(dossier))
    render_certificate(dossier, SIGNATURE)
    assert render_batch_report(dossier) == cold
    forget_everything()
    render_batch_report(other_lot(dossier))
    assert render_batch_report(dossier) == cold


def test_a_certificate_is_the_same_with_empty_or_full_memories(dossier: dict[str, Any]) -> None:
    forget_everything()
    cold = render_certificate(dossier, SIGNATURE)
    render_batch_report(other_lot(dossier))
    assert render_certificate(dossier, SIGNATURE) == cold
    released_other = other_lot(dossier)
    released_other["decision"].update(disposition="released", label="released")
    render_certificate(released_other, SIGNATURE)
    assert render_certificate(dossier, SIGNATURE) == cold


def test_a_long_held_report_is_the_same_with_empty_or_full_memories(dossier: dict[str, Any]) -> None:
    long_lot = other_lot(dossier)  # its reasons run over a page: paragraphs and tables split
    forget_everything()
    cold = render_batch_report(long_lot)
    render_batch_report(dossier)
    assert render_batch_report(long_lot) == cold


def test_paragraphs_of_the_same_text_do_not_share_their_fragments() -> None:
    markup = "<b>Lipase activity</b><br/><font size=6.8 color='#5b6773'>LIP-PNPB v1.2</font> and more words"
    a, b = Paragraph(markup, styles()["cell"]), Paragraph(markup, styles()["cell"])
    assert a.frags is not b.frags and not {id(f) for f in a.frags} & {id(f) for f in b.frags}
    assert a.wrap(40, 1000) != b.wrap(400, 1000)  # b's lines are its own
    assert b.wrap(400, 1000) == Paragraph(markup, styles()["cell"]).wrap(400, 1000)


def test_a_paragraph_rewrapped_to_another_width_breaks_as_a_fresh_one() -> None:
    words = "Every required test is valid, within specification and in trend. " * 4
    p = Paragraph(words, styles()["body"])
    wide, narrow = p.wrap(400, 1000), p.wrap(90, 1000)
    assert narrow[1] > wide[1]
    assert p.wrap(400, 1000) == wide == Paragraph(words, styles()["body"]).wrap(400, 1000)
    assert p.wrap(90, 1000) == narrow == Paragraph(words, styles()["body"]).wrap(90, 1000)
