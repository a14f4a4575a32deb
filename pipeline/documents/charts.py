"""Vector charts for the batch report, drawn with reportlab graphics (no raster, no matplotlib).

Each public function takes the plain mapping found in a dossier and returns a
``reportlab.graphics.shapes.Drawing`` with axis titles and units. The charts draw what the
dossier carries (fitted curves and bands are computed with the fit, not here). Absent or empty
data gives a small drawing that says so, never an exception: a held lot's report must still print.
"""

from __future__ import annotations

import math
from typing import Any

from reportlab.graphics.shapes import Drawing, Group, Line, Polygon, Rect
from reportlab.lib import colors

from pipeline.documents.chart_drawing import (
    C_AXIS,
    C_BAND,
    C_CONTROL,
    C_FIT,
    C_GRID,
    C_HELD,
    C_INK,
    C_OTHER,
    C_OUT,
    C_RANGE,
    C_RANGE_EDGE,
    C_RELEASED,
    C_SAMPLE,
    C_SIGNAL,
    C_SPEC,
    C_STANDARD,
    C_ZONE,
    HEIGHT,
    TRACE_COLOURS,
    WIDTH,
    Frame,
    axes_frame,
    chart_title,
    diamond,
    dot,
    empty_chart,
    floats,
    legend,
    polyline,
    ring,
    span,
    squares,
    swatch,
    text_string,
    triangle,
)
from pipeline.documents.text import clean, get, num
from pipeline.vocabulary import Disposition

# Control-chart constants for moving ranges of two (ASTM Manual on Presentation of Data and
# Control Chart Analysis): sigma = MR-bar / d2, MR upper limit = D4 * MR-bar.
D2 = 1.128
D4 = 3.267


# ---------------------------------------------------------------- standard curve


def _inside_frame(f: Frame, xs: list[float], ys: list[float]) -> tuple[list[float], list[float]]:
    """The points of a curve up to the frame's right edge, ended exactly on it (straight-line cut)."""
    out_x: list[float] = []
    out_y: list[float] = []
    for i, (x, y) in enumerate(zip(xs, ys, strict=True)):
        if x <= f.xmax:
            out_x.append(x)
            out_y.append(y)
            continue
        if i and out_x and math.isfinite(y) and math.isfinite(out_y[-1]) and x > out_x[-1]:
            share = (f.xmax - out_x[-1]) / (x - out_x[-1])
            out_x.append(f.xmax)
            out_y.append(out_y[-1] + share * (y - out_y[-1]))
        break
    return out_x, out_y


