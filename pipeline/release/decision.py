"""Trend and disposition of a night's lots, in order (pure functions).

For every trended attribute the chart holds released lots only. Below the baseline count the
trend is "not yet established" and raises nothing; when the count is reached, limits are frozen
from the first ``baseline_n`` released lots (centre = mean, σ̂ = MR̄/d₂) and stay frozen until an
explicit, audited re-baseline. A signal completing at the current lot holds it as out of trend.
Lots are judged one after another, so a lot released earlier in the night is history for the
next one.
"""

from __future__ import annotations

import hashlib
import json
from collections.abc import Mapping
from dataclasses import dataclass, replace
from typing import Any

from pipeline.controlled.catalog import Catalog
from pipeline.controlled.specs import Attribute, Specification
from pipeline.release.lot_evaluation import LotEvaluation
from pipeline.release.lot_record import LotHistory, LotRecordView
from pipeline.release.pending import on_record, record_disposition
from pipeline.release.records import Decision, TrendFinding
from pipeline.release.verdicts import is_bound
from pipeline.science import control_charts as trend
from pipeline.vocabulary import (
    Disposition,
    HoldCategory,
    NelsonRule,
    ReleaseMode,
    TrendStatus,
    Verdict,
)

CHART_TAIL = 30  # points kept for evaluation (≥ 15, the longest rule) and for the plotted chart


@dataclass(frozen=True)
class FrozenLimits:
    version: int
    center: float
    sigma: float
    mr_bar: float
    baseline_lots: tuple[str, ...]


@dataclass(frozen=True)
class ChartState:
    """A product/attribute chart as the night sees it: limits and the recent released lots."""

    product_code: str
    attribute: str
    limits: FrozenLimits | None
    lots: tuple[str, ...] = ()
    values: tuple[float, ...] = ()
    total: int = 0  # released lots on the chart, all time
    # (rule, p): a held lot's run of that rule signalled after the chart's first p released points;
    # those points do not count toward that rule again (pipeline.science.control_charts, one run signals once)
    marks: tuple[tuple[NelsonRule, int], ...] = ()

    def snapshot(self) -> dict[str, Any]:
        return {"lots": list(self.lots[-CHART_TAIL:]), "values": list(self.values[-CHART_TAIL:]),
                "center": self.limits.center if self.limits else None,
                "sigma": self.limits.sigma if self.limits else None,
                "limits_version": self.limits.version if self.limits else None}

    def with_point(self, point_id: str, value: float) -> ChartState:
        """The chart with one more released point; once limits are frozen only the tail is kept."""
        keep = CHART_TAIL if self.limits is not None else None
        lots, values = (*self.lots, point_id), (*self.values, value)
        return replace(self, lots=lots[-keep:] if keep else lots, values=values[-keep:] if keep else values,
                       total=self.total + 1)


ChartKey = tuple[str, str]  # (product code or method id, attribute code)


@dataclass(frozen=True)
class LotDecision:
    evaluation: LotEvaluation
    decision: Decision
    trend: tuple[TrendFinding, ...]
    chart_values: dict[str, float]  # released: the values added to the charts
    charts: tuple[dict[str, Any], ...]  # chart pictures for the report of an out-of-trend lot
    extra_points: tuple[tuple[str, str, str, float], ...] = ()  # (chart, attribute, point id, value): a plate's reference
    record: LotRecordView | None = None  # the lot's record after tonight (results to store, what is awaited)


@dataclass(frozen=True)
class NightDecisions:
    """The night's decisions in order, the charts as they stand after them, and the limits frozen tonight."""

    lots: tuple[LotDecision, ...]
    charts: dict[ChartKey, ChartState]
    newly_frozen: dict[ChartKey, FrozenLimits]


def _picture(chart: ChartState, attribute: Attribute, point_id: str, value: float, label: str,
             finding: TrendFinding) -> dict[str, Any]:
    picture = chart.snapshot()
    picture["lots"].append(point_id)
    picture["values"].append(value)
    picture.update(attribute=attribute.code, title=attribute.title, unit=attribute.unit,
                   lsl=attribute.minimum, usl=attribute.maximum,
                   dispositions=[Disposition.RELEASED] * (len(picture["lots"]) - 1) + [label],
                   signal_indices=[len(picture["lots"]) - 1],
                   signal_labels=[f"rule {rule.value}" for rule in finding.rules])
    return picture


