"""The I-MR chart a reviewer looks at, drawn with matplotlib (Agg canvas): PNG and PDF bytes.

Takes a ``pipeline.chartview.ChartView``; draws the individuals chart with its 1σ/2σ/3σ zones,
centre and control limits, the specification limits, released and held lots in their own
colours and marker shapes, run-rule signals ringed and labelled, and below it the
moving-range chart. No pyplot, no global state: each call builds its own figure.
"""

from __future__ import annotations

import io
import math
from dataclasses import dataclass

from matplotlib.backends.backend_agg import FigureCanvasAgg
from matplotlib.figure import Figure
from matplotlib.lines import Line2D
from matplotlib.patches import Patch
from matplotlib.transforms import blended_transform_factory

from pipeline.release.chart_view import OTHER_CHART_TREND, ChartRow, ChartView
from pipeline.vocabulary import Disposition, HoldCategory, NelsonRule


@dataclass(frozen=True)
class Style:
    colour: str
    marker: str
    label: str
    size: float = 46.0


STYLES: dict[str, Style] = {
    Disposition.RELEASED: Style("#1f5f99", "o", "released", 40.0),
    HoldCategory.OUT_OF_SPECIFICATION: Style("#c1272d", "s", "held: out of specification", 64.0),
    HoldCategory.OUT_OF_TREND: Style("#e07b00", "D", "held: out of trend (this chart)", 64.0),
    HoldCategory.INCOMPLETE: Style("#0f8b8d", "^", "held: incomplete", 80.0),
    HoldCategory.INVALID_ASSAY: Style("#7b4f9d", "v", "held: invalid assay", 80.0),
    OTHER_CHART_TREND: Style("#9c6644", "h", "held: out of trend on another chart", 80.0),
}
OTHER_HOLD = Style("#5c6670", "P", "held: other reason", 80.0)

INK = "#1d2731"
MUTED = "#66727f"
ZONE_FILL = ("#e6f2e7", "#fff4d1", "#fde3d7")  # within 1σ, 1–2σ, 2–3σ
ZONE_LINE = "#8f9ba8"
CONTROL = "#a4161a"
SPEC = "#4a1e6b"
SIGNAL = "#d1007a"
SERIES_LINE = "#8492a1"
SPEC_WITHIN_SIGMAS = 12.0  # specification limits farther than this from the centre are marked off scale


def style_of(category: str) -> Style:
    return STYLES.get(category, OTHER_HOLD)


def _fmt(value: float, digits: int) -> str:
    return f"{value:.{max(digits, 0)}f}"


def _y_range(view: ChartView) -> tuple[float, float, list[tuple[str, float, bool]]]:
    """Y limits covering the values, ±3.5σ and the specification limits that are near enough."""
    values = [r.value for r in view.rows if r.value is not None]
    lo_hi = list(values)
    lim = view.limits
    if lim is not None:
        lo_hi += [lim.center - 3.5 * lim.sigma, lim.center + 3.5 * lim.sigma]
    specs: list[tuple[str, float, bool]] = []
    for name, x in (("LSL", view.lsl), ("USL", view.usl)):
        if x is None:
            continue
        near = True
        if lim is not None:
            near = abs(x - lim.center) <= SPEC_WITHIN_SIGMAS * lim.sigma
        elif values:
            spread = (max(values) - min(values)) or abs(max(values)) * 0.1 or 1.0
            near = min(abs(x - v) for v in values) <= 6 * spread
        specs.append((name, x, near))
        if near:
            lo_hi.append(x)
    if not lo_hi:
        return 0.0, 1.0, specs
    lo, hi = min(lo_hi), max(lo_hi)
    pad = (hi - lo) * 0.06 or abs(hi) * 0.05 or 1.0
    return lo - pad, hi + pad, specs


def _subtitle(view: ChartView) -> str:
    d = view.digits + 1
    lim = view.limits
    rules = ", ".join(str(r) for r in view.rules)
    if lim is None:
        text = (f"Control limits not yet established: {view.released_total} of {view.baseline_n} "
                f"baseline lots released; points shown without limits · rules {rules}")
    else:
        text = (f"Limits v{lim.version}, frozen {lim.frozen_at_utc[:10]} by {lim.frozen_by}: "
                f"centre {_fmt(lim.center, d)}, σ̂ = MR̄/d₂ = {_fmt(lim.sigma, d + 1)}, "
                f"UCL {_fmt(lim.ucl, d)}, LCL {_fmt(lim.lcl, d)} · rules {rules}")
    cap = view.capability
    if cap is not None:
        text += f" · Cpk {cap.cpk:.2f}, Ppk {cap.ppk:.2f} ({cap.n} released lots"
        if cap.cpk_interval is not None:
            text += f"; Cpk {cap.confidence:.0%} CI {cap.cpk_interval.low:.2f}–{cap.cpk_interval.high:.2f}"
        text += "; fewer than 30 lots: uncertain)" if cap.warning else ")"
    return text


