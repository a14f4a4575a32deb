"""A control chart's full picture for a reviewer, and a re-baseline proposal (pure functions).

Inputs are plain objects (``pipeline.chart_queries`` reads them from the store); outputs are
frozen dataclasses with ``to_dict()``. Values are in the attribute's own unit (``unit``).

* The charted series is the released lots, in release order; held lots are shown beside it with
  the value of their latest decision but are never part of it (no limits, moving ranges or rule
  patterns are computed with them), exactly as the nightly decision treats them.
* Zones and rule signals are measured against the limits in force (the active version).
* Capability covers the released lots of the window only (``pipeline.science.process_capability``),
  measured with the same kind of σ as the chart: a held lot is under investigation and is not
  part of the process the chart describes. Each index has its confidence interval, and fewer
  than 30 lots carry a warning.
"""

from __future__ import annotations

from collections.abc import Sequence
from dataclasses import dataclass

import numpy as np

from pipeline.controlled.specs import Attribute
from pipeline.errors import CalculationError
from pipeline.plain_data import to_plain
from pipeline.science import control_charts as trend
from pipeline.science.process_capability import Capability, capability
from pipeline.vocabulary import Disposition, HoldCategory, NelsonRule


# ------------------------------------------------------------------------------ inputs
@dataclass(frozen=True)
class StoredLimits:
    """One stored version of a chart's frozen limits."""

    version: int
    center: float
    sigma: float
    mr_bar: float
    baseline_lots: tuple[str, ...]
    frozen_at_utc: str
    frozen_by: str
    reason: str
    active: bool = True

    @property
    def ucl(self) -> float:
        """UCL = centre + 3σ̂."""
        return self.center + 3.0 * self.sigma

    @property
    def lcl(self) -> float:
        """LCL = centre − 3σ̂."""
        return self.center - 3.0 * self.sigma

    @property
    def mr_ucl(self) -> float:
        """Upper limit of the moving-range chart = D₄·MR̄ (D₄ = 3.267 for n = 2)."""
        return trend.D4_N2 * self.mr_bar

    def to_dict(self) -> dict[str, object]:
        return to_plain({"version": self.version, "center": self.center, "sigma": self.sigma,
                       "mr_bar": self.mr_bar, "ucl": self.ucl, "lcl": self.lcl,
                       "mr_ucl": self.mr_ucl, "baseline_lots": list(self.baseline_lots),
                       "frozen_at_utc": self.frozen_at_utc, "frozen_by": self.frozen_by,
                       "reason": self.reason, "active": self.active})


@dataclass(frozen=True)
class ReleasedPoint:
    """A released lot's value on the chart; ``order`` sorts lots in decision order."""

    lot_id: str
    value: float
    order: int


@dataclass(frozen=True)
class HeldPoint:
    """A held lot's latest decision: its value for the attribute (None if none) and why held."""

    lot_id: str
    value: float | None
    order: int
    label: str
    hold_categories: tuple[str, ...]
    out_of_trend_here: bool = False  # this attribute's finding in the decision was out of trend
    trend_signals: tuple[str, ...] = ()  # the decision's reasons for this attribute
    rules: tuple[NelsonRule, ...] = ()  # the rule of each signal (stored, or read from the reasons' wording)


@dataclass(frozen=True)
class ChartHistory:
    """What the store holds about one chart: limit versions, recent released and held lots.

    ``released`` is the tail of the released series (oldest first), long enough to give the
    window's first points their moving range and rule context; ``released_total`` counts all.
    """

    product_code: str
    attribute: str
    limits: StoredLimits | None
    versions: tuple[StoredLimits, ...]
    released_total: int
    released: tuple[ReleasedPoint, ...]
    held: tuple[HeldPoint, ...]


# ------------------------------------------------------------------------------ outputs
@dataclass(frozen=True)
class ChartRow:
    """One lot of the window, at ``position`` (0 = oldest shown)."""

    position: int
    lot_id: str
    value: float | None
    disposition: str  # the lot's label: "released" or "held: …"
    category: str  # "released" or the first hold category (in reading order)
    released: bool
    baseline: bool
    zone: int | None  # signed: 0 on centre, ±1 within 1σ, ±2 1–2σ, ±3 2–3σ, ±4 beyond 3σ
    zone_text: str
    sigma_units: float | None  # (value − centre) / σ̂
    signal_rules: tuple[NelsonRule, ...]
    signal_notes: tuple[str, ...]

    def to_dict(self) -> dict[str, object]:
        return to_plain({"position": self.position, "lot_id": self.lot_id, "value": self.value,
                       "disposition": self.disposition, "category": self.category,
                       "released": self.released, "baseline": self.baseline, "zone": self.zone,
                       "zone_text": self.zone_text, "sigma_units": self.sigma_units,
                       "signal_rules": list(self.signal_rules),
                       "signal_notes": list(self.signal_notes)})