def _judge_reference_plates(evaluations: list[LotEvaluation], catalog: Catalog,
                            charts: dict[ChartKey, ChartState], frozen: list[ChartKey]) -> dict[str, tuple[
                                TrendFinding, dict[str, Any] | None, tuple[str, str, str, float] | None]]:
    """Each valid activity plate's reference recovery on its method's chart, plates in id order.

    A plate recovering inside its window but out of trend holds its lots as out of trend; its
    point joins the chart only when it is in trend (the chart of accepted plates). ``charts`` is
    the night's working copy: each chart is replaced by its new state.
    """
    plates: dict[str, dict[str, Any]] = {}
    for evaluation in evaluations:
        for plate in evaluation.plates:
            if plate.get("kind") == "activity":
                plates.setdefault(plate["plate_id"], plate)
    out: dict[str, tuple[TrendFinding, dict[str, Any] | None, tuple[str, str, str, float] | None]] = {}
    for plate_id in sorted(plates):
        plate = plates[plate_id]
        method = catalog.method_version(str(plate.get("method_id")), plate.get("method_version"))
        recovery = plate.get("reference_recovery_pct")
        if method is None or not hasattr(method, "recovery_attribute"):
            continue
        attribute = method.recovery_attribute()
        if not plate.get("valid") or not isinstance(recovery, float):
            out[plate_id] = (TrendFinding(attribute.code, TrendStatus.NOT_EVALUATED, signals=()), None, None)
            continue
        key = (method.method_id, attribute.code)
        chart, finding = _judge_point(charts.get(key) or ChartState(*key, None), attribute, plate_id, recovery,
                                      attribute.digits, frozen, what="plate")
        picture = point = None
        if finding.status == TrendStatus.OUT_OF_TREND:
            picture = _picture(chart, attribute, plate_id, recovery,
                               f"{Disposition.HELD}: {HoldCategory.OUT_OF_TREND}", finding)
        else:
            chart = chart.with_point(plate_id, recovery)
            point = (method.method_id, attribute.code, plate_id, recovery)
        charts[key] = chart
        out[plate_id] = (finding, picture, point)
    return out


def _maybe_freeze(chart: ChartState, attribute: Attribute, frozen: list[ChartKey]) -> ChartState:
    """The chart with limits frozen from its first baseline lots once it has them (centre = mean, σ̂ = MR̄/d₂)."""
    if chart.limits is not None or chart.total < attribute.baseline_n or len(chart.values) < attribute.baseline_n:
        return chart
    base_values = list(chart.values[: attribute.baseline_n])
    limits = trend.imr_limits(base_values, min_baseline=attribute.baseline_n)
    frozen.append((chart.product_code, chart.attribute))
    return replace(chart, limits=FrozenLimits(1, limits.center, limits.sigma, limits.mr_bar,
                                              tuple(chart.lots[: attribute.baseline_n])))


def _judged_from(tail_lots: tuple[str, ...], limits: FrozenLimits) -> int:
    """The first tail position after the baseline lots: only points from there on were judged."""
    baseline = set(limits.baseline_lots)
    return max((i + 1 for i, lot in enumerate(tail_lots) if lot in baseline), default=0)


def _tail_marks(chart: ChartState, tail_size: int) -> dict[NelsonRule, list[int]]:
    """The chart's marks as positions in its tail of ``tail_size`` points (marks before the tail drop out)."""
    offset = chart.total - tail_size
    out: dict[NelsonRule, list[int]] = {}
    for rule, position in chart.marks:
        if position - offset > 0:
            out.setdefault(rule, []).append(position - offset)
    return out