def _draw_individuals(ax, view: ChartView, rows: tuple[ChartRow, ...]) -> list:
    n = len(rows)
    lim = view.limits
    d = view.digits + 1
    ylo, yhi, specs = _y_range(view)
    ax.set_xlim(-0.6, n - 0.4)
    ax.set_ylim(ylo, yhi)
    right = blended_transform_factory(ax.transAxes, ax.transData)
    handles: list = []
    if lim is not None:
        c, s = lim.center, lim.sigma
        for k, fill in zip((1, 2, 3), ZONE_FILL, strict=True):
            ax.axhspan(c + (k - 1) * s, c + k * s, color=fill, zorder=0, lw=0)
            ax.axhspan(c - k * s, c - (k - 1) * s, color=fill, zorder=0, lw=0)
        for k in (1, 2):
            for sign in (1, -1):
                y = c + sign * k * s
                ax.axhline(y, color=ZONE_LINE, lw=0.8, ls=(0, (2, 2)), zorder=1)
                ax.text(1.006, y, f"{'+' if sign > 0 else '−'}{k}σ", transform=right, va="center",
                        ha="left", fontsize=8, color=MUTED)
        ax.axhline(c, color=INK, lw=1.3, zorder=2)
        ax.text(1.006, c, f"CL {_fmt(c, d)}", transform=right, va="center", ha="left", fontsize=8.5,
                color=INK, fontweight="bold")
        for y, name in ((lim.ucl, "UCL"), (lim.lcl, "LCL")):
            ax.axhline(y, color=CONTROL, lw=1.5, zorder=2)
            ax.text(1.006, y, f"{name} {_fmt(y, d)}", transform=right, va="center", ha="left",
                    fontsize=8.5, color=CONTROL, fontweight="bold")
        handles += [Patch(facecolor=ZONE_FILL[0], label="zone ≤1σ"),
                    Patch(facecolor=ZONE_FILL[1], label="zone 1–2σ"),
                    Patch(facecolor=ZONE_FILL[2], label="zone 2–3σ"),
                    Line2D([], [], color=INK, lw=1.3, label="centre line (CL)"),
                    Line2D([], [], color=CONTROL, lw=1.5, label="control limits ±3σ (UCL, LCL)")]
    spec_drawn = False
    for name, x, near in specs:
        if near:
            ax.axhline(x, color=SPEC, lw=1.5, ls=(0, (6, 3)), zorder=2)
            ax.text(0.006, x, f" {name} {_fmt(x, view.digits)} ", transform=blended_transform_factory(
                ax.transAxes, ax.transData), va="bottom" if name == "LSL" else "top", ha="left",
                fontsize=8.5, color=SPEC, fontweight="bold")
        else:
            above = lim is not None and x > lim.center
            ax.text(0.006, 0.985 if above else 0.015,
                    f"{name} {_fmt(x, view.digits)} {'↑' if above else '↓'} off scale",
                    transform=ax.transAxes, va="top" if above else "bottom", ha="left", fontsize=8.5,
                    color=SPEC, fontweight="bold")
        spec_drawn = True
    if spec_drawn:
        handles.append(Line2D([], [], color=SPEC, lw=1.5, ls=(0, (6, 3)), label="specification limits (LSL, USL)"))
    released = [(r.position, r.value) for r in rows if r.released and r.value is not None]
    if len(released) > 1:
        ax.plot([p for p, _ in released], [v for _, v in released], color=SERIES_LINE, lw=1.0, zorder=3)
    seen: dict[str, Style] = {}
    for row in rows:
        st = style_of(row.category)
        if row.value is None:
            continue
        ax.scatter([row.position], [row.value], s=st.size, marker=st.marker, color=st.colour,
                   edgecolors="white", linewidths=0.7, zorder=5)
        seen.setdefault(row.category, st)
    missing = [r for r in rows if r.value is None]
    bottom = blended_transform_factory(ax.transData, ax.transAxes)
    for row in missing:
        st = style_of(row.category)
        ax.scatter([row.position], [0.035], s=48, marker="x", color=st.colour, linewidths=1.6,
                   transform=bottom, zorder=5, clip_on=False)
    order = list(STYLES)  # the legend lists the categories in the order of their styles
    for category in sorted(seen, key=lambda c: order.index(c) if c in order else len(order)):
        st = seen[category]
        label = f"{st.label} lot" if category == Disposition.RELEASED else st.label
        if st is OTHER_HOLD:
            label = f"held: {category}"
        handles.append(Line2D([], [], ls="", marker=st.marker, color=st.colour, markeredgecolor="white",
                              markersize=7.5, label=label))
    for category in dict.fromkeys(r.category for r in missing):
        st = style_of(category)
        name = st.label if st is not OTHER_HOLD else f"held: {category}"
        handles.append(Line2D([], [], ls="", marker="x", color=st.colour, markersize=7, mew=1.6,
                              label=f"{name}, no valid value (× at the foot)"))
    ringed = False
    span = yhi - ylo
    ring = max(110.0, 290.0 * min(1.0, 40.0 / max(n, 1)))
    last_label: tuple[int, tuple[NelsonRule, ...]] | None = None
    for row in rows:
        if not row.signal_rules or row.value is None:
            continue
        ax.scatter([row.position], [row.value], s=ring, facecolors="none", edgecolors=SIGNAL,
                   linewidths=1.9 if ring > 200 else 1.3, zorder=6)
        ringed = True
        # label the first of a run of signalled lots, a change of rules, or after a gap
        if last_label is not None and last_label[1] == row.signal_rules and row.position - last_label[0] < 8:
            continue
        last_label = (row.position, row.signal_rules)
        text = "rule " + ", ".join(str(r) for r in row.signal_rules)
        upper = row.value > (ylo + yhi) / 2
        ax.annotate(text, (row.position, row.value),
                    xytext=(0, -17 if upper else 15), textcoords="offset points",
                    ha="center", va="top" if upper else "bottom", fontsize=9, color=SIGNAL,
                    fontweight="bold", zorder=7,
                    bbox={"boxstyle": "round,pad=0.2", "fc": "white", "ec": SIGNAL, "lw": 0.8})
    if ringed:
        handles.append(Line2D([], [], ls="", marker="o", markerfacecolor="none", markeredgecolor=SIGNAL,
                              markersize=11, mew=1.9, label="run-rule signal (Nelson rule)"))
    baseline = [r.position for r in rows if r.baseline]
    if lim is not None and baseline:
        x0, x1 = min(baseline) - 0.3, max(baseline) + 0.3
        top = blended_transform_factory(ax.transData, ax.transAxes)
        ax.plot([x0, x0, x1, x1], [0.975, 0.99, 0.99, 0.975], color=MUTED, lw=1.0, transform=top,
                clip_on=False, zorder=4)
        ax.text((x0 + x1) / 2, 1.0, f"baseline of limits v{lim.version} ({len(lim.baseline_lots)} lots"
                f"{'' if len(baseline) == len(lim.baseline_lots) else f', {len(baseline)} shown'})",
                transform=top, ha="center", va="bottom", fontsize=8, color=MUTED)
    ax.set_ylabel(f"{view.title} ({view.unit})" if view.unit else view.title, fontsize=10, color=INK)
    ax.grid(axis="y", color="#d5dbe1", lw=0.5, zorder=0)
    ax.tick_params(labelsize=8.5, colors=INK)
    if span <= 0:
        ax.set_ylim(ylo - 1, yhi + 1)
    return handles


