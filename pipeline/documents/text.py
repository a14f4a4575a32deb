"""Text that comes from a dossier, made safe for reportlab, and the few styles both documents use.

Every string from a dossier passes through :func:`escape` (or :func:`para` / :func:`markup`,
which call it) before it reaches a reportlab ``Paragraph``: the paragraph parser would
otherwise read ``<b>``, ``<font size=40>`` or ``&amp;`` in a lot id or a reason as markup.
:func:`clean` removes control characters, collapses white space and truncates very long
values with "…" so that a pathological value cannot push a table cell past a page.
"""

from __future__ import annotations

import math
import os
import threading
import unicodedata
import zlib
from collections.abc import Callable, Mapping
from functools import lru_cache, partial
from importlib.util import find_spec
from typing import Any
from xml.sax.saxutils import escape as _xml_escape

from reportlab import rl_config
from reportlab.lib import colors
from reportlab.lib.styles import ParagraphStyle
from reportlab.pdfbase import pdfmetrics
from reportlab.pdfbase.ttfonts import TTFont, TTFontFace
from reportlab.pdfgen.canvas import Canvas
from reportlab.platypus import paragraph as _rl_paragraph

ELLIPSIS = "…"
DASH = "—"  # printed where a value is absent
DEFAULT_MAX_LEN = 400

# Bidirectional overrides and isolates can reorder what a reader sees; they go with the
# control characters.
_BIDI = {chr(c) for c in (*range(0x202A, 0x202F), *range(0x2066, 0x206A), 0x200E, 0x200F)}


_PRINTABLE_ASCII = frozenset(chr(c) for c in range(0x20, 0x7F))


def clean(value: Any, max_len: int = DEFAULT_MAX_LEN) -> str:
    """Plain, printable, bounded text from any dossier value (no markup is added or removed).

    None becomes "—". Control characters (Unicode category C*, bidi overrides) are dropped,
    tabs and line breaks become spaces, runs of white space collapse to one, and text longer
    than ``max_len`` characters is cut to ``max_len − 1`` characters followed by "…".
    """
    if value is None:
        return DASH
    text = value if isinstance(value, str) else str(value)
    if _PRINTABLE_ASCII.issuperset(text):  # the common case: nothing to drop or fold
        flat = " ".join(text.split()) if "  " in text or text[:1] == " " or text[-1:] == " " else text
    else:
        out: list[str] = []
        for ch in text:
            if ch in "\t\n\r\x0b\x0c\u2028\u2029":
                out.append(" ")
            elif unicodedata.category(ch).startswith("C") or ch in _BIDI:
                continue
            else:
                out.append(ch)
        flat = " ".join("".join(out).split())
    if len(flat) > max_len:
        flat = flat[: max(0, max_len - 1)].rstrip() + ELLIPSIS
    return flat


def escape(value: Any, max_len: int = DEFAULT_MAX_LEN) -> str:
    """The one way dossier text enters Paragraph markup: cleaned, bounded, then escaped.

    ``&``, ``<``, ``>`` and quotes become entities, so the paragraph parser prints them.
    Long unbroken words are wrapped by the paragraph styles (``splitLongWords``), which
    break them at the cell's width without inserting any character.
    """
    return _xml_escape(clean(value, max_len), {'"': "&quot;", "'": "&#39;"})


def markup(template: str, **values: Any) -> str:
    """Fill a trusted markup template with escaped values: ``markup("<b>{x}</b>", x=data)``.

    The template is ours; each value passes through :func:`escape`. Pass a value that is
    already markup as ``Trusted(...)``.
    """
    filled = {k: (v.text if isinstance(v, Trusted) else escape(v)) for k, v in values.items()}
    return template.format(**filled)


class Trusted:
    """Markup we built ourselves (from escaped parts); :func:`markup` inserts it unchanged."""

    __slots__ = ("text",)

    def __init__(self, text: str) -> None:
        self.text = text


def caution_markup(caution: Any) -> str:
    """The caution statement, led by a bold "Caution." unless the text already starts so."""
    text = clean(caution, 1200)
    if text.lower().startswith("caution"):
        head, sep, rest = text.partition(":") if ":" in text[:12] else (text[:7], "", text[7:])
        return f"<b>{escape(head + sep, 20)}</b> {escape(rest, 1200)}"
    return f"<b>Caution.</b> {escape(text, 1200)}"


