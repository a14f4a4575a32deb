"""Vector charts for the batch report, drawn with reportlab graphics (no raster, no matplotlib).

Each public function takes the plain mapping found in a dossier and returns a
``reportlab.graphics.shapes.Drawing`` with axis titles and units. Absent or empty data gives
a small drawing that says so, never an exception: a held lot's report must still print.
"""

from __future__ import annotations

import math
from collections.abc import Callable, Sequence
from dataclasses import dataclass
from typing import Any

import numpy as np
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
from scipy import stats

from pipeline.documents.text import clean, fonts, get, num
from pipeline.vocabulary import Disposition

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

# Control-chart constants for moving ranges of two (ASTM Manual on Presentation of Data and
# Control Chart Analysis): sigma = MR-bar / d2, MR upper limit = D4 * MR-bar.
D2 = 1.128
D4 = 3.267


# ---------------------------------------------------------------- the delta-method band


def mm_band(substrate_mm: Any, vmax: float, km: float, vmax_se: float, km_se: float,
            cov_vmax_km: float, dof: int, level: float = 0.95) -> tuple[np.ndarray, np.ndarray]:
    """Fitted Michaelis–Menten rate and the half-width of its pointwise confidence band.

    f(S) = Vmax·S / (Km + S). Delta method: var f(S) = gᵀ C g with the gradient
    g = [∂f/∂Vmax, ∂f/∂Km] = [S/(Km+S), −Vmax·S/(Km+S)²] and the parameter covariance
    C = [[se_v², cov], [cov, se_k²]]; half-width = t(1 − (1−level)/2, dof) · √var.
    Returns (f, half_width), arrays shaped like ``substrate_mm``.
    """
    s = np.asarray(substrate_mm, dtype=float)
    g_v = s / (km + s)
    g_k = -vmax * s / (km + s) ** 2
    var = g_v**2 * vmax_se**2 + 2.0 * g_v * g_k * cov_vmax_km + g_k**2 * km_se**2
    t = float(stats.t.ppf(1.0 - (1.0 - level) / 2.0, dof))
    return vmax * s / (km + s), t * np.sqrt(np.clip(var, 0.0, None))


# ---------------------------------------------------------------- a small plotting frame


def _nice_ticks(lo: float, hi: float, target: int = 5) -> tuple[list[float], int]:
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
class _Frame:
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


def _text(x: float, y: float, text: Any, size: float = 7.0, anchor: str = "start",
          colour: Any = C_INK, bold: bool = False, max_len: int = 90) -> String:
    regular, heavy, _ = fonts()
    return String(x, y, clean(text, max_len), fontName=heavy if bold else regular, fontSize=size,
                  fillColor=colour, textAnchor=anchor)


def _fit_text(text: Any, size: float, width: float, max_len: int = 120, bold: bool = False) -> str:
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


def _frame(d: Drawing, xr: tuple[float, float], yr: tuple[float, float], xlabel: str, ylabel: str,
           box: tuple[float, float, float, float], x_ticks: bool = True) -> _Frame:
    """Axes with grid, ticks and titles in ``box`` = (x0, y0, w, h); returns the mapping.

    With ``x_ticks`` False the x range is used as given, without ticks or vertical grid
    (the I-MR chart labels its lots itself).
    """
    xt, xd = _nice_ticks(*xr) if x_ticks else ([], 0)
    yt, yd = _nice_ticks(*yr)
    f = _Frame(*box, xt[0] if xt else xr[0], xt[-1] if xt else xr[1], yt[0], yt[-1])
    d.add(Rect(f.x0, f.y0, f.w, f.h, fillColor=colors.white, strokeColor=None))
    d.add(_segments([(f.x0, f.Y(v), f.x0 + f.w, f.Y(v)) for v in yt] +
                    [(f.X(v), f.y0, f.X(v), f.y0 + f.h) for v in xt], C_GRID, 0.5))
    for v in yt:
        d.add(_text(f.x0 - 4, f.Y(v) - 2.5, f"{v:.{yd}f}", 6.5, "end", C_AXIS))
    for v in xt:
        d.add(_text(f.X(v), f.y0 - 9, f"{v:.{xd}f}", 6.5, "middle", C_AXIS))
    d.add(Rect(f.x0, f.y0, f.w, f.h, fillColor=None, strokeColor=C_AXIS, strokeWidth=0.6))
    if xlabel:
        d.add(_text(f.x0 + f.w / 2, f.y0 - 20, xlabel, 7.5, "middle"))
    label = Group(_text(0, 0, _fit_text(ylabel, 7.5, f.h + 30), 7.5, "middle"))
    label.transform = (0, 1, -1, 0, f.x0 - 34, f.y0 + f.h / 2)
    d.add(label)
    return f