@dataclass(frozen=True)
class MovingRange:
    """MRᵢ = |xᵢ − xᵢ₋₁| between consecutive released lots, drawn at the later lot."""

    position: int
    lot_id: str
    moving_range: float
    beyond_ucl: bool

    def to_dict(self) -> dict[str, object]:
        return to_plain({"position": self.position, "lot_id": self.lot_id,
                       "moving_range": self.moving_range, "beyond_ucl": self.beyond_ucl})


@dataclass(frozen=True)
class ChartSignal:
    """A run-rule pattern completing at ``lot_id``; ``source`` says who found it."""

    rule: NelsonRule
    lot_id: str
    first_lot: str
    position: int
    source: str  # "released series" (evaluated now) or "decision" (found when the lot was held)
    description: str
    detail: str = ""  # for a held lot: the reason recorded with its decision

    def to_dict(self) -> dict[str, object]:
        return {"rule": self.rule, "lot_id": self.lot_id, "first_lot": self.first_lot,
                "position": self.position, "source": self.source,
                "description": self.description, "detail": self.detail}


@dataclass(frozen=True)
class ChartView:
    """Everything a reviewer reads off one I-MR chart."""

    product_code: str
    attribute: str
    title: str
    unit: str
    digits: int
    lsl: float | None
    usl: float | None
    rules: tuple[NelsonRule, ...]
    baseline_n: int
    released_total: int
    limits: StoredLimits | None
    previous: StoredLimits | None
    status: str
    window: int
    rows: tuple[ChartRow, ...]
    moving_ranges: tuple[MovingRange, ...]
    signals: tuple[ChartSignal, ...]
    capability: Capability | None
    capability_note: str

    @property
    def established(self) -> bool:
        return self.limits is not None

    def to_dict(self) -> dict[str, object]:
        return to_plain({
            "product_code": self.product_code, "attribute": self.attribute, "title": self.title,
            "unit": self.unit, "digits": self.digits, "lsl": self.lsl, "usl": self.usl,
            "rules": list(self.rules), "baseline_n": self.baseline_n,
            "released_total": self.released_total,
            "limits": None if self.limits is None else self.limits.to_dict(),
            "previous": None if self.previous is None else self.previous.to_dict(),
            "status": self.status, "window": self.window,
            "rows": [r.to_dict() for r in self.rows],
            "moving_ranges": [m.to_dict() for m in self.moving_ranges],
            "signals": [s.to_dict() for s in self.signals],
            "capability": None if self.capability is None else self.capability.to_dict(),
            "capability_note": self.capability_note})


# ------------------------------------------------------------------------------ zones
def zone_of(value: float, center: float, sigma: float) -> int:
    """Signed zone of a value, with the strict conventions of ``pipeline.trend``.

    0 on the centre line; ±1 within 1σ; ±2 beyond 1σ; ±3 beyond 2σ; ±4 beyond 3σ, where
    "beyond kσ above" means x > centre + k·σ (a point on a line is not beyond it).
    """
    if value > center:
        return 4 if value > center + 3 * sigma else 3 if value > center + 2 * sigma else (
            2 if value > center + sigma else 1)
    if value < center:
        return -4 if value < center - 3 * sigma else -3 if value < center - 2 * sigma else (
            -2 if value < center - sigma else -1)
    return 0


def zone_text(zone: int | None) -> str:
    if zone is None:
        return "—"
    if zone == 0:
        return "on centre"
    side = "above" if zone > 0 else "below"
    return {1: "≤1σ", 2: "1–2σ", 3: "2–3σ", 4: ">3σ"}[abs(zone)] + " " + side


OTHER_CHART_TREND = "out of trend on another chart"


def _category(point: HeldPoint) -> str:
    """The first hold category in reading order that concerns this chart.

    A lot held only because another attribute's chart signalled is not out of trend here.
    """
    here = [c for c in point.hold_categories if c != HoldCategory.OUT_OF_TREND or point.out_of_trend_here]
    known = HoldCategory.in_reading_order(here)
    if known:
        return known[0]
    if here:
        return here[0]
    return OTHER_CHART_TREND if HoldCategory.OUT_OF_TREND in point.hold_categories else Disposition.HELD