@lru_cache(maxsize=4096)
def _parsed(text: str, style: ParagraphStyle) -> _rl_paragraph.Paragraph:
    """A paragraph parsed once and never laid out: the template of its copies (see Paragraph)."""
    return _rl_paragraph.Paragraph(text, style)


class Paragraph(_rl_paragraph.Paragraph):
    """reportlab's Paragraph, parsing each distinct text once and remembering its last wrap.

    Headings, notes, column heads and many cells repeat in every document of a night; the
    markup of a (text, style) pair is parsed once and each new paragraph starts from copies
    of the parsed fragments, exactly as if it had parsed them itself.

    A table wraps each cell to find the row heights and again to draw it, and a flowable
    may be wrapped more than once while a page is laid out; the line breaks depend only on
    the width, so a repeated wrap to the same width returns the size already found (unless
    ``split`` has dropped the line breaks, which it does when nothing fits).
    """

    def __init__(self, text: str, style: ParagraphStyle, bulletText: Any = None, frags: Any = None,  # noqa: N803
                 **kwargs: Any) -> None:
        if frags is None and bulletText is None and not kwargs:
            parsed = _parsed(text, style)
            text, style, bulletText = parsed.text, parsed.style, parsed.bulletText
            frags = [f.clone() for f in parsed.frags]
        super().__init__(text, style, bulletText, frags, **kwargs)

    def wrap(self, availWidth: float, availHeight: float) -> tuple[float, float]:  # noqa: N803 (reportlab's names)
        memo = self.__dict__.get("_wrap_memo")
        if memo is not None and memo[0] == availWidth and "blPara" in self.__dict__:
            return memo[1]
        size = super().wrap(availWidth, availHeight)
        self._wrap_memo = (availWidth, size)
        return size


def para(value: Any, style: ParagraphStyle | str = "cell", max_len: int = DEFAULT_MAX_LEN) -> Paragraph:
    """A Paragraph showing ``value`` literally."""
    return Paragraph(escape(value, max_len), style if isinstance(style, ParagraphStyle) else styles()[style])


def mpara(template: str, style: ParagraphStyle | str = "cell", **values: Any) -> Paragraph:
    """A Paragraph from a trusted template filled with escaped values (see :func:`markup`)."""
    return Paragraph(markup(template, **values), style if isinstance(style, ParagraphStyle) else styles()[style])


# ---------------------------------------------------------------- numbers


def _finite(x: Any) -> bool:
    return isinstance(x, int | float) and not isinstance(x, bool) and math.isfinite(float(x))


def num(x: Any, sig: int = 4, strip: bool = True) -> str:
    """A number with at most ``sig`` significant digits, plain from 1e-3 to 1e6, else a×10ⁿ.

    Trailing zeros are dropped unless ``strip`` is False (0.4, not 0.4000).
    """
    if not _finite(x):
        return DASH if x is None else clean(x, 40)
    v = float(x)
    if v == 0:
        return "0"
    exp = math.floor(math.log10(abs(v)))
    if exp >= 6 or exp < -3:
        mant = v / 10**exp
        return f"{mant:.{max(sig - 1, 0)}f}×10{_sup(exp)}"  # mantissa keeps its digits
    decimals = max(0, sig - 1 - exp)
    text = fixed(v, decimals)
    return text.rstrip("0").rstrip(".") if strip and "." in text else text


def fixed(x: float, decimals: int) -> str:
    """``x`` to ``decimals`` places; a value that rounds to zero is "0.000", never "−0.000"."""
    text = f"{x:.{decimals}f}"
    return text[1:] if text.startswith("-") and not text.strip("-0.") else text


_SUP = str.maketrans("-0123456789", "⁻⁰¹²³⁴⁵⁶⁷⁸⁹")


def _sup(exp: int) -> str:
    return str(exp).translate(_SUP)


def value_pm(value: Any, se: Any) -> str:
    """``value ± se``, the SE to two significant digits and the value to the same decimal place.

    Large or small magnitudes share one power of ten: (4.41 ± 0.52)×10⁵.
    """
    if not _finite(value):
        return num(value)
    if not _finite(se) or float(se) <= 0:
        return num(value)
    v, s = float(value), float(se)
    scale = math.floor(math.log10(max(abs(v), s)))
    factor = 0
    if scale >= 5 or scale < -3:
        factor = scale
        v, s = v / 10**scale, s / 10**scale
    decimals = min(10, max(0, 1 - math.floor(math.log10(s))))
    core = f"{fixed(v, decimals)} ± {fixed(s, decimals)}"
    return f"({core})×10{_sup(factor)}" if factor else core


