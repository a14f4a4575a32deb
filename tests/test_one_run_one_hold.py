"""One run of a rule holds the one lot that completes it, not the next lots by reuse of its points.

Hand-made series (known truth) through ``decide_night`` as the nightly job runs them. Baseline:
20 lots 210, 200, 200, 210, … → centre 205, MR̄ 100/19 = 5.263, σ̂ = 5.263/1.128 = 4.666 (I-MR,
d₂ = 1.128, ASTM MNL 7). Then five released lots rising 201 … 205 (four steps, all within 1σ: no
rule signals yet) and lots A, B, C
rising further: A completes six points steadily rising (Nelson 1984, rule 3). Held lots are not
charted, so before this work B and C completed the same run again (with A's five points) and were
held in turn. Rule: a point of a signalled run does not count again toward that rule
(pipeline.science.control_charts; Montgomery, Introduction to Statistical Quality Control, from memory).
"""

from __future__ import annotations

import datetime as dt

import numpy as np

from pipeline.controlled.catalog import Catalog
from pipeline.controlled.specs import parse_specification
from pipeline.release.decision import ChartState, decide_night
from pipeline.release.lot_evaluation import LotEvaluation
from pipeline.release.records import AttributeVerdict
from pipeline.release.verdicts import judge_numeric
from pipeline.science.control_charts import ChartState as Incremental
from pipeline.science.control_charts import ControlLimits, rule_signals
from pipeline.vocabulary import Disposition, HoldCategory, NelsonRule

SPEC = parse_specification({
    "kind": "product-specification", "product_code": "SIM-2", "product_name": "Simulated protease",
    "version": "1", "effective_from": "2026-01-01", "approved_by": "test", "molecular_weight_g_per_mol": 27000,
    "activity_method": "SIM-ACT", "protein_method": "SIM-PROT",
    "trend_defaults": {"baseline_n": 20, "rules": [1, 2, 3, 4]},
    "attributes": [{"code": "specific_activity", "title": "Specific activity", "source": "specific_activity",
                    "unit": "U/mg", "min": 150, "max": 260, "digits": 0, "trend": True}],
}, "simulated specification", "0" * 64)
ATTRIBUTE = SPEC.attribute("specific_activity")
BASELINE = [210.0, 200.0, 200.0, 210.0] * 5
RISING = [201.0, 202.0, 203.0, 204.0, 205.0]
A_B_C = [206.0, 207.0, 208.0]


def evaluation(number: int, value: float) -> LotEvaluation:
    verdict, reported, reason = judge_numeric(ATTRIBUTE, value)
    made = dt.date(2026, 1, 1) + dt.timedelta(days=number)
    return LotEvaluation(
        lot_id=f"SIM-{number:03d}", product_code="SIM-2", manufactured_on=made.isoformat(),
        assay_date=made.isoformat(), measurements={},
        verdicts=(AttributeVerdict(ATTRIBUTE.code, ATTRIBUTE.title, ATTRIBUTE.unit, value, reported, 1.0,
                                   ATTRIBUTE.limit_text, verdict, (reason,) if reason else ()),),
        incomplete=(), kinetics=None, plates=(), input_files={f"sim-{number:03d}.csv": "0" * 64})


def _held(night) -> list[str]:
    return [d.evaluation.lot_id for d in night.lots if d.decision.disposition == Disposition.HELD]


def test_a_run_holds_exactly_one_lot_in_one_night():
    values = BASELINE + RISING + A_B_C
    night = decide_night([evaluation(i, v) for i, v in enumerate(values)], Catalog({"SIM-2": SPEC}, {}), {}, "test")
    assert _held(night) == ["SIM-025"]  # A only; B (SIM-026) and C (SIM-027) are released
    held = night.lots[25]
    assert held.decision.hold_categories == (HoldCategory.OUT_OF_TREND,)
    assert held.trend[0].rules == (NelsonRule.SIX_RISING_OR_FALLING,)
    assert held.trend[0].lots_involved == tuple(f"SIM-{i:03d}" for i in range(20, 26))
    chart = night.charts[("SIM-2", "specific_activity")]
    assert chart.marks == ((NelsonRule.SIX_RISING_OR_FALLING, 25),)  # after the first 25 released lots
    assert chart.lots[-2:] == ("SIM-026", "SIM-027")


def test_a_run_holds_exactly_one_lot_across_nights():
    first = decide_night([evaluation(i, v) for i, v in enumerate(BASELINE + RISING + A_B_C[:1])],
                         Catalog({"SIM-2": SPEC}, {}), {}, "test")
    assert _held(first) == ["SIM-025"]
    second = decide_night([evaluation(26 + i, v) for i, v in enumerate(A_B_C[1:])], Catalog({"SIM-2": SPEC}, {}),
                          first.charts, "test")
    assert _held(second) == []
    # without the mark (a chart that forgot the held lot's run) B would be held again: the old defect
    forgot = {key: ChartState(c.product_code, c.attribute, c.limits, c.lots, c.values, c.total)
              for key, c in first.charts.items()}
    again = decide_night([evaluation(26 + i, v) for i, v in enumerate(A_B_C[1:])], Catalog({"SIM-2": SPEC}, {}), forgot,
                         "test")
    assert _held(again) == ["SIM-026"]  # (C is then spared by B's own mark)


