"""A control chart as inline SVG, drawn on the server (no script, no external asset).

Individuals only: the lots of the window in order, the centre line and the 3σ control limits in
force, the specification limits, released lots as filled dots, held lots as open squares, and a
ring around each point where a Nelson rule signals. Every text is escaped.
"""

from __future__ import annotations

from markupsafe import Markup, escape

from pipeline.release.chart_view import ChartView

WIDTH, HEIGHT = 760, 300
LEFT, RIGHT, TOP, BOTTOM = 70, 120, 20, 40


def _fmt(value: float, digits: int) -> str:
    return f"{value:.{digits}f}"


def chart_svg(view: ChartView, *, highlight: str | None = None) -> Markup:
    """The individuals chart of ``view``; the lot ``highlight`` (if in the window) drawn larger."""
    values = [r.value for r in view.rows if r.value is not None]
    lines: list[tuple[str, float, str]] = []
    if view.limits is not None:
        lim = view.limits
        lines += [("centre", lim.center, "centre"), ("UCL", lim.ucl, "control"), ("LCL", lim.lcl, "control")]
    if view.lsl is not None:
        lines.append(("LSL", view.lsl, "spec"))
    if view.usl is not None:
        lines.append(("USL", view.usl, "spec"))
    title = escape(f"{view.product_code} {view.title} ({view.unit}): last {len(view.rows)} lots")
    if not values:
        empty = (f'<svg class="chart" role="img" viewBox="0 0 {WIDTH} 60" width="{WIDTH}" height="60" '
                 f'xmlns="http://www.w3.org/2000/svg"><title>{title}</title>'
                 f'<text x="10" y="30">{escape("No value to chart yet.")}</text></svg>')
        return Markup(empty)  # noqa: S704 (its texts escaped)
    low = min(values + [v for _, v, _ in lines])
    high = max(values + [v for _, v, _ in lines])
    span = (high - low) or abs(high) or 1.0
    low, high = low - 0.08 * span, high + 0.08 * span
    plot_w, plot_h = WIDTH - LEFT - RIGHT, HEIGHT - TOP - BOTTOM
    n = max(len(view.rows), 2)

    def x(position: int) -> float:
        return LEFT + plot_w * position / (n - 1)

    def y(value: float) -> float:
        return TOP + plot_h * (high - value) / (high - low)

    d = view.digits + 1
    out = [f'<svg class="chart" role="img" viewBox="0 0 {WIDTH} {HEIGHT}" width="{WIDTH}" height="{HEIGHT}" '
           f'xmlns="http://www.w3.org/2000/svg"><title>{title}</title>',
           f'<rect class="plot" x="{LEFT}" y="{TOP}" width="{plot_w}" height="{plot_h}"/>']
    for label, value, kind in lines:
        yy = y(value)
        out.append(f'<line class="{kind}" x1="{LEFT}" x2="{LEFT + plot_w}" y1="{yy:.1f}" y2="{yy:.1f}"/>'
                   f'<text class="axis" x="{LEFT + plot_w + 6}" y="{yy + 4:.1f}">'
                   f'{escape(label)} {escape(_fmt(value, d))}</text>')
    released = [(x(r.position), y(r.value)) for r in view.rows if r.value is not None and r.released]
    if len(released) > 1:
        out.append('<polyline class="series" points="' + " ".join(f"{a:.1f},{b:.1f}" for a, b in released) + '"/>')
    for r in view.rows:
        if r.value is None:
            continue
        cx, cy = x(r.position), y(r.value)
        tip = escape(f"{r.lot_id}: {_fmt(r.value, d)} {view.unit}; {r.disposition}")
        size = 6 if r.lot_id == highlight else 4
        if r.released:
            out.append(f'<circle class="released" cx="{cx:.1f}" cy="{cy:.1f}" r="{size}"><title>{tip}</title></circle>')
        else:
            out.append(f'<rect class="held" x="{cx - size:.1f}" y="{cy - size:.1f}" width="{2 * size}" '
                       f'height="{2 * size}"><title>{tip}</title></rect>')
        if r.signal_rules:
            out.append(f'<circle class="signal" cx="{cx:.1f}" cy="{cy:.1f}" r="{size + 5}"/>')
    for value in (low + 0.08 * span / 1.16, high - 0.08 * span / 1.16):
        out.append(f'<text class="axis" x="{LEFT - 6}" y="{y(value) + 4:.1f}" text-anchor="end">'
                   f'{escape(_fmt(value, d))}</text>')
    first, last = view.rows[0].lot_id, view.rows[-1].lot_id
    out.append(f'<text class="axis" x="{LEFT}" y="{HEIGHT - 12}">{escape(first)}</text>'
               f'<text class="axis" x="{LEFT + plot_w}" y="{HEIGHT - 12}" text-anchor="end">{escape(last)}</text>')
    out.append("</svg>")
    return Markup("".join(out))  # noqa: S704 (every text escaped, every number formatted here)
