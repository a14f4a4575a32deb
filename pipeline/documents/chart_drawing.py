"""Drawing helpers shared by the batch report's charts: frame, ticks, text, markers, legend.

Pure geometry and styling with reportlab graphics: the numbers drawn come from the dossier.
"""

from __future__ import annotations

import math
from collections.abc import Callable, Sequence
from dataclasses import dataclass
from typing import Any

from reportlab.graphics.shapes import (
    FILL_NON_ZERO,
    Circle,
    Drawing,
    Group,
    Line,
    Path,
    Polygon,
    PolyLine,
    Rect,
    String,
)
from reportlab.lib import colors
from reportlab.pdfbase.pdfmetrics import stringWidth

from pipeline.documents.text import clean, fonts

WIDTH = 480.0
HEIGHT = 235.0

C_INK = colors.HexColor("#25313c")
C_GRID = colors.HexColor("#e3e8ed")
C_AXIS = colors.HexColor("#6b7785")
C_FIT = colors.HexColor("#1b4965")
C_BAND = colors.HexColor("#a9c8e0")
C_RANGE = colors.HexColor("#eef5e9")
C_RANGE_EDGE = colors.HexColor("#9cbf86")
C_STANDARD = colors.HexColor("#1b4965")
C_SAMPLE = colors.HexColor("#e07a1f")
C_OUT = colors.HexColor("#b5332b")
C_RELEASED = colors.HexColor("#2a6f97")
C_HELD = colors.HexColor("#c8553d")
C_OTHER = colors.HexColor("#8d99ae")
C_SIGNAL = colors.HexColor("#6a1b9a")
C_CONTROL = colors.HexColor("#8c2f39")
C_ZONE = colors.HexColor("#9aa5b1")
C_SPEC = colors.HexColor("#3d3d3d")
TRACE_COLOURS = (colors.HexColor("#2a6f97"), colors.HexColor("#e07a1f"), colors.HexColor("#4f772d"))



# ---------------------------------------------------------------- a small plotting frame


def nice_ticks(lo: float, hi: float, target: int = 5) -> tuple[list[float], int]:
    """Round tick values covering [lo, hi] and the decimals their labels need."""
    if not (math.isfinite(lo) and math.isfinite(hi)):
        lo, hi = 0.0, 1.0
    if hi <= lo:
        pad = abs(lo) * 0.1 or 1.0
        lo, hi = lo - pad, hi + pad
    raw = (hi - lo) / target
    mag = 10 ** math.floor(math.log10(raw))
    step = mag
    for m in (1.0, 2.0, 2.5, 5.0, 10.0):
        step = m * mag
        if step >= raw * 0.999:
            break
    first = math.floor(lo / step + 1e-9) * step
    count = int(math.ceil((hi - first) / step - 1e-9)) + 1
    ticks = [first + i * step for i in range(count)]
    decimals = 0
    while decimals < 6 and abs(step * 10**decimals - round(step * 10**decimals)) > 1e-6 * step * 10**decimals:
        decimals += 1
    return ticks, decimals


@dataclass
class Frame:
    x0: float
    y0: float
    w: float
    h: float
    xmin: float
    xmax: float
    ymin: float
    ymax: float

    def X(self, v: float) -> float:
        return self.x0 + (v - self.xmin) / (self.xmax - self.xmin) * self.w

    def Y(self, v: float) -> float:
        return self.y0 + (v - self.ymin) / (self.ymax - self.ymin) * self.h

    def clamp_y(self, v: float) -> float:
        return min(max(v, self.ymin), self.ymax)


def text_string(x: float, y: float, text: Any, size: float = 7.0, anchor: str = "start",
          colour: Any = C_INK, bold: bool = False, max_len: int = 90) -> String:
    regular, heavy, _ = fonts()
    return String(x, y, clean(text, max_len), fontName=heavy if bold else regular, fontSize=size,
                  fillColor=colour, textAnchor=anchor)