def _recorded_rules(point: HeldPoint) -> dict[NelsonRule, str]:
    """The rules the held lot's decision found on this chart, each with the reason that names it.

    Stored rule numbers pair with the reasons in order; records without them are read by wording.
    """
    if not point.out_of_trend_here:
        return {}
    found: dict[NelsonRule, str] = {}
    if point.rules and len(point.rules) == len(point.trend_signals):
        for rule, reason in zip(point.rules, point.trend_signals, strict=True):
            found.setdefault(rule, reason)
        return found
    for reason in point.trend_signals:
        for rule in trend.rules_named_in(reason):
            found.setdefault(rule, reason)
    return found


def held_marks(released: Sequence[ReleasedPoint], held: Sequence[HeldPoint]) -> dict[NelsonRule, list[int]]:
    """Where held lots' runs signalled, as positions in ``released`` (``control_charts.rule_signals`` marks).

    A held lot decided after the first p released points (by decision order) that signalled rule r
    gives the mark p for r: the points of its run do not count toward r again.
    """
    orders = [p.order for p in released]
    marks: dict[NelsonRule, list[int]] = {}
    for point in held:
        position = sum(1 for order in orders if order < point.order)
        for rule in _recorded_rules(point):
            if position > 0:
                marks.setdefault(rule, []).append(position)
    return marks


# ------------------------------------------------------------------------------ the view
def _merged(history: ChartHistory, window: int) -> list[ReleasedPoint | HeldPoint]:
    charted = {p.lot_id for p in history.released}
    held = [h for h in history.held if h.lot_id not in charted]
    return sorted([*history.released, *held], key=lambda p: p.order)[-window:]


def _capability(rows: Sequence[ChartRow], attribute: Attribute) -> tuple[Capability | None, str]:
    """Cpk and Ppk (with intervals) over the window's released lots (``process_capability.capability``)."""
    values = [r.value for r in rows if r.value is not None and r.released]
    held = sum(1 for r in rows if r.value is not None and not r.released)
    if attribute.minimum is None and attribute.maximum is None:
        return None, "no specification limits for this attribute: capability not computed"
    if len(values) < 2:
        return None, f"capability needs at least 2 released lots; the window has {len(values)}"
    try:
        cap = capability(values, attribute.minimum, attribute.maximum)
    except CalculationError as exc:
        return None, f"capability not computed: {exc}"
    note = f"over the {len(values)} released lots in the window"
    if held:
        note += f" ({held} held {'lot' if held == 1 else 'lots'} left out)"
    if cap.warning:
        note += f"; {cap.warning}"
    return cap, note