def _judge_point(chart: ChartState, attribute: Attribute, lot_id: str, value: float, digits: int,
                 frozen: list[ChartKey], what: str = "lot") -> tuple[ChartState, TrendFinding]:
    chart = _maybe_freeze(chart, attribute, frozen)
    if chart.limits is None:
        return chart, TrendFinding(attribute.code, TrendStatus.NOT_YET_ESTABLISHED, baseline_n=attribute.baseline_n,
                                   signals=(), lots_involved=())
    limits = chart.limits
    tail_lots = chart.lots[-CHART_TAIL:]
    tail_values = chart.values[-CHART_TAIL:]
    state = trend.ChartState.from_history(
        list(tail_values), trend.ControlLimits(center=limits.center, sigma=limits.sigma, mr_bar=limits.mr_bar,
                                         mr_ucl=trend.D4_N2 * limits.mr_bar, ucl=limits.center + 3 * limits.sigma,
                                         lcl=limits.center - 3 * limits.sigma, n=len(limits.baseline_lots)),
        judged_from=_judged_from(tail_lots, limits), marks=_tail_marks(chart, len(tail_values)))
    _, signals = state.push(value, attribute.trend_rules)
    if signals:  # the point is held (out of trend): its runs' released points do not count for those rules again
        chart = replace(chart, marks=(*chart.marks, *((signal.rule, chart.total) for signal in signals)))
    sequence = [*tail_lots, lot_id]
    reasons, involved = [], []
    fmt = f"{{:.{digits + 1}f}}"
    for signal in signals:
        lots = sequence[signal.first_index: signal.index + 1]
        involved.extend(lots)
        span = lots[0] if len(lots) == 1 else f"{lots[0]} … {lots[-1]} ({len(lots)} {what}s)"
        reasons.append(
            f"{attribute.title}: {trend.named_rule(signal.rule)} at {what} {lot_id}, "
            f"value {fmt.format(value)} {attribute.unit}; {what}s {span}; chart centre {fmt.format(limits.center)}, "
            f"σ {fmt.format(limits.sigma)}, 3σ limits {fmt.format(limits.center - 3 * limits.sigma)}–"
            f"{fmt.format(limits.center + 3 * limits.sigma)} (limits v{limits.version})")
    status = TrendStatus.OUT_OF_TREND if signals else TrendStatus.IN_TREND
    return chart, TrendFinding(attribute.code, status, limits.center, limits.sigma, limits.version,
                               len(limits.baseline_lots), tuple(reasons), tuple(dict.fromkeys(involved)),
                               tuple(signal.rule for signal in signals))


def fingerprint(evaluation: LotEvaluation, spec: Specification, method_sha: dict[str, str], code_version: str) -> str:
    """SHA-256 over what decides a lot: its input files, specification, methods and code version."""
    payload = {"lot": evaluation.lot_id, "files": sorted(evaluation.input_files.items()),
               "spec": spec.document.sha256, "methods": sorted(method_sha.items()), "code": code_version}
    return hashlib.sha256(json.dumps(payload, sort_keys=True).encode()).hexdigest()


def lot_documents(evaluation: LotEvaluation, catalog: Catalog) -> tuple[Specification, dict[str, Any]]:
    """The lot's specification version and the methods in force on its assay date (by method id)."""
    spec = catalog.specification_for_lot(evaluation.product_code, evaluation.manufactured_on, evaluation.assay_date)
    return spec, catalog.lot_methods(spec, evaluation.assay_date)


def lot_fingerprint(evaluation: LotEvaluation, catalog: Catalog, code_version: str) -> str:
    """The fingerprint the night gives a lot's decision (``fingerprint`` with the lot's own documents)."""
    spec, used_methods = lot_documents(evaluation, catalog)
    method_sha = {m.method_id: m.document.sha256 for m in used_methods.values()}
    return fingerprint(evaluation, spec, method_sha, code_version)