def fitted_text(text: Any, size: float, width: float, max_len: int = 120, bold: bool = False) -> str:
    """Cleaned text cut to its longest prefix that, followed by "…", is at most ``width`` points wide."""
    font = fonts()[1 if bold else 0]
    out = clean(text, max_len)
    if stringWidth(out, font, size) <= width:
        return out
    lo, hi = 0, len(out)
    while lo < hi:
        mid = (lo + hi + 1) // 2
        if stringWidth(out[:mid].rstrip() + "…", font, size) <= width:
            lo = mid
        else:
            hi = mid - 1
    return out[:lo].rstrip() + "…"


def axes_frame(d: Drawing, xr: tuple[float, float], yr: tuple[float, float], xlabel: str, ylabel: str,
           box: tuple[float, float, float, float], x_ticks: bool = True) -> Frame:
    """Axes with grid, ticks and titles in ``box`` = (x0, y0, w, h); returns the mapping.

    With ``x_ticks`` False the x range is used as given, without ticks or vertical grid
    (the I-MR chart labels its lots itself).
    """
    xt, xd = nice_ticks(*xr) if x_ticks else ([], 0)
    yt, yd = nice_ticks(*yr)
    f = Frame(*box, xt[0] if xt else xr[0], xt[-1] if xt else xr[1], yt[0], yt[-1])
    d.add(Rect(f.x0, f.y0, f.w, f.h, fillColor=colors.white, strokeColor=None))
    d.add(segments([(f.x0, f.Y(v), f.x0 + f.w, f.Y(v)) for v in yt] +
                    [(f.X(v), f.y0, f.X(v), f.y0 + f.h) for v in xt], C_GRID, 0.5))
    for v in yt:
        d.add(text_string(f.x0 - 4, f.Y(v) - 2.5, f"{v:.{yd}f}", 6.5, "end", C_AXIS))
    for v in xt:
        d.add(text_string(f.X(v), f.y0 - 9, f"{v:.{xd}f}", 6.5, "middle", C_AXIS))
    d.add(Rect(f.x0, f.y0, f.w, f.h, fillColor=None, strokeColor=C_AXIS, strokeWidth=0.6))
    if xlabel:
        d.add(text_string(f.x0 + f.w / 2, f.y0 - 20, xlabel, 7.5, "middle"))
    label = Group(text_string(0, 0, fitted_text(ylabel, 7.5, f.h + 30), 7.5, "middle"))
    label.transform = (0, 1, -1, 0, f.x0 - 34, f.y0 + f.h / 2)
    d.add(label)
    return f


def chart_title(d: Drawing, title: str, note: str = "") -> None:
    note_text = fitted_text(note, 6.5, d.width * 0.45) if note else ""
    room = d.width - 12 - (stringWidth(note_text, fonts()[0], 6.5) if note_text else 0)
    d.add(text_string(4, d.height - 12, fitted_text(title, 9, room, bold=True), 9, bold=True, max_len=200))
    if note_text:
        d.add(text_string(d.width - 4, d.height - 12, note_text, 6.5, "end", C_OUT, max_len=200))


def legend(d: Drawing, entries: Sequence[tuple[Callable[[float, float], Any], str]], y: float) -> None:
    """One row of legend entries (marker drawer, label) starting at the left of the drawing."""
    regular = fonts()[0]
    x = 56.0
    for draw_marker, label in entries:
        text = clean(label, 60)
        width = 14 + stringWidth(text, regular, 6.8) + 12
        if x + width > d.width:
            y -= 10
            x = 56.0
        d.add(draw_marker(x + 5, y + 2.5))
        d.add(text_string(x + 13, y, text, 6.8))
        x += width


def dot(colour: Any, r: float = 2.4, stroke: Any = None) -> Callable[[float, float], Any]:
    return lambda x, y: Circle(x, y, r, fillColor=colour, strokeColor=stroke or colour, strokeWidth=0.5)