def interval(ci: Any) -> str:
    """"lo to hi" with four significant digits, or "—"."""
    if not isinstance(ci, list | tuple) or len(ci) != 2 or not all(_finite(c) for c in ci):
        return DASH
    return f"{num(ci[0], strip=False)} to {num(ci[1], strip=False)}"


def get(mapping: Any, key: str, default: Any = None) -> Any:
    """``mapping[key]`` when ``mapping`` is a mapping that holds a non-None value, else ``default``."""
    if isinstance(mapping, Mapping):
        value = mapping.get(key)
        return default if value is None else value
    return default


def short_hash(value: Any, keep: int = 16) -> str:
    """The first ``keep`` characters of a hex digest followed by "…" (the full value goes in small print)."""
    text = clean(value, 200)
    return text if len(text) <= keep else text[:keep] + ELLIPSIS


# ---------------------------------------------------------------- fonts and styles

FONT = "LotgateSans"
FONT_BOLD = "LotgateSans-Bold"
FONT_MONO = "LotgateMono"


def _font_dirs() -> list[str]:
    dirs: list[str] = []
    spec = find_spec("matplotlib")  # located, not imported: it ships the DejaVu fonts
    if spec is not None and spec.submodule_search_locations:
        for loc in spec.submodule_search_locations:
            dirs.append(os.path.join(loc, "mpl-data", "fonts", "ttf"))
    dirs.append("/usr/share/fonts/truetype/dejavu")
    return dirs


@lru_cache(maxsize=32)
def _deflate(data: bytes) -> bytes:
    return zlib.compress(data)


class _RememberedFlate:
    """reportlab's FlateDecode filter (the same zlib call) remembering the font files it compressed last."""

    pdfname = "FlateDecode"

    def encode(self, data: bytes) -> bytes:
        return _deflate(data)

    def decode(self, encoded: bytes) -> bytes:
        return zlib.decompress(encoded)


_REMEMBERED_FLATE = _RememberedFlate()


class _SubsetMemoFace(TTFontFace):
    """A TrueType face that keeps the font subsets it made last, and their compressed form.

    Each document embeds, per font, the subset of glyphs it uses, in order of first use. The
    documents of a night use the same characters in nearly the same order (certificates have
    had three distinct subsets in a hundred), so making and compressing the subset font
    files again would repeat the same work with the same result.
    """

    def __init__(self, filename: str) -> None:
        super().__init__(filename)
        self._subset_file = lru_cache(maxsize=16)(lambda subset: super(_SubsetMemoFace, self).makeSubset(list(subset)))

    def makeSubset(self, subset: list[int]) -> bytes:  # noqa: N802 (reportlab's name)
        return self._subset_file(tuple(subset))

    def addSubsetObjects(self, doc: Any, fontname: str, subset: list[int]) -> Any:  # noqa: N802
        descriptor = super().addSubsetObjects(doc, fontname, subset)
        font_file = doc.idToObject.get(f"fontFile:{self.filename}({fontname})")  # the stream just made
        if font_file is not None and font_file.filters:
            font_file.filters = [_REMEMBERED_FLATE]
        return descriptor


class _SubsetMemoFont(TTFont):
    """A TrueType font whose face is a :class:`_SubsetMemoFace`."""

    def __init__(self, name: str, filename: str) -> None:
        super().__init__(name, filename)
        self.face = _SubsetMemoFace(filename)


@lru_cache(maxsize=1)
def fonts() -> tuple[str, str, str]:
    """Register a Unicode TrueType family (DejaVu) once; fall back to the PDF base fonts.

    The base fonts cannot show σ, ⁻¹ or subscripts, so DejaVu is preferred; matplotlib, a
    dependency of the project, ships it.
    """
    wanted = {FONT: "DejaVuSans.ttf", FONT_BOLD: "DejaVuSans-Bold.ttf", FONT_MONO: "DejaVuSansMono.ttf"}
    for folder in _font_dirs():
        paths = {name: os.path.join(folder, file) for name, file in wanted.items()}
        if all(os.path.isfile(p) for p in paths.values()):
            for name, path in paths.items():
                if name not in pdfmetrics.getRegisteredFontNames():
                    pdfmetrics.registerFont(_SubsetMemoFont(name, path))
            pdfmetrics.registerFontFamily(FONT, normal=FONT, bold=FONT_BOLD, italic=FONT, boldItalic=FONT_BOLD)
            return FONT, FONT_BOLD, FONT_MONO
    return "Helvetica", "Helvetica-Bold", "Courier"