def build_chart_view(history: ChartHistory, attribute: Attribute, window: int = 30) -> ChartView:
    """Assemble the chart of the last ``window`` lots (released and held) with zones and signals.

    Zone of x: sign(x − c)·(1 + number of the lines c ± kσ, k = 1, 2, 3, that x is beyond);
    signals: ``trend.rule_signals`` on the released tail with the attribute's rules, plus the
    held lots' out-of-trend findings from their decisions; moving ranges MRᵢ = |xᵢ − xᵢ₋₁| over
    consecutive released lots, flagged above D₄·MR̄.
    """
    if window < 1:
        raise CalculationError(f"the window must be at least 1 lot, received {window}")
    limits = history.limits
    shown = _merged(history, window)
    positions = {p.lot_id: i for i, p in enumerate(shown)}
    baseline = set(limits.baseline_lots) if limits else set()
    released_series = list(history.released)
    rel_values = np.array([p.value for p in released_series], dtype=float)
    rel_signals: dict[str, list[trend.Signal]] = {}
    signals: list[ChartSignal] = []
    if limits is not None and rel_values.size:
        marks = held_marks(released_series, history.held)
        for s in trend.rule_signals(rel_values, limits.center, limits.sigma, attribute.trend_rules, marks):
            lot = released_series[s.index].lot_id
            if lot not in positions:
                continue
            rel_signals.setdefault(lot, []).append(s)
            first = released_series[s.first_index].lot_id
            span = lot if first == lot else f"{first} … {lot}"
            signals.append(ChartSignal(s.rule, lot, first, positions[lot], "released series",
                                       f"{trend.rule_text(s.rule)} ({span})"))
    rows: list[ChartRow] = []
    for i, point in enumerate(shown):
        value = point.value
        zone: int | None = None
        units: float | None = None
        if limits is not None and value is not None:
            zone = zone_of(value, limits.center, limits.sigma)
            units = (value - limits.center) / limits.sigma
        if isinstance(point, ReleasedPoint):
            found = rel_signals.get(point.lot_id, [])
            rows.append(ChartRow(i, point.lot_id, value, Disposition.RELEASED, Disposition.RELEASED, True,
                                 point.lot_id in baseline, zone, zone_text(zone), units,
                                 tuple(s.rule for s in found),
                                 tuple(trend.rule_text(s.rule) for s in found)))
            continue
        recorded = _recorded_rules(point)
        notes = tuple(f"{trend.rule_text(r)} (when held)" for r in recorded)
        if point.out_of_trend_here and not recorded:
            notes = ("out of trend (when held)",)
        for r, reason in recorded.items():
            signals.append(ChartSignal(r, point.lot_id, point.lot_id, i, "decision", trend.rule_text(r), reason))
        rows.append(ChartRow(i, point.lot_id, value, point.label, _category(point), False,
                             False, zone, zone_text(zone), units, tuple(recorded), notes))
    moving: list[MovingRange] = []
    mr_ucl = limits.mr_ucl if limits else None
    for prev, cur in zip(released_series, released_series[1:], strict=False):
        if cur.lot_id in positions:
            mr = abs(cur.value - prev.value)
            moving.append(MovingRange(positions[cur.lot_id], cur.lot_id, mr,
                                      mr_ucl is not None and mr > mr_ucl))
    previous = None
    if limits is not None:
        older = [v for v in history.versions if v.version < limits.version]
        previous = max(older, key=lambda v: v.version) if older else None
    if limits is None:
        status = (f"not yet established: {history.released_total} of {attribute.baseline_n} "
                  "baseline lots")
    else:
        status = f"limits version {limits.version}, frozen from {len(limits.baseline_lots)} lots"
    cap, note = _capability(rows, attribute)
    return ChartView(
        product_code=history.product_code, attribute=attribute.code, title=attribute.title,
        unit=attribute.unit, digits=attribute.digits, lsl=attribute.minimum, usl=attribute.maximum,
        rules=tuple(NelsonRule(r) for r in attribute.trend_rules), baseline_n=attribute.baseline_n,
        released_total=history.released_total, limits=limits, previous=previous, status=status,
        window=window, rows=tuple(rows), moving_ranges=tuple(moving),
        signals=tuple(sorted(signals, key=lambda s: (s.position, s.rule))),
        capability=cap, capability_note=note)


# ------------------------------------------------------------------------------ re-baseline
@dataclass(frozen=True)
class RebaselineProposal:
    """New I-MR limits computed from a chosen run of released lots."""

    lots: tuple[str, ...]
    values: tuple[float, ...]
    limits: trend.ControlLimits

    def to_dict(self) -> dict[str, object]:
        return to_plain({"lots": list(self.lots), "values": list(self.values),
                       "limits": self.limits.to_dict()})


def select_baseline(points: Sequence[ReleasedPoint], from_lot: str | None, count: int) -> tuple[ReleasedPoint, ...]:
    """``count`` consecutive released lots starting at ``from_lot`` (default: the last ``count``)."""
    if count < 2:
        raise CalculationError(f"a baseline needs at least 2 lots (one moving range); {count} requested")
    lots = [p.lot_id for p in points]
    if from_lot is None:
        if len(points) < count:
            raise CalculationError(f"{count} baseline lots requested, but the chart has only "
                                   f"{len(points)} released lots")
        return tuple(points[-count:])
    if from_lot not in lots:
        raise CalculationError(f"lot {from_lot} is not among the {len(points)} released lots on the chart")
    start = lots.index(from_lot)
    chosen = tuple(points[start:start + count])
    if len(chosen) < count:
        raise CalculationError(f"{count} baseline lots requested from {from_lot}, but only "
                               f"{len(chosen)} released lots from it on (it included) are on the chart")
    return chosen


def propose_limits(points: Sequence[ReleasedPoint]) -> RebaselineProposal:
    """I-MR limits of the chosen lots: centre = x̄, σ̂ = MR̄/d₂, UCL/LCL = x̄ ± 3σ̂, MR UCL = D₄·MR̄."""
    if len(points) < 2:
        raise CalculationError(f"a baseline needs at least 2 lots (one moving range); received {len(points)}")
    values = tuple(float(p.value) for p in points)
    limits = trend.imr_limits(values, min_baseline=2)
    return RebaselineProposal(tuple(p.lot_id for p in points), values, limits)