def _title(d: Drawing, title: str, note: str = "") -> None:
    note_text = _fit_text(note, 6.5, d.width * 0.45) if note else ""
    room = d.width - 12 - (stringWidth(note_text, fonts()[0], 6.5) if note_text else 0)
    d.add(_text(4, d.height - 12, _fit_text(title, 9, room, bold=True), 9, bold=True, max_len=200))
    if note_text:
        d.add(_text(d.width - 4, d.height - 12, note_text, 6.5, "end", C_OUT, max_len=200))


def _legend(d: Drawing, entries: Sequence[tuple[Callable[[float, float], Any], str]], y: float) -> None:
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
        d.add(_text(x + 13, y, text, 6.8))
        x += width


def _dot(colour: Any, r: float = 2.4, stroke: Any = None) -> Callable[[float, float], Any]:
    return lambda x, y: Circle(x, y, r, fillColor=colour, strokeColor=stroke or colour, strokeWidth=0.5)


def _diamond(colour: Any, r: float = 3.2) -> Callable[[float, float], Any]:
    return lambda x, y: Polygon([x - r, y, x, y + r, x + r, y, x, y - r], fillColor=colour,
                                strokeColor=colors.white, strokeWidth=0.4)


def _triangle(colour: Any, r: float = 3.4) -> Callable[[float, float], Any]:
    return lambda x, y: Polygon([x - r, y - r * 0.8, x + r, y - r * 0.8, x, y + r], fillColor=colour,
                                strokeColor=colour, strokeWidth=0.4)


def _ring(colour: Any, r: float = 5.0) -> Callable[[float, float], Any]:
    return lambda x, y: Circle(x, y, r, fillColor=None, strokeColor=colour, strokeWidth=1.3)


def _swatch(colour: Any, width: float = 1.2, dash: Any = None, fill: Any = None) -> Callable[[float, float], Any]:
    if fill is not None:
        return lambda x, y: Rect(x - 5, y - 3, 10, 6, fillColor=fill, strokeColor=None)
    return lambda x, y: Line(x - 6, y, x + 6, y, strokeColor=colour, strokeWidth=width, strokeDashArray=dash)