def standard_curve_chart(curve: dict[str, Any] | None, samples: list[dict[str, Any]] | None = None) -> Drawing:
    """Protein standards (points), the fitted curve, the calibrated range and the samples on it.

    Samples are placed at the in-well concentration read from the curve; a sample whose
    reading lies outside the calibrated range is drawn as a triangle at the frame's edge.
    """
    title = "Protein standard curve"
    if not isinstance(curve, dict):
        return empty_chart(title, "No standard curve in this dossier (protein plate missing or invalid).")
    samples = samples if samples is not None else (curve.get("samples") or [])
    standards = [s for s in (curve.get("standards") or []) if isinstance(s, list | tuple) and len(s) >= 2]
    sx, sy = floats([s[0] for s in standards]), floats([s[1] for s in standards])
    low, high = get(curve, "range_low_mg_per_ml"), get(curve, "range_high_mg_per_ml")
    sample_a = floats([get(s, "signal") for s in samples])
    xr = span([*sx, *floats([low, high])])
    yr = span([*sy, *sample_a])
    d = Drawing(WIDTH, HEIGHT)
    model = str(get(curve, "model", ""))
    accepted = get(curve, "accepted")
    chart_title(d, f"{title} ({clean(model, 20)} model)", "" if accepted in (True, None) else "curve NOT accepted")
    f = axes_frame(d, xr, yr, "protein in the well (mg/mL)", clean(get(curve, "signal_label") or "signal", 40), (52, 36, WIDTH - 66, HEIGHT - 82))
    points = get(curve, "points", {})
    grid, fitted = _inside_frame(f, floats(get(points, "mg_per_ml", [])), floats(get(points, "absorbance_au", [])))
    lo_x = float(low) if isinstance(low, int | float) else f.xmin
    hi_x = float(high) if isinstance(high, int | float) else f.xmax
    d.add(Rect(f.X(lo_x), f.y0, f.X(hi_x) - f.X(lo_x), f.h, fillColor=C_RANGE, strokeColor=None))
    for edge in (lo_x, hi_x):
        d.add(Line(f.X(edge), f.y0, f.X(edge), f.y0 + f.h, strokeColor=C_RANGE_EDGE, strokeWidth=0.7,
                   strokeDashArray=[2, 2]))
    line = polyline(f, grid, fitted, C_FIT, 1.3)
    if line is not None:
        d.add(line)
    for x, y in zip(sx, sy, strict=True):
        if math.isfinite(x) and math.isfinite(y):
            d.add(dot(C_STANDARD, 2.6)(f.X(x), f.Y(y)))
    in_range = [a for x, a in zip(grid, fitted, strict=True) if lo_x <= x <= hi_x and math.isfinite(a)]
    top = max(in_range, default=-math.inf)
    n_out = 0
    for s, a in zip(samples, sample_a, strict=True):
        if not math.isfinite(a):
            continue
        x = get(s, "in_well_mg_per_ml") if get(s, "in_range", True) else None
        if not isinstance(x, int | float):
            n_out += 1
            edge_x = f.x0 + f.w - 6 if a > top else f.x0 + 6
            d.add(triangle(C_OUT)(edge_x, f.Y(f.clamp_y(a))))
            d.add(text_string(edge_x - 6 if edge_x > f.x0 + f.w / 2 else edge_x + 6, f.Y(f.clamp_y(a)) + 4,
                              f"{clean(get(s, 'well', '?'), 8)} out of range", 6,
                              "end" if edge_x > f.x0 + f.w / 2 else "start", C_OUT))
        else:
            d.add(diamond(C_SAMPLE)(f.X(x), f.Y(a)))
    entries = [(dot(C_STANDARD, 2.6), "standards"), (swatch(C_FIT, 1.3), "fitted curve"),
               (diamond(C_SAMPLE), "samples (on the curve)"), (swatch(None, fill=C_RANGE), "calibrated range")]
    if n_out:
        entries.append((triangle(C_OUT), "sample outside range"))
    legend(d, entries, HEIGHT - 27)
    return d


# ---------------------------------------------------------------- Michaelis–Menten


def _band(d: Drawing, f: Frame, xs: list[float], low: list[float], high: list[float]) -> None:
    """The band between two curves as one filled polygon (points where either end is missing left out)."""
    ok = [(x, lo, hi) for x, lo, hi in zip(xs, low, high, strict=True) if math.isfinite(lo) and math.isfinite(hi)]
    poly: list[float] = []
    for x, _, hi in ok:
        poly += [f.X(x), f.Y(f.clamp_y(hi))]
    for x, lo, _ in reversed(ok):
        poly += [f.X(x), f.Y(f.clamp_y(lo))]
    if len(poly) >= 6:
        d.add(Polygon(poly, fillColor=C_BAND, strokeColor=None))