def test_a_fresh_run_after_the_held_one_is_held_again():
    # After A's run, six fresh rising points (B … and five more) make a new run: held once more.
    values = BASELINE + RISING + [206.0, 206.5, 207.0, 207.5, 208.0, 208.5, 209.0]
    night = decide_night([evaluation(i, v) for i, v in enumerate(values)], Catalog({"SIM-2": SPEC}, {}), {}, "test")
    assert _held(night) == ["SIM-025", "SIM-031"]  # B = SIM-026 … SIM-031: six fresh points


def test_the_night_and_the_chart_view_agree_on_random_series():
    # Simulation (seeded): lots arrive one by one; a lot that signals is held (not charted, its
    # runs become marks) or, now and then, released by a person (charted, its run in the series).
    # The batch scan of the released series with the marks finds exactly the signals the lots
    # saw when they arrived: the two implementations agree.
    rng = np.random.default_rng(20261202)
    limits = ControlLimits(0.0, 1.0, 1.128, 3.685, 3.0, -3.0, 20)
    for _ in range(300):
        values = np.round(np.cumsum(rng.normal(0.05, 0.5, int(rng.integers(10, 70)))) * 0.5, 1)
        released: list[float] = []
        marks: dict[NelsonRule, list[int]] = {}
        seen: list[tuple[int, NelsonRule]] = []
        for value in values:
            state = Incremental.from_history(released, limits, marks=marks)
            _, signals = state.push(float(value))
            if signals and rng.random() < 0.8:
                for signal in signals:
                    marks.setdefault(signal.rule, []).append(len(released))
                continue
            seen += [(len(released), s.rule) for s in signals]
            released.append(float(value))
        batch = [(s.index, s.rule) for s in rule_signals(released, 0.0, 1.0, marks=marks)] if released else []
        assert batch == sorted(seen)


def test_the_store_remembers_a_held_lots_run_for_the_next_night(tmp_path):
    # Night 1 through decide_night, its decisions stored as the night stores them; night 2 reads
    # the charts back from the store (load_charts): B and C are not held by A's points again.
    from pipeline.night.decide import load_charts
    from pipeline.records.chart_queries import held_points
    from pipeline.records.store import Store
    from pipeline.records.stored import DecisionWrite, LimitsWrite
    from pipeline.release.records import DecisionRecord, RecordedResult

    store = Store(f"sqlite:///{tmp_path / 'lotgate.db'}")
    catalog = Catalog({"SIM-2": SPEC}, {})
    first = decide_night([evaluation(i, v) for i, v in enumerate(BASELINE + RISING + A_B_C[:1])],
                         Catalog({"SIM-2": SPEC}, {}), {}, "test")
    limits = first.charts[("SIM-2", "specific_activity")].limits
    assert limits is not None
    for number, lot in enumerate(first.lots):
        d = lot.decision
        record = DecisionRecord(d.lot_id, d.product, d.disposition, d.hold_categories, d.reasons, d.spec_version,
                                d.spec_sha256, d.fingerprint, d.label,
                                results=(RecordedResult("specific_activity", lot.evaluation.verdicts[0].value, None,
                                                        "U/mg", "pass"),),
                                trend=lot.trend)
        freeze = (LimitsWrite("SIM-2", "specific_activity", limits.center, limits.sigma, limits.mr_bar,
                              limits.baseline_lots, "lotgate (baseline reached)", "baseline reached"),) \
            if number == 20 else ()
        store.add_decisions([DecisionWrite(record, "lotgate (test)", chart_values=lot.chart_values)], freeze)
    held = held_points(store, "SIM-2", "specific_activity", after_order=None, limit=30)
    assert [(h.lot_id, h.rules) for h in held] == [("SIM-025", (NelsonRule.SIX_RISING_OR_FALLING,))]
    later = [evaluation(26 + i, v) for i, v in enumerate(A_B_C[1:])]
    charts = load_charts(store, catalog, later)
    assert charts[("SIM-2", "specific_activity")].marks == ((NelsonRule.SIX_RISING_OR_FALLING, 25),)
    assert _held(decide_night(later, Catalog({"SIM-2": SPEC}, {}), charts, "test")) == []


def test_a_result_entered_as_a_bound_is_not_charted():
    # A trended attribute with a maximum only: "< 250" meets ≤ 260, but 250 is a bound, not the
    # lot's value, so it is no point on the chart (it was charted as 250 before).
    from pipeline.controlled.specs import Attribute
    from pipeline.release.verdicts import judge_lims
    from pipeline.vocabulary import TrendStatus

    upper = Attribute(code="specific_activity", title="Specific activity", source="lims", test_code="SA",
                      unit="U/mg", digits=0, maximum=260.0, trend=True, baseline_n=20)
    spec = SPEC.__class__(**{**vars(SPEC), "attributes": (upper,)})
    verdict = judge_lims(upper, "< 250", "U/mg")
    lot = evaluation(99, 205.0)
    lot = lot.__class__(**{**vars(lot), "verdicts": (verdict,)})
    night = decide_night([lot], Catalog({"SIM-2": spec}, {}), {}, "test")
    # meets every criterion: ready for release (release mode 'approval', the default)
    assert night.lots[0].decision.disposition == Disposition.READY_FOR_RELEASE
    assert night.lots[0].trend[0].status == TrendStatus.NOT_EVALUATED
    assert night.lots[0].chart_values == {}
