"""The certificate of analysis and the batch report: content, hostile text, determinism, charts.

The fixture ``tests/fixtures/dossier_example.json`` is invented demo data.
"""

from __future__ import annotations

import copy
import io
from typing import Any

import pytest
from pypdf import PdfReader
from reportlab.graphics.shapes import Drawing, Group, String

from pipeline.documents import charts, render_batch_report, render_certificate
from pipeline.documents.text import clean, escape, fixed, num, value_pm
from pipeline.errors import InputError
from tests.dossiers import SIGNATURE


def pages_text(pdf: bytes) -> list[str]:
    return [page.extract_text() or "" for page in PdfReader(io.BytesIO(pdf)).pages]


def flat(text: str) -> str:
    """White space collapsed to single spaces (lines wrap where the layout decides)."""
    return " ".join(text.split())


def dense(text: str) -> str:
    """All white space removed (long words are broken across lines without any added character)."""
    return "".join(text.split())


def held(dossier: dict[str, Any]) -> dict[str, Any]:
    d = copy.deepcopy(dossier)
    d["decision"].update(
        disposition="held", label="held: out of specification, invalid assay",
        hold_categories=["out of specification", "invalid assay"],
        reasons=["Specific activity 141 U/mg is below the limit 150 – 260 U/mg",
                 "plate P-1127-A: reference recovery 84.2 % is outside 90–110 %",
                 "Lipase activity: no valid result (plate P-1127-A invalid)"])
    d["verdicts"][2].update(value=141.2, reported="141", verdict="fail",
                            reasons=["Specific activity 141 U/mg is below the limit 150 – 260 U/mg"])
    d["plates"][0].update(valid=False, reference_recovery_pct=84.2,
                          reasons=["reference recovery 84.2 % is outside 90–110 %"])
    d["kinetics"]["km_quality"] = {"well_determined": False, "reason": "Km 9.1 mM lies above the highest substrate level 6.4 mM"}
    return d


# ---------------------------------------------------------------- certificate


def test_certificate_shows_lot_spec_caution_and_signature(dossier: dict[str, Any]) -> None:
    pdf = render_certificate(dossier, SIGNATURE)
    assert pdf.startswith(b"%PDF-")
    text = flat(" ".join(pages_text(pdf)))
    for expected in ("Certificate of analysis", "Tarnwick Bioprocess, Plant 2 (demo)", "L2611-0427",
                     "Lipase liquid concentrate L200", "LLC-200", "released", "version 3.1",
                     "effective from 2026-06-01", "Head of Quality (demo)", "30 °C, pH 7.5",
                     dossier["methods"]["activity"]["unit_definition"], flat(dossier["caution"]),
                     SIGNATURE["signer_name"], SIGNATURE["signed_at_local"], SIGNATURE["signed_at_utc"],
                     SIGNATURE["meaning"], "21 CFR 11.50", "revision 1", "page 1 of 1"):
        assert expected in text, expected
    assert SIGNATURE["certificate_fingerprint"] in dense(text)
    assert dossier["decision"]["spec_sha256"] in dense(text)


def test_certificate_results_are_limited_attributes_plus_kinetics_for_information(dossier: dict[str, Any]) -> None:
    dossier["verdicts"].append({"code": "colour", "title": "Colour (visual)", "unit": "", "value": "amber",
                                "reported": "amber", "se": None, "limit_text": "", "verdict": "reported",
                                "reasons": [], "method": None})
    text = flat(" ".join(pages_text(render_certificate(dossier, SIGNATURE))))
    for title in ("Lipase activity", "Total protein", "Specific activity", "Lead", "Salmonella",
                  "Michaelis constant Km", "Turnover number kcat"):
        assert title in text, title
    assert "for information" in text
    assert "Colour (visual)" not in text  # no limit and not a kinetic constant
    assert "1043 U/mL" in text and "≥ 800 U/mL" in text


def test_certificate_says_when_km_is_poorly_determined(dossier: dict[str, Any]) -> None:
    dossier["kinetics"]["km_quality"] = {"well_determined": False, "reason": "Km above the tested range"}
    assert "0.362 mM (poorly determined)" in flat(" ".join(pages_text(render_certificate(dossier, SIGNATURE))))


def test_certificate_refuses_a_held_lot(dossier: dict[str, Any]) -> None:
    with pytest.raises(InputError, match="only for a released lot"):
        render_certificate(held(dossier), SIGNATURE)