def michaelis_menten_chart(kinetics: dict[str, Any] | None) -> Drawing:
    """Initial rates against substrate, the fitted curve and its 95 % band (both from the dossier)."""
    title = "Initial rate against substrate concentration"
    if not isinstance(kinetics, dict):
        return empty_chart(title, "No kinetic data in this dossier.")
    pts = get(kinetics, "points", {})
    s, v = floats(get(pts, "substrate_mm", [])), floats(get(pts, "rate_u_per_ml", []))
    fit = get(kinetics, "fit")
    model = str(get(kinetics, "model", "michaelis-menten"))
    vmax, km = get(fit, "vmax"), get(fit, "km")
    curve = get(kinetics, "curve")
    have_fit = isinstance(vmax, int | float) and isinstance(km, int | float) and km > 0 and isinstance(curve, dict)
    grid = floats(get(curve, "substrate", [])) if have_fit else []
    fitted = floats(get(curve, "rate", [])) if have_fit else []
    low, high = floats(get(curve, "band_low") or []), floats(get(curve, "band_high") or [])
    has_band = have_fit and len(low) == len(high) == len(grid) > 0
    band_note = ""
    if have_fit and not has_band:
        band_note = ("band not drawn for the substrate-inhibition model" if model == "substrate-inhibition"
                     else "no standard errors: band not drawn")
    upper = high if has_band else fitted
    top = grid[-1] if grid else max([x for x in s if math.isfinite(x)] + [1.0]) * 1.04
    d = Drawing(WIDTH, HEIGHT)
    note = clean(get(kinetics, "reason", ""), 80) if get(kinetics, "flagged") else ""
    chart_title(d, f"{title} ({clean(model, 30)})", note)
    yr = span([*v, *[u for u in upper if math.isfinite(u)]])
    f = axes_frame(d, span([*s, top]), yr, "substrate [S] (mM)", "initial rate (U/mL of lot)",
                   (52, 36, WIDTH - 66, HEIGHT - 82))
    if has_band:
        _band(d, f, grid, low, high)
    if have_fit:
        line = polyline(f, grid, fitted, C_FIT, 1.4)
        if line is not None:
            d.add(line)
        if model != "substrate-inhibition" and f.ymin <= vmax <= f.ymax:
            d.add(Line(f.x0, f.Y(vmax), f.x0 + f.w, f.Y(vmax), strokeColor=C_AXIS, strokeWidth=0.7,
                       strokeDashArray=[4, 3]))
            d.add(text_string(f.x0 + f.w - 3, f.Y(vmax) + 3, f"Vmax = {num(vmax)} U/mL", 6.5, "end", C_AXIS))
        if f.xmin <= km <= f.xmax:
            at_km = _at(km, grid, fitted)
            d.add(Line(f.X(km), f.y0, f.X(km), f.Y(f.clamp_y(at_km)), strokeColor=C_AXIS, strokeWidth=0.7,
                       strokeDashArray=[1.5, 2]))
            d.add(text_string(f.X(km) + 3, f.y0 + 4, f"Km = {num(km)} mM", 6.5, "start", C_AXIS))
    for x, y in zip(s, v, strict=True):
        if math.isfinite(x) and math.isfinite(y):
            d.add(dot(colors.white, 2.6, C_INK)(f.X(x), f.Y(f.clamp_y(y))))
    entries = [(dot(colors.white, 2.6, C_INK), "measured initial rates")]
    if have_fit:
        entries.append((swatch(C_FIT, 1.4), "non-linear least-squares fit"))
    if has_band:
        entries.append((swatch(None, fill=C_BAND), "95 % confidence band (delta method)"))
    elif band_note:
        entries.append((swatch(C_GRID), band_note))
    legend(d, entries, HEIGHT - 27)
    return d


def _at(x: float, xs: list[float], ys: list[float]) -> float:
    """Where the drawn curve passes ``x``: straight-line interpolation between its points."""
    for (x0, y0), (x1, y1) in zip(zip(xs, ys, strict=True), zip(xs[1:], ys[1:], strict=True), strict=False):
        if x0 <= x <= x1 and x1 > x0:
            return y0 + (x - x0) / (x1 - x0) * (y1 - y0)
    return ys[-1] if ys else math.nan


# ---------------------------------------------------------------- progress curves