def _polyline(f: _Frame, xs: Sequence[float], ys: Sequence[float], colour: Any, width: float = 1.2,
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


def _segments(lines: Sequence[tuple[float, float, float, float]], colour: Any, width: float) -> Path:
    """Straight lines (x1, y1, x2, y2) of one colour and width, as one stroked path."""
    path = Path(strokeColor=colour, strokeWidth=width, fillColor=None)
    for x1, y1, x2, y2 in lines:
        path.moveTo(x1, y1)
        path.lineTo(x2, y2)
    return path


def _squares(centres: Sequence[tuple[float, float]], half: float, colour: Any) -> Path:
    """Filled squares of side ``2·half`` around ``centres``, as one path (overlaps stay filled)."""
    path = Path(fillColor=colour, strokeColor=None, fillMode=FILL_NON_ZERO)
    for x, y in centres:
        path.moveTo(x - half, y - half)
        path.lineTo(x + half, y - half)
        path.lineTo(x + half, y + half)
        path.lineTo(x - half, y + half)
        path.closePath()
    return path


def _empty(title: str, message: str) -> Drawing:
    d = Drawing(WIDTH, 60)
    d.add(Rect(0, 0, WIDTH, 60, fillColor=colors.HexColor("#f6f7f9"), strokeColor=C_GRID))
    _title(d, title)
    d.add(_text(10, 22, message, 8, colour=C_AXIS))
    return d


def _floats(values: Any) -> list[float]:
    out: list[float] = []
    for v in values if isinstance(values, list | tuple) else []:
        out.append(float(v) if isinstance(v, int | float) and not isinstance(v, bool) else math.nan)
    return out


def _span(values: Sequence[float], include_zero: bool = True, pad: float = 0.05) -> tuple[float, float]:
    finite = [v for v in values if math.isfinite(v)]
    if not finite:
        return 0.0, 1.0
    lo, hi = min(finite), max(finite)
    if include_zero:
        lo = min(lo, 0.0)
    margin = (hi - lo) * pad if hi > lo else (abs(hi) * 0.1 or 1.0)
    return (lo if include_zero and lo == 0 else lo - margin), hi + margin


# ---------------------------------------------------------------- standard curve


def curve_absorbance(model: str, params: Sequence[float], x: Any) -> np.ndarray:
    """Absorbance predicted by the standard curve at protein concentration x (mg/mL).

    linear A = p0 + p1·x; quadratic A = p0 + p1·x + p2·x²; 4pl A = d + (a − d)/(1 + (x/c)^b).
    """
    xs = np.asarray(x, dtype=float)
    p = [float(v) for v in params]
    with np.errstate(all="ignore"):
        if model == "linear" and len(p) >= 2:
            return p[0] + p[1] * xs
        if model == "quadratic" and len(p) >= 3:
            return p[0] + p[1] * xs + p[2] * xs**2
        if model == "4pl" and len(p) >= 4:
            a, b, c, dd = p[:4]
            return dd + (a - dd) / (1.0 + np.power(np.clip(xs, 0.0, None) / c, b))
    return np.full_like(xs, np.nan)


def _invert(grid_x: np.ndarray, grid_a: np.ndarray, absorbance: float) -> float | None:
    """The first x on the grid where the curve crosses ``absorbance`` (linear interpolation)."""
    diff = grid_a - absorbance
    ok = np.isfinite(diff)
    for i in range(len(diff) - 1):
        if ok[i] and ok[i + 1] and diff[i] * diff[i + 1] <= 0 and diff[i] != diff[i + 1]:
            return float(grid_x[i] + (grid_x[i + 1] - grid_x[i]) * diff[i] / (diff[i] - diff[i + 1]))
    return None


def standard_curve_chart(curve: dict[str, Any] | None, samples: list[dict[str, Any]] | None = None) -> Drawing:
    """Protein standards (points), the fitted curve, the calibrated range and the samples on it.

    Samples are placed where the fitted curve reaches their absorbance; a sample whose
    absorbance lies outside the calibrated range is drawn as a triangle at the frame's edge.
    """
    title = "Protein standard curve"
    if not isinstance(curve, dict):
        return _empty(title, "No standard curve in this dossier (protein plate missing or invalid).")
    samples = samples if samples is not None else (curve.get("samples") or [])
    standards = [s for s in (curve.get("standards") or []) if isinstance(s, list | tuple) and len(s) >= 2]
    sx, sy = _floats([s[0] for s in standards]), _floats([s[1] for s in standards])
    low, high = get(curve, "range_low_mg_per_ml"), get(curve, "range_high_mg_per_ml")
    sample_a = _floats([get(s, "absorbance") for s in samples])
    xr = _span([*sx, *_floats([low, high])])
    yr = _span([*sy, *sample_a])
    d = Drawing(WIDTH, HEIGHT)
    model = str(get(curve, "model", ""))
    accepted = get(curve, "accepted")
    _title(d, f"{title} ({clean(model, 20)} model)", "" if accepted in (True, None) else "curve NOT accepted")
    f = _frame(d, xr, yr, "protein in the well (mg/mL)", "absorbance (AU)", (52, 36, WIDTH - 66, HEIGHT - 82))
    grid = np.linspace(f.xmin, f.xmax, 61)
    fitted = curve_absorbance(model, get(curve, "params", []), grid)
    lo_x = float(low) if isinstance(low, int | float) else f.xmin
    hi_x = float(high) if isinstance(high, int | float) else f.xmax
    d.add(Rect(f.X(lo_x), f.y0, f.X(hi_x) - f.X(lo_x), f.h, fillColor=C_RANGE, strokeColor=None))
    for edge in (lo_x, hi_x):
        d.add(Line(f.X(edge), f.y0, f.X(edge), f.y0 + f.h, strokeColor=C_RANGE_EDGE, strokeWidth=0.7,
                   strokeDashArray=[2, 2]))
    line = _polyline(f, list(grid), list(fitted), C_FIT, 1.3)
    if line is not None:
        d.add(line)
    for x, y in zip(sx, sy, strict=True):
        if math.isfinite(x) and math.isfinite(y):
            d.add(_dot(C_STANDARD, 2.6)(f.X(x), f.Y(y)))
    inside = (grid >= lo_x) & (grid <= hi_x)
    n_out = 0
    for s, a in zip(samples, sample_a, strict=True):
        if not math.isfinite(a):
            continue
        x = _invert(grid[inside], fitted[inside], a) if get(s, "in_range", True) else None
        if x is None:
            n_out += 1
            edge_x = f.x0 + f.w - 6 if a > float(np.nanmax(fitted[inside], initial=-np.inf)) else f.x0 + 6
            d.add(_triangle(C_OUT)(edge_x, f.Y(f.clamp_y(a))))
            d.add(_text(edge_x - 6 if edge_x > f.x0 + f.w / 2 else edge_x + 6, f.Y(f.clamp_y(a)) + 4,
                        f"{clean(get(s, 'well', '?'), 8)} out of range", 6,
                        "end" if edge_x > f.x0 + f.w / 2 else "start", C_OUT))
        else:
            d.add(_diamond(C_SAMPLE)(f.X(x), f.Y(a)))
    entries = [(_dot(C_STANDARD, 2.6), "standards"), (_swatch(C_FIT, 1.3), "fitted curve"),
               (_diamond(C_SAMPLE), "samples (on the curve)"), (_swatch(None, fill=C_RANGE), "calibrated range")]
    if n_out:
        entries.append((_triangle(C_OUT), "sample outside range"))
    _legend(d, entries, HEIGHT - 27)
    return d


# ---------------------------------------------------------------- Michaelis–Menten


def michaelis_menten_chart(kinetics: dict[str, Any] | None) -> Drawing:
    """Initial rates against substrate, the fitted curve and its 95 % band (see :func:`mm_band`)."""
    title = "Initial rate against substrate concentration"
    if not isinstance(kinetics, dict):
        return _empty(title, "No kinetic data in this dossier.")
    pts = get(kinetics, "points", {})
    s, v = _floats(get(pts, "substrate_mm", [])), _floats(get(pts, "rate_u_per_ml", []))
    fit = get(kinetics, "fit")
    model = str(get(kinetics, "model", "michaelis-menten"))
    vmax, km = get(fit, "vmax"), get(fit, "km")
    have_fit = isinstance(vmax, int | float) and isinstance(km, int | float) and km > 0
    smax = max([x for x in s if math.isfinite(x)] + [float(km) * 2 if have_fit else 1.0])
    grid = smax * 1.04 * np.linspace(0.0, 1.0, 64) ** 2  # dense where the curve bends
    fitted = np.full_like(grid, np.nan)
    half = np.full_like(grid, np.nan)
    band_note = ""
    if have_fit:
        ki = get(fit, "ki_mm", get(fit, "ki"))
        if model == "substrate-inhibition" and isinstance(ki, int | float) and ki > 0:
            fitted = vmax * grid / (km + grid + grid**2 / ki)
            band_note = "band not drawn for the substrate-inhibition model"
        else:
            se_v, se_k = get(fit, "vmax_se"), get(fit, "km_se")
            dof = get(fit, "dof")
            if all(isinstance(x, int | float) for x in (se_v, se_k, dof)) and dof > 0:
                fitted, half = mm_band(grid, vmax, km, se_v, se_k, float(get(fit, "cov_vmax_km", 0.0)), int(dof))
            else:
                fitted = vmax * grid / (km + grid)
                band_note = "no standard errors: band not drawn"
    upper = fitted + np.nan_to_num(half)
    d = Drawing(WIDTH, HEIGHT)
    note = clean(get(kinetics, "reason", ""), 80) if get(kinetics, "flagged") else ""
    _title(d, f"{title} ({clean(model, 30)})", note)
    yr = _span([*v, *[float(u) for u in upper if math.isfinite(u)]])
    f = _frame(d, _span([*s, smax * 1.04]), yr, "substrate [S] (mM)", "initial rate (U/mL of lot)",
               (52, 36, WIDTH - 66, HEIGHT - 82))
    if np.isfinite(half).any():
        lower = fitted - half
        ok = np.isfinite(lower) & np.isfinite(upper)
        poly: list[float] = []
        for x, y in zip(grid[ok], upper[ok], strict=True):
            poly += [f.X(x), f.Y(f.clamp_y(y))]
        for x, y in zip(grid[ok][::-1], lower[ok][::-1], strict=True):
            poly += [f.X(x), f.Y(f.clamp_y(y))]
        if len(poly) >= 6:
            d.add(Polygon(poly, fillColor=C_BAND, strokeColor=None))
    if have_fit:
        line = _polyline(f, list(grid), list(fitted), C_FIT, 1.4)
        if line is not None:
            d.add(line)
        if model != "substrate-inhibition" and f.ymin <= vmax <= f.ymax:
            d.add(Line(f.x0, f.Y(vmax), f.x0 + f.w, f.Y(vmax), strokeColor=C_AXIS, strokeWidth=0.7,
                       strokeDashArray=[4, 3]))
            d.add(_text(f.x0 + f.w - 3, f.Y(vmax) + 3, f"Vmax = {num(vmax)} U/mL", 6.5, "end", C_AXIS))
        if f.xmin <= km <= f.xmax:
            at_km = float(np.interp(km, grid, fitted))
            d.add(Line(f.X(km), f.y0, f.X(km), f.Y(f.clamp_y(at_km)), strokeColor=C_AXIS, strokeWidth=0.7,
                       strokeDashArray=[1.5, 2]))
            d.add(_text(f.X(km) + 3, f.y0 + 4, f"Km = {num(km)} mM", 6.5, "start", C_AXIS))
    for x, y in zip(s, v, strict=True):
        if math.isfinite(x) and math.isfinite(y):
            d.add(_dot(colors.white, 2.6, C_INK)(f.X(x), f.Y(f.clamp_y(y))))
    entries = [(_dot(colors.white, 2.6, C_INK), "measured initial rates")]
    if have_fit:
        entries.append((_swatch(C_FIT, 1.4), "non-linear least-squares fit"))
    if np.isfinite(half).any():
        entries.append((_swatch(None, fill=C_BAND), "95 % confidence band (delta method)"))
    elif band_note:
        entries.append((_swatch(C_GRID), band_note))
    _legend(d, entries, HEIGHT - 27)
    return d


# ---------------------------------------------------------------- progress curves


def progress_curves_chart(traces: dict[str, Any] | None) -> Drawing:
    """Absorbance against time for up to three wells; the fitted line is drawn thick over the
    window chosen for the initial rate (A = intercept + slope·t)."""
    title = "Progress curves and initial-rate windows"
    curves = [c for c in (get(traces, "curves", []) or []) if isinstance(c, dict)][:3]
    t = _floats(get(traces, "time_min", []))
    if not curves or not t:
        return _empty(title, "No progress curves in this dossier.")
    all_a = [a for c in curves for a in _floats(get(c, "absorbance", []))]
    d = Drawing(WIDTH, HEIGHT)
    flagged = [clean(get(c, "well", "?"), 12) for c in curves if get(c, "flag")]
    _title(d, title, f"flagged: {', '.join(flagged)}" if flagged else "")
    f = _frame(d, _span(t, pad=0.0), _span(all_a), "time (min)", "absorbance (AU)", (52, 36, WIDTH - 66, HEIGHT - 82))
    entries = []
    for colour, c in zip(TRACE_COLOURS, curves, strict=False):
        a = _floats(get(c, "absorbance", []))
        n = min(len(a), len(t))
        raw = _polyline(f, t[:n], a[:n], colour, 0.5)
        if raw is not None:
            d.add(raw)
        d.add(_squares([(f.X(x), f.Y(f.clamp_y(y))) for x, y in zip(t[:n], a[:n], strict=True)
                        if math.isfinite(x) and math.isfinite(y)], 1.3, colour))
        w0, w1 = get(c, "window_start_min"), get(c, "window_end_min")
        slope, icpt = get(c, "slope_au_per_min"), get(c, "intercept_au")
        if all(isinstance(x, int | float) for x in (w0, w1, slope, icpt)):
            seg = _polyline(f, [w0, w1], [icpt + slope * w0, icpt + slope * w1], colour, 3.0)
            if seg is not None:
                d.add(seg)
        label = f"{clean(get(c, 'well', '?'), 12)}: {num(get(c, 'substrate_mm'), 3)} mM, {num(slope, 3)} AU/min"
        if get(c, "flag"):
            label += f" ({clean(get(c, 'flag'), 30)})"
        entries.append((_swatch(colour, 3.0), label))
    _legend(d, entries, HEIGHT - 27)
    d.add(_text(f.x0 + f.w - 3, f.y0 + 4, "thick segment: fitted line over the chosen window", 6.2, "end", C_AXIS))
    return d


# ---------------------------------------------------------------- I-MR chart


def _disposition_colour(value: Any) -> Any:
    text = str(value or "").lower()
    if text.startswith(Disposition.RELEASED):
        return C_RELEASED
    if text.startswith(Disposition.HELD):
        return C_HELD
    return C_OTHER


def imr_chart(chart: dict[str, Any] | None) -> Drawing:
    """Individuals chart with zone lines (centre, ±1σ, ±2σ, ±3σ), specification limits dashed,
    points coloured by disposition and signals ringed and labelled; below it the moving-range
    chart (MR_i = |x_i − x_{i−1}|, MR̄ = d₂·σ, upper limit D₄·MR̄)."""
    title = clean(get(chart, "title", "Trend"), 70)
    values = _floats(get(chart, "values", []))
    if not values or not any(math.isfinite(v) for v in values):
        return _empty(f"I-MR chart: {title}", "No trend values for this attribute.")
    unit = clean(get(chart, "unit", ""), 20)
    lots = [clean(x, 18) for x in (get(chart, "lots", []) or [])]
    disp = list(get(chart, "dispositions", []) or [])
    center, sigma = get(chart, "center"), get(chart, "sigma")
    have_limits = isinstance(center, int | float) and isinstance(sigma, int | float) and sigma > 0
    lsl, usl = get(chart, "lsl"), get(chart, "usl")
    specs = [(x, name) for x, name in ((lsl, "LSL"), (usl, "USL")) if isinstance(x, int | float)]
    n = len(values)
    height = 330.0
    d = Drawing(WIDTH, height)
    _title(d, f"I-MR chart: {title}")
    span_vals = [*values, *[x for x, _ in specs]]
    if have_limits:
        span_vals += [center - 3.2 * sigma, center + 3.2 * sigma]
    yr = _span(span_vals, include_zero=False, pad=0.04)
    ibox = (60.0, 128.0, WIDTH - 100, height - 170)
    f = _frame(d, (0.5, n + 0.5), yr, "", f"{title} ({unit})" if unit else title, ibox, x_ticks=False)
    if have_limits:
        for k, width, colour, dash in ((0, 1.0, C_INK, None), (1, 0.5, C_ZONE, [1, 2]), (2, 0.5, C_ZONE, [3, 2]),
                                       (3, 1.0, C_CONTROL, None)):
            for sign in ((1,) if k == 0 else (1, -1)):
                y = center + sign * k * sigma
                if f.ymin <= y <= f.ymax:
                    d.add(Line(f.x0, f.Y(y), f.x0 + f.w, f.Y(y), strokeColor=colour, strokeWidth=width,
                               strokeDashArray=dash))
                    name = "CL" if k == 0 else (("UCL" if sign > 0 else "LCL") if k == 3 else f"{'+' if sign > 0 else '−'}{k}σ")
                    d.add(_text(f.x0 + f.w + 3, f.Y(y) - 2.3, f"{name} {num(y)}" if k in (0, 3) else name, 6,
                                colour=colour if k else C_INK))
    for x, name in specs:
        if f.ymin <= x <= f.ymax:
            d.add(Line(f.x0, f.Y(x), f.x0 + f.w, f.Y(x), strokeColor=C_SPEC, strokeWidth=1.0, strokeDashArray=[5, 3]))
            d.add(_text(f.x0 + 3, f.Y(x) + 2.5, f"{name} {num(x)}", 6, colour=C_SPEC))
    xs = [float(i + 1) for i in range(n)]
    joined = _polyline(f, xs, values, C_ZONE, 0.7)
    if joined is not None:
        d.add(joined)
    for i, (x, y) in enumerate(zip(xs, values, strict=True)):
        if math.isfinite(y):
            d.add(_dot(_disposition_colour(disp[i] if i < len(disp) else None), 2.5)(f.X(x), f.Y(y)))
    labels = list(get(chart, "signal_labels", []) or [])
    for j, idx in enumerate(get(chart, "signal_indices", []) or []):
        if isinstance(idx, int) and 0 <= idx < n and math.isfinite(values[idx]):
            px, py = f.X(xs[idx]), f.Y(values[idx])
            d.add(_ring(C_SIGNAL)(px, py))
            text = clean(labels[j] if j < len(labels) else "signal", 40)
            anchor = "end" if px > f.x0 + f.w * 0.7 else "start"
            ty = py + 8 if py < f.y0 + f.h - 14 else py - 13
            d.add(_text(px + (-7 if anchor == "end" else 7), ty, text, 6.2, anchor, C_SIGNAL, bold=True))
    step = max(1, math.ceil(n / 24))
    for i in range(0, n, step):
        if i < len(lots):
            g = Group(_text(0, 0, lots[i], 5.8, "end", C_AXIS))
            g.transform = (0.766, 0.643, -0.643, 0.766, f.X(xs[i]) + 2, f.y0 - 5)
            d.add(g)
    # moving-range panel
    mr = [abs(values[i] - values[i - 1]) for i in range(1, n)]
    mr_x = xs[1:]
    mr_bar = D2 * sigma if have_limits else None
    mr_ucl = D4 * mr_bar if mr_bar is not None else None
    m = _frame(d, (0.5, n + 0.5), _span([*mr, *([mr_ucl] if mr_ucl else [])], pad=0.08), "lot (oldest to newest)",
               "moving range", (60.0, 20.0, WIDTH - 100, 56.0), x_ticks=False)
    for y, colour, name in ((mr_bar, C_INK, "MR̄"), (mr_ucl, C_CONTROL, "UCL")):
        if y is not None and m.ymin <= y <= m.ymax:
            d.add(Line(m.x0, m.Y(y), m.x0 + m.w, m.Y(y), strokeColor=colour, strokeWidth=0.8))
            d.add(_text(m.x0 + m.w + 3, m.Y(y) - 2.3, f"{name} {num(y)}", 6, colour=colour))
    line = _polyline(m, mr_x, mr, C_ZONE, 0.7)
    if line is not None:
        d.add(line)
    d.add(_squares([(m.X(x), m.Y(y)) for x, y in zip(mr_x, mr, strict=True) if math.isfinite(y)], 1.4, C_INK))
    _legend(d, [(_dot(C_RELEASED, 2.5), "released lot"), (_dot(C_HELD, 2.5), "held lot"),
                (_dot(C_OTHER, 2.5), "other / this lot pending"), (_ring(C_SIGNAL, 4), "run-rule signal"),
                (_swatch(C_CONTROL, 1.0), "±3σ control limits"), (_swatch(C_ZONE, 0.6, [1, 2]), "±1σ, ±2σ zones"),
                (_swatch(C_SPEC, 1.0, [5, 3]), "specification limits")], height - 27)
    return d