INK = colors.HexColor("#1d2733")
MUTED = colors.HexColor("#5b6773")
RULE = colors.HexColor("#b9c2cc")
HEAD_FILL = colors.HexColor("#e6ebf0")
PASS_INK = colors.HexColor("#1f6b45")
PASS_FILL = colors.HexColor("#e3f2e9")
HOLD_INK = colors.HexColor("#9a3412")
HOLD_FILL = colors.HexColor("#fbeae1")


@lru_cache(maxsize=1)
def styles() -> dict[str, ParagraphStyle]:
    """Paragraph styles shared by the certificate and the batch report."""
    regular, bold, mono = fonts()
    base = ParagraphStyle("base", fontName=regular, fontSize=9, leading=11.5, textColor=INK, splitLongWords=1)

    def s(name: str, **kw: Any) -> ParagraphStyle:
        return ParagraphStyle(name, parent=base, **kw)

    return {
        "base": base,
        "plant": s("plant", fontName=bold, fontSize=10, leading=13, textColor=MUTED),
        "title": s("title", fontName=bold, fontSize=18, leading=22, spaceAfter=2),
        "subtitle": s("subtitle", fontSize=10.5, leading=14),
        "h2": s("h2", fontName=bold, fontSize=11.5, leading=15, spaceBefore=10, spaceAfter=4),
        "h3": s("h3", fontName=bold, fontSize=9.5, leading=12, spaceBefore=6, spaceAfter=2),
        "body": s("body"),
        "cell": s("cell", fontSize=8, leading=10),
        "cellb": s("cellb", fontName=bold, fontSize=8, leading=10),
        "head": s("head", fontName=bold, fontSize=7.5, leading=9.5, textColor=MUTED),
        "small": s("small", fontSize=7, leading=8.8, textColor=MUTED),
        "mono": s("mono", fontName=mono, fontSize=6.8, leading=8.5),
        "note": s("note", fontSize=7.5, leading=9.5, textColor=MUTED),
        "boxtitle": s("boxtitle", fontName=bold, fontSize=14, leading=18),
        "caution": s("caution", fontSize=8, leading=10.2),
        "footer": s("footer", fontSize=6.5, leading=8, textColor=MUTED),
    }


# ---------------------------------------------------------------- page furniture


FooterDrawer = Callable[[Canvas, int, int], None]


class NumberedCanvas(Canvas):
    """A canvas that keeps its pages until ``save`` so each footer can say "page x of y".

    ``footer(canvas, page, total)`` draws the running footer; it is given as a keyword when
    the canvas is made (``functools.partial(NumberedCanvas, footer=...)`` as canvasmaker).
    """

    def __init__(self, *args: Any, footer: FooterDrawer, **kwargs: Any) -> None:
        super().__init__(*args, **kwargs)
        self._footer = footer
        self._saved_pages: list[dict[str, Any]] = []

    def showPage(self) -> None:  # noqa: N802 (reportlab's name)
        self._saved_pages.append(dict(self.__dict__))
        self._startPage()

    def save(self) -> None:
        total = len(self._saved_pages)
        for number, state in enumerate(self._saved_pages, start=1):
            self.__dict__.update(state)
            self._footer(self, number, total)
            Canvas.showPage(self)
        Canvas.save(self)


def canvas_with_footer(footer: FooterDrawer) -> Callable[..., NumberedCanvas]:
    """A ``canvasmaker`` for ``doc.build`` whose pages carry ``footer``."""
    return partial(NumberedCanvas, footer=footer)


def draw_paragraph(canvas: Canvas, paragraph: Paragraph, x: float, y_top: float, width: float) -> float:
    """Draw ``paragraph`` with its top at ``y_top``; returns its height."""
    _, height = paragraph.wrapOn(canvas, width, 1000)
    paragraph.drawOn(canvas, x, y_top - height)
    return height


_BUILD_LOCK = threading.Lock()


def build_pdf(doc: Any, story: list[Any], footer: FooterDrawer) -> None:
    """``doc.build(story)`` with numbered footers and binary (not ASCII85) compressed streams.

    reportlab reads ``rl_config.useA85`` while it writes; binary streams are smaller and about
    a tenth faster to write. The setting is global, so it is changed under a lock and restored.
    """
    with _BUILD_LOCK:
        previous = rl_config.useA85
        rl_config.useA85 = 0
        try:
            doc.build(story, canvasmaker=canvas_with_footer(footer))
        finally:
            rl_config.useA85 = previous