@pytest.mark.parametrize("missing", ["signer_name", "signed_at_local", "meaning", "certificate_fingerprint"])
def test_certificate_requires_every_signature_field(dossier: dict[str, Any], missing: str) -> None:
    signature = {**SIGNATURE, missing: "  "}
    with pytest.raises(InputError, match=missing):
        render_certificate(dossier, signature)


# ---------------------------------------------------------------- batch report


def test_report_of_a_released_lot_is_traceable(dossier: dict[str, Any]) -> None:
    pdf = render_batch_report(dossier)
    pages = pages_text(pdf)
    assert len(pages) >= 2
    text = flat(" ".join(pages))
    for expected in ("Batch report", "L2611-0427", "Disposition: released", "3.1", "Assay validity",
                     "reference recovery 98.6 %", "Kinetic constants", "well determined", "Trend",
                     "I-MR chart: Specific activity", "rule 1", dossier["decision"]["code_version"],
                     "1158.4 ± 8.3", "1140 to 1176"):  # Vmax ± SE and its 95 % interval from the fixture
        assert expected in text, expected
    for name, sha in dossier["decision"]["input_files"].items():
        assert name in text and sha in dense(text), name
    for sha in dossier["decision"]["method_sha256"].values():
        assert sha in dense(text)
    assert dossier["decision"]["fingerprint"] in dense(text)
    caution = flat(dossier["caution"])
    for number, page in enumerate(pages, start=1):  # the caution is in every page's footer
        assert caution in flat(page), f"caution missing on page {number}"
        assert f"page {number} of {len(pages)}" in flat(page)


def test_report_of_a_held_lot_gives_every_reason(dossier: dict[str, Any]) -> None:
    d = held(dossier)
    text = flat(" ".join(pages_text(render_batch_report(d))))
    assert "held: out of specification, invalid assay" in text
    for reason in d["decision"]["reasons"]:
        assert flat(reason) in text, reason
    assert "reference recovery 84.2 % is outside 90–110 %" in text
    assert "poorly determined" in text and "Km 9.1 mM lies above the highest substrate level" in text
    assert "FAIL" in text


def test_report_prints_with_every_optional_part_absent(dossier: dict[str, Any]) -> None:
    d = held(dossier)
    d.update(kinetics=None, protein_curve=None, traces=None, plates=[], trend=[], trend_charts=[],
             methods={"activity": None, "protein": None}, measurements={})
    text = flat(" ".join(pages_text(render_batch_report(d))))
    assert "No kinetic data in this dossier." in text
    assert "No standard curve in this dossier." in text
    assert "No plate results in this dossier." in text
    assert d["decision"]["label"] in text
    released = copy.deepcopy(dossier)
    released.update(kinetics=None, methods={"activity": None, "protein": None}, verdicts=[], measurements={})
    text = flat(" ".join(pages_text(render_certificate(released, SIGNATURE))))
    assert "No results in this dossier." in text and SIGNATURE["signer_name"] in text


# ---------------------------------------------------------------- hostile text


HOSTILE_WORD = "X" * 5000
HOSTILE = "<b>bold</b> <font size=40>big</font> &amp; <para>p</para> tab\there ctl\x00\x07\x1bend"


def hostile(dossier: dict[str, Any]) -> dict[str, Any]:
    d = copy.deepcopy(dossier)
    d["lot"]["lot_id"] = "L<b>1</b>&amp;"
    d["lot"]["product_name"] = HOSTILE
    d["plant"]["name"] = "<font size=40>Plant</font>"
    d["decision"]["reasons"] = [HOSTILE, HOSTILE_WORD]
    d["decision"]["spec_approved_by"] = HOSTILE_WORD
    d["decision"]["input_files"] = {"<b>f.csv</b>": HOSTILE_WORD}
    d["verdicts"][0]["title"] = HOSTILE
    d["verdicts"][0]["reported"] = HOSTILE_WORD
    d["verdicts"][1]["reasons"] = [HOSTILE_WORD]
    d["plates"][0]["reasons"] = [HOSTILE]
    d["trend"][0]["signals"] = [HOSTILE]
    d["trend_charts"][0]["title"] = HOSTILE
    d["trend_charts"][0]["signal_labels"] = [HOSTILE_WORD]
    d["traces"]["curves"][0]["well"] = "<b>C2</b>"
    d["traces"]["curves"][0]["flag"] = HOSTILE_WORD
    d["caution"] = HOSTILE + " caution text"
    return d