def progress_curves_chart(traces: dict[str, Any] | None) -> Drawing:
    """Absorbance against time for up to three wells; the fitted line is drawn thick over the
    window chosen for the initial rate (A = intercept + slope·t)."""
    title = "Progress curves and initial-rate windows"
    curves = [c for c in (get(traces, "curves", []) or []) if isinstance(c, dict)][:3]
    t = floats(get(traces, "time_min", []))
    if not curves or not t:
        return empty_chart(title, "No progress curves in this dossier.")
    all_a = [a for c in curves for a in floats(get(c, "absorbance", []))]
    d = Drawing(WIDTH, HEIGHT)
    flagged = [clean(get(c, "well", "?"), 12) for c in curves if get(c, "flag")]
    chart_title(d, title, f"flagged: {', '.join(flagged)}" if flagged else "")
    f = axes_frame(d, span(t, pad=0.0), span(all_a), "time (min)", "absorbance (AU)", (52, 36, WIDTH - 66, HEIGHT - 82))
    entries = []
    for colour, c in zip(TRACE_COLOURS, curves, strict=False):
        a = floats(get(c, "absorbance", []))
        n = min(len(a), len(t))
        raw = polyline(f, t[:n], a[:n], colour, 0.5)
        if raw is not None:
            d.add(raw)
        d.add(squares([(f.X(x), f.Y(f.clamp_y(y))) for x, y in zip(t[:n], a[:n], strict=True)
                        if math.isfinite(x) and math.isfinite(y)], 1.3, colour))
        w0, w1 = get(c, "window_start_min"), get(c, "window_end_min")
        slope, icpt = get(c, "slope_au_per_min"), get(c, "intercept_au")
        if all(isinstance(x, int | float) for x in (w0, w1, slope, icpt)):
            seg = polyline(f, [w0, w1], [icpt + slope * w0, icpt + slope * w1], colour, 3.0)
            if seg is not None:
                d.add(seg)
        label = f"{clean(get(c, 'well', '?'), 12)}: {num(get(c, 'substrate_mm'), 3)} mM, {num(slope, 3)} AU/min"
        if get(c, "flag"):
            label += f" ({clean(get(c, 'flag'), 30)})"
        entries.append((swatch(colour, 3.0), label))
    legend(d, entries, HEIGHT - 27)
    d.add(text_string(f.x0 + f.w - 3, f.y0 + 4, "thick segment: fitted line over the chosen window", 6.2, "end", C_AXIS))
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
    values = floats(get(chart, "values", []))
    if not values or not any(math.isfinite(v) for v in values):
        return empty_chart(f"I-MR chart: {title}", "No trend values for this attribute.")
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
    chart_title(d, f"I-MR chart: {title}")
    span_vals = [*values, *[x for x, _ in specs]]
    if have_limits:
        span_vals += [center - 3.2 * sigma, center + 3.2 * sigma]
    yr = span(span_vals, include_zero=False, pad=0.04)
    ibox = (60.0, 128.0, WIDTH - 100, height - 170)
    f = axes_frame(d, (0.5, n + 0.5), yr, "", f"{title} ({unit})" if unit else title, ibox, x_ticks=False)
    if have_limits:
        for k, width, colour, dash in ((0, 1.0, C_INK, None), (1, 0.5, C_ZONE, [1, 2]), (2, 0.5, C_ZONE, [3, 2]),
                                       (3, 1.0, C_CONTROL, None)):
            for sign in ((1,) if k == 0 else (1, -1)):
                y = center + sign * k * sigma
                if f.ymin <= y <= f.ymax:
                    d.add(Line(f.x0, f.Y(y), f.x0 + f.w, f.Y(y), strokeColor=colour, strokeWidth=width,
                               strokeDashArray=dash))
                    name = "CL" if k == 0 else (("UCL" if sign > 0 else "LCL") if k == 3 else f"{'+' if sign > 0 else '−'}{k}σ")
                    d.add(text_string(f.x0 + f.w + 3, f.Y(y) - 2.3, f"{name} {num(y)}" if k in (0, 3) else name, 6,
                                colour=colour if k else C_INK))
    for x, name in specs:
        if f.ymin <= x <= f.ymax:
            d.add(Line(f.x0, f.Y(x), f.x0 + f.w, f.Y(x), strokeColor=C_SPEC, strokeWidth=1.0, strokeDashArray=[5, 3]))
            d.add(text_string(f.x0 + 3, f.Y(x) + 2.5, f"{name} {num(x)}", 6, colour=C_SPEC))
    xs = [float(i + 1) for i in range(n)]
    joined = polyline(f, xs, values, C_ZONE, 0.7)
    if joined is not None:
        d.add(joined)
    for i, (x, y) in enumerate(zip(xs, values, strict=True)):
        if math.isfinite(y):
            d.add(dot(_disposition_colour(disp[i] if i < len(disp) else None), 2.5)(f.X(x), f.Y(y)))
    labels = list(get(chart, "signal_labels", []) or [])
    for j, idx in enumerate(get(chart, "signal_indices", []) or []):
        if isinstance(idx, int) and 0 <= idx < n and math.isfinite(values[idx]):
            px, py = f.X(xs[idx]), f.Y(values[idx])
            d.add(ring(C_SIGNAL)(px, py))
            text = clean(labels[j] if j < len(labels) else "signal", 40)
            anchor = "end" if px > f.x0 + f.w * 0.7 else "start"
            ty = py + 8 if py < f.y0 + f.h - 14 else py - 13
            d.add(text_string(px + (-7 if anchor == "end" else 7), ty, text, 6.2, anchor, C_SIGNAL, bold=True))
    step = max(1, math.ceil(n / 24))
    for i in range(0, n, step):
        if i < len(lots):
            g = Group(text_string(0, 0, lots[i], 5.8, "end", C_AXIS))
            g.transform = (0.766, 0.643, -0.643, 0.766, f.X(xs[i]) + 2, f.y0 - 5)
            d.add(g)
    # moving-range panel
    mr = [abs(values[i] - values[i - 1]) for i in range(1, n)]
    mr_x = xs[1:]
    mr_bar = D2 * sigma if have_limits else None
    mr_ucl = D4 * mr_bar if mr_bar is not None else None
    m = axes_frame(d, (0.5, n + 0.5), span([*mr, *([mr_ucl] if mr_ucl else [])], pad=0.08), "lot (oldest to newest)",
               "moving range", (60.0, 20.0, WIDTH - 100, 56.0), x_ticks=False)
    for y, colour, name in ((mr_bar, C_INK, "MR̄"), (mr_ucl, C_CONTROL, "UCL")):
        if y is not None and m.ymin <= y <= m.ymax:
            d.add(Line(m.x0, m.Y(y), m.x0 + m.w, m.Y(y), strokeColor=colour, strokeWidth=0.8))
            d.add(text_string(m.x0 + m.w + 3, m.Y(y) - 2.3, f"{name} {num(y)}", 6, colour=colour))
    line = polyline(m, mr_x, mr, C_ZONE, 0.7)
    if line is not None:
        d.add(line)
    d.add(squares([(m.X(x), m.Y(y)) for x, y in zip(mr_x, mr, strict=True) if math.isfinite(y)], 1.4, C_INK))
    legend(d, [(dot(C_RELEASED, 2.5), "released lot"), (dot(C_HELD, 2.5), "held lot"),
                (dot(C_OTHER, 2.5), "other / this lot pending"), (ring(C_SIGNAL, 4), "run-rule signal"),
                (swatch(C_CONTROL, 1.0), "±3σ control limits"), (swatch(C_ZONE, 0.6, [1, 2]), "±1σ, ±2σ zones"),
                (swatch(C_SPEC, 1.0, [5, 3]), "specification limits")], height - 27)
    return d