def diamond(colour: Any, r: float = 3.2) -> Callable[[float, float], Any]:
    return lambda x, y: Polygon([x - r, y, x, y + r, x + r, y, x, y - r], fillColor=colour,
                                strokeColor=colors.white, strokeWidth=0.4)


def triangle(colour: Any, r: float = 3.4) -> Callable[[float, float], Any]:
    return lambda x, y: Polygon([x - r, y - r * 0.8, x + r, y - r * 0.8, x, y + r], fillColor=colour,
                                strokeColor=colour, strokeWidth=0.4)


def ring(colour: Any, r: float = 5.0) -> Callable[[float, float], Any]:
    return lambda x, y: Circle(x, y, r, fillColor=None, strokeColor=colour, strokeWidth=1.3)


def swatch(colour: Any, width: float = 1.2, dash: Any = None, fill: Any = None) -> Callable[[float, float], Any]:
    if fill is not None:
        return lambda x, y: Rect(x - 5, y - 3, 10, 6, fillColor=fill, strokeColor=None)
    return lambda x, y: Line(x - 6, y, x + 6, y, strokeColor=colour, strokeWidth=width, strokeDashArray=dash)


def polyline(f: Frame, xs: Sequence[float], ys: Sequence[float], colour: Any, width: float = 1.2,
              dash: Any = None) -> PolyLine | None:
    pts: list[float] = []
    for x, y in zip(xs, ys, strict=True):
        if math.isfinite(x) and math.isfinite(y):
            pts += [f.X(x), f.Y(f.clamp_y(y))]
    if len(pts) < 4:
        return None
    return PolyLine(pts, strokeColor=colour, strokeWidth=width, strokeDashArray=dash, strokeLineJoin=1)


# Many marks of one style are drawn as one path: a drawing node costs far more to render than
# a segment of a path, and marks of one colour look the same whichever is drawn first.


def segments(lines: Sequence[tuple[float, float, float, float]], colour: Any, width: float) -> Path:
    """Straight lines (x1, y1, x2, y2) of one colour and width, as one stroked path."""
    path = Path(strokeColor=colour, strokeWidth=width, fillColor=None)
    for x1, y1, x2, y2 in lines:
        path.moveTo(x1, y1)
        path.lineTo(x2, y2)
    return path


def squares(centres: Sequence[tuple[float, float]], half: float, colour: Any) -> Path:
    """Filled squares of side ``2·half`` around ``centres``, as one path (overlaps stay filled)."""
    path = Path(fillColor=colour, strokeColor=None, fillMode=FILL_NON_ZERO)
    for x, y in centres:
        path.moveTo(x - half, y - half)
        path.lineTo(x + half, y - half)
        path.lineTo(x + half, y + half)
        path.lineTo(x - half, y + half)
        path.closePath()
    return path


def empty_chart(title: str, message: str) -> Drawing:
    d = Drawing(WIDTH, 60)
    d.add(Rect(0, 0, WIDTH, 60, fillColor=colors.HexColor("#f6f7f9"), strokeColor=C_GRID))
    chart_title(d, title)
    d.add(text_string(10, 22, message, 8, colour=C_AXIS))
    return d


def floats(values: Any) -> list[float]:
    out: list[float] = []
    for v in values if isinstance(values, list | tuple) else []:
        out.append(float(v) if isinstance(v, int | float) and not isinstance(v, bool) else math.nan)
    return out


def span(values: Sequence[float], include_zero: bool = True, pad: float = 0.05) -> tuple[float, float]:
    finite = [v for v in values if math.isfinite(v)]
    if not finite:
        return 0.0, 1.0
    lo, hi = min(finite), max(finite)
    if include_zero:
        lo = min(lo, 0.0)
    margin = (hi - lo) * pad if hi > lo else (abs(hi) * 0.1 or 1.0)
    return (lo if include_zero and lo == 0 else lo - margin), hi + margin