def decide_night(evaluations: list[LotEvaluation], catalog: Catalog, charts: Mapping[ChartKey, ChartState],
                 code_version: str, earlier: dict[str, str] | None = None,
                 records: Mapping[str, LotHistory] | None = None,
                 charted: frozenset[tuple[str, str, str]] = frozenset()) -> NightDecisions:
    """Trend and disposition for each lot, in the given order; the charts advance as lots release.

    ``charts`` is left as given: the charts' new states and the limits frozen tonight are returned.
    ``earlier`` names lots whose latest decision was a hold or a person's decision: the nightly
    job never releases such a lot on its own; it is held for an authorised person's review.
    ``records`` holds each lot's record before tonight (``pipeline.release.lot_record``): the lot's
    verdicts come from the whole record. ``charted`` names (chart, attribute, lot) already on a
    chart: such a lot (re-assayed after its release) is not charted twice.
    """
    earlier = earlier or {}
    records = records or {}
    out = []
    working = dict(charts)
    frozen: list[ChartKey] = []
    references = _judge_reference_plates(evaluations, catalog, working, frozen)
    carried: set[str] = set()
    for evaluation in evaluations:
        spec, used_methods = lot_documents(evaluation, catalog)
        evaluation, record = on_record(evaluation, spec, records.get(evaluation.lot_id, LotHistory()))
        findings: list[TrendFinding] = []
        pending: dict[str, float] = {}
        for attribute in spec.attributes:
            if not attribute.trend:
                continue
            if evaluation.record_only:
                findings.append(TrendFinding(attribute.code, TrendStatus.NOT_EVALUATED, signals=()))
                continue
            if (spec.product_code, attribute.code, evaluation.lot_id) in charted:
                findings.append(TrendFinding(attribute.code, TrendStatus.NOT_EVALUATED, signals=(
                    f"{attribute.title}: lot {evaluation.lot_id} is on the chart already (from its release); "
                    "a later result does not add a second point",)))
                continue
            verdict = evaluation.verdict(attribute.code)
            value = verdict.value
            key = (spec.product_code, attribute.code)
            chart = working.get(key) or ChartState(*key, None)
            working[key] = chart
            if verdict.verdict != Verdict.PASS and not (verdict.verdict == Verdict.REPORTED and isinstance(value, float)):
                findings.append(TrendFinding(attribute.code, TrendStatus.NOT_EVALUATED, signals=()))
                continue
            if not isinstance(value, float) or is_bound(verdict):  # '< 0.5' is no point on a chart
                findings.append(TrendFinding(attribute.code, TrendStatus.NOT_EVALUATED, signals=()))
                continue
            working[key], finding = _judge_point(chart, attribute, evaluation.lot_id, value, attribute.digits, frozen)
            findings.append(finding)
            pending[attribute.code] = value
        reference_pictures = []
        extra_points: list[tuple[str, str, str, float]] = []
        for plate in evaluation.plates:
            if plate.get("plate_id") in references:
                finding, picture, point = references[plate["plate_id"]]
                findings.append(finding)
                if picture is not None:
                    reference_pictures.append(picture)
                if plate["plate_id"] not in carried:  # the first lot of a plate carries its chart point
                    carried.add(plate["plate_id"])
                    extra_points += [point] if point is not None else []
        state, categories, reasons = record_disposition(evaluation, findings, record)
        if evaluation.lot_id in earlier:
            categories = (*categories, HoldCategory.REVIEW_REQUIRED)
            reasons = (*reasons, f"the lot's earlier decision ({earlier[evaluation.lot_id]}) stands until an "
                                 "authorised person decides (lotgate decide); the nightly job does not release it")
            state = Disposition.HELD
        if state == Disposition.RELEASED and spec.release_mode != ReleaseMode.AUTOMATIC:
            state = Disposition.READY_FOR_RELEASE  # release mode 'approval': an authorised person releases
        method_sha = {m.method_id: m.document.sha256 for m in used_methods.values()}
        decision = Decision(
            lot_id=evaluation.lot_id, product=spec.product_code, disposition=state,
            hold_categories=categories, reasons=reasons, spec_version=spec.document.version,
            spec_sha256=spec.document.sha256,
            method_versions={m.method_id: m.document.version for m in used_methods.values()},
            method_sha256=method_sha, input_files=dict(sorted(evaluation.input_files.items())),
            code_version=code_version, fingerprint=fingerprint(evaluation, spec, method_sha, code_version))
        chart_pictures = list(reference_pictures)
        for finding in findings:
            if finding.status == TrendStatus.OUT_OF_TREND and finding.attribute in pending:
                chart = working[(spec.product_code, finding.attribute)]
                chart_pictures.append(_picture(chart, spec.attribute(finding.attribute), evaluation.lot_id,
                                               pending[finding.attribute], decision.label, finding))
        released = state in (Disposition.RELEASED, Disposition.READY_FOR_RELEASE)  # met every criterion
        if released:
            for code, value in pending.items():
                key = (spec.product_code, code)
                working[key] = working[key].with_point(evaluation.lot_id, value)
        out.append(LotDecision(evaluation, decision, tuple(findings), pending if released else {},
                               tuple(chart_pictures), tuple(extra_points), record))
    newly_frozen = {key: limits for key, state in working.items()
                    if key in frozen and (limits := state.limits) is not None}
    return NightDecisions(tuple(out), working, newly_frozen)