def _assert_literal(pdf: bytes) -> None:
    text = flat(" ".join(pages_text(pdf)))
    for literal in ("<b>bold</b>", "<font size=40>big</font>", "&amp;", "<para>p</para>", "L<b>1</b>&amp;"):
        assert literal in text, literal
    assert "ctlend" in text  # control characters removed, the letters around them kept
    assert not any(ch in text for ch in "\x00\x07\x1b")
    assert "X" * 300 in dense(text) and "X" * 5000 not in dense(text)  # bounded, then wrapped
    assert "…" in text
    for page in PdfReader(io.BytesIO(pdf)).pages:
        assert b" 40 Tf" not in page.get_contents().get_data()  # no 40-point text was set


def test_hostile_strings_print_literally_in_the_report(dossier: dict[str, Any]) -> None:
    pdf = render_batch_report(hostile(dossier))
    _assert_literal(pdf)
    text = flat(" ".join(pages_text(pdf)))
    assert "<b>f.csv</b>" in text and "<b>C2</b>:" in text  # a table cell and a chart legend
    assert dense(text).count("<b>C2</b>") >= 2  # the chart legend and the rate-window table


def test_hostile_strings_print_literally_on_the_certificate(dossier: dict[str, Any]) -> None:
    signature = {**SIGNATURE, "signer_name": "<b>Mira</b> & Co", "meaning": HOSTILE_WORD}
    pdf = render_certificate(hostile(dossier), signature)
    _assert_literal(pdf)
    assert "<b>Mira</b> & Co" in flat(" ".join(pages_text(pdf)))


def test_escape_and_clean() -> None:
    assert escape("<b>x</b> & y") == "&lt;b&gt;x&lt;/b&gt; &amp; y"
    assert escape("&amp;") == "&amp;amp;"
    assert clean("a\x00b\tc\n\nd\u202ee") == "ab c de"
    cut = clean("y" * 1000, max_len=50)
    assert len(cut) == 50 and cut.endswith("…")
    assert clean(None) == "—"


def test_number_formats() -> None:
    # SE to two significant digits and the value to the same decimal place (common practice).
    assert value_pm(212.68, 6.947) == "212.7 ± 6.9"
    assert value_pm(0.06412, 0.008281) == "0.0641 ± 0.0083"
    assert value_pm(313136.0, 9921.0) == "(3.131 ± 0.099)×10⁵"
    assert num(0.4) == "0.4" and num(1158.351) == "1158" and num(None) == "—"
    # A value that rounds to zero is shown without a sign (a blank's slope of −0.00001 AU/min).
    assert fixed(-0.00001, 4) == "0.0000" and fixed(-0.00051, 3) == "-0.001" and fixed(-0.0, 1) == "0.0"
    assert value_pm(-0.004, 0.2) == "0.00 ± 0.20"


# ---------------------------------------------------------------- determinism


def test_rendering_is_deterministic(dossier: dict[str, Any]) -> None:
    assert render_batch_report(dossier) == render_batch_report(copy.deepcopy(dossier))
    assert render_certificate(dossier, SIGNATURE) == render_certificate(copy.deepcopy(dossier), dict(SIGNATURE))


def test_different_dossiers_give_different_bytes(dossier: dict[str, Any]) -> None:
    other = copy.deepcopy(dossier)
    other["decision"]["revision"] = 2
    assert render_batch_report(dossier) != render_batch_report(other)


# ---------------------------------------------------------------- charts


def strings(node: Any) -> list[str]:
    if isinstance(node, String):
        return [node.text]
    if isinstance(node, Drawing | Group):
        return [s for child in node.contents for s in strings(child)]
    return []


def test_charts_carry_axis_titles_with_units(dossier: dict[str, Any]) -> None:
    curve = dossier["protein_curve"]
    cases = [
        (charts.standard_curve_chart(curve, curve["samples"]), ("protein in the well (mg/mL)", "absorbance (AU)")),
        (charts.michaelis_menten_chart(dossier["kinetics"]),
         ("substrate [S] (mM)", "initial rate (U/mL of lot)", "95 % confidence band (delta method)")),
        (charts.progress_curves_chart(dossier["traces"]), ("time (min)", "absorbance (AU)")),
        (charts.imr_chart(dossier["trend_charts"][0]), ("Specific activity (U/mg)", "rule 1", "moving range", "USL 260")),
    ]
    for drawing, labels in cases:
        assert isinstance(drawing, Drawing)
        found = strings(drawing)
        for label in labels:
            assert label in found, label


def test_charts_of_absent_data_say_so() -> None:
    for drawing in (charts.standard_curve_chart(None, []), charts.michaelis_menten_chart(None),
                    charts.progress_curves_chart(None), charts.imr_chart({"title": "pH", "values": []})):
        assert isinstance(drawing, Drawing)
        assert any(s.startswith("No ") for s in strings(drawing))