def _draw_moving_range(ax, view: ChartView, n: int) -> None:
    lim = view.limits
    d = view.digits + 1
    right = blended_transform_factory(ax.transAxes, ax.transData)
    xs = [m.position for m in view.moving_ranges]
    ys = [m.moving_range for m in view.moving_ranges]
    top = max([*ys, *([lim.mr_ucl] if lim else [])], default=1.0) or 1.0
    ax.set_ylim(0, top * 1.15)
    ax.set_xlim(-0.6, n - 0.4)
    if lim is not None:
        ax.axhline(lim.mr_bar, color=INK, lw=1.1)
        ax.text(1.006, lim.mr_bar, f"MR̄ {_fmt(lim.mr_bar, d)}", transform=right, va="center", ha="left",
                fontsize=8, color=INK)
        ax.axhline(lim.mr_ucl, color=CONTROL, lw=1.4)
        ax.text(1.006, lim.mr_ucl, f"UCL {_fmt(lim.mr_ucl, d)}", transform=right, va="center", ha="left",
                fontsize=8, color=CONTROL, fontweight="bold")
    if xs:
        ax.plot(xs, ys, color=SERIES_LINE, lw=0.9, zorder=2)
        colours = [CONTROL if m.beyond_ucl else STYLES[Disposition.RELEASED].colour for m in view.moving_ranges]
        ax.scatter(xs, ys, s=18, marker="s", c=colours, zorder=3)
    ax.set_ylabel("moving range", fontsize=9.5, color=INK)
    ax.grid(axis="y", color="#d5dbe1", lw=0.5)
    ax.tick_params(labelsize=8, colors=INK)


def build_figure(view: ChartView, as_of: str | None = None) -> Figure:
    """The two-panel I-MR figure of ``view`` (A4 landscape proportions)."""
    fig = Figure(figsize=(11.69, 7.6), dpi=110)
    FigureCanvasAgg(fig)
    rows = view.rows
    n = max(len(rows), 1)
    grid = fig.add_gridspec(2, 1, height_ratios=(3.3, 1.0), hspace=0.07,
                            left=0.075, right=0.885, top=0.86, bottom=0.25)
    ax = fig.add_subplot(grid[0])
    mr = fig.add_subplot(grid[1], sharex=ax)
    fig.text(0.075, 0.955, f"{view.product_code} · {view.title} ({view.attribute}) — individuals and "
             "moving-range chart", fontsize=13.5, fontweight="bold", color=INK, ha="left", va="bottom")
    fig.text(0.075, 0.928, _subtitle(view), fontsize=9, color=MUTED if view.limits else CONTROL,
             ha="left", va="bottom")
    if not rows:
        ax.text(0.5, 0.5, "No lots on this chart yet.", transform=ax.transAxes, ha="center",
                va="center", fontsize=12, color=MUTED)
        handles: list = []
    else:
        handles = _draw_individuals(ax, view, rows)
        if view.limits is None:
            ax.text(0.5, 1.012, f"control limits not yet established: {view.released_total} of "
                    f"{view.baseline_n} baseline lots", transform=ax.transAxes, ha="center",
                    va="bottom", fontsize=10, color=CONTROL, fontweight="bold")
    _draw_moving_range(mr, view, n)
    ax.tick_params(axis="x", labelbottom=False)
    step = max(1, math.ceil(len(rows) / 40))
    ticks = list(range(0, len(rows), step))
    mr.set_xticks(ticks)
    mr.set_xticklabels([rows[i].lot_id for i in ticks], rotation=60, ha="right", fontsize=8)
    for label, i in zip(mr.get_xticklabels(), ticks, strict=True):
        if not rows[i].released:
            label.set_color(style_of(rows[i].category).colour)
            label.set_fontweight("bold")
    mr.set_xlabel("lot, in decision order (held lots' labels in their colour)", fontsize=9, color=MUTED)
    if handles:
        fig.legend(handles=handles, loc="lower left", bbox_to_anchor=(0.07, 0.005), ncol=4,
                   fontsize=8.5, frameon=False, handlelength=1.8, columnspacing=1.4)
    footer = f"{len(rows)} most recent lots; " + (
        "zones and signals against the active limits" if view.limits else "no control limits yet")
    if as_of:
        footer += f"; as of {as_of}"
    fig.text(0.075, 0.905, footer, fontsize=8, color=MUTED, ha="left", va="bottom")
    return fig


def figure_png(view: ChartView, as_of: str | None = None, dpi: int = 150) -> bytes:
    """The chart as PNG bytes."""
    buffer = io.BytesIO()
    build_figure(view, as_of).savefig(buffer, format="png", dpi=dpi, metadata={"Software": "lotgate"})
    return buffer.getvalue()


def figure_pdf(view: ChartView, as_of: str | None = None) -> bytes:
    """The chart as a one-page vector PDF (no creation date, so equal input gives equal bytes)."""
    buffer = io.BytesIO()
    build_figure(view, as_of).savefig(buffer, format="pdf",
                                      metadata={"Creator": "lotgate", "Producer": "lotgate", "CreationDate": None})
    return buffer.getvalue()
