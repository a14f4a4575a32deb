"""I-MR limits, the eight Nelson run rules, the incremental chart state and capability.

Rule sequences are built by hand on a chart with centre 0 and sigma 1, so each value's zone
can be read off directly. Rule definitions: Nelson, L. S., "The Shewhart control chart — tests
for special causes", J. Quality Technology 16(4), 1984.
"""

from __future__ import annotations

import json

import numpy as np
import pytest

from pipeline.errors import CalculationError, SpecificationError
from pipeline.science.control_charts import (
    D2_N2,
    D4_N2,
    ChartState,
    ControlLimits,
    imr_limits,
    named_rule,
    rule_signals,
    rule_text,
    rules_named_in,
)
from pipeline.science.process_capability import capability
from pipeline.vocabulary import NelsonRule


def hits(values: list[float], rule: int, center: float = 0.0, sigma: float = 1.0):
    """(index, first_index, side) of every signal of one rule, with all eight rules switched on."""
    return [
        (s.index, s.first_index, s.side)
        for s in rule_signals(values, center, sigma)
        if s.rule == rule
    ]


# --------------------------------------------------------------------------- constants
def test_control_chart_constants_for_moving_ranges_of_two():
    # d2 = 1.128 and D4 = 3.267 for n = 2: ASTM Manual on Presentation of Data and Control
    # Chart Analysis (MNL 7), factor table; Montgomery, Introduction to Statistical Quality
    # Control, Appendix VI.
    assert D2_N2 == 1.128
    assert D4_N2 == 3.267


# --------------------------------------------------------------------------- limits
def test_imr_limits_on_a_small_series_worked_by_hand():
    # Worked by hand: values 10, 12, 11, 13, 12 -> mean 58/5 = 11.6;
    # moving ranges 2, 1, 2, 1 -> MR-bar 6/4 = 1.5; sigma-hat = 1.5/1.128 = 1.329787...;
    # UCL = 11.6 + 3*1.329787 = 15.589362; LCL = 11.6 - 3.989362 = 7.610638;
    # MR UCL = 3.267*1.5 = 4.9005.
    lim = imr_limits([10, 12, 11, 13, 12], min_baseline=5)
    assert lim.center == pytest.approx(11.6, rel=1e-12)
    assert lim.mr_bar == pytest.approx(1.5, rel=1e-12)
    assert lim.sigma == pytest.approx(1.3297872, rel=1e-7)
    assert lim.ucl == pytest.approx(15.589362, rel=1e-7)
    assert lim.lcl == pytest.approx(7.610638, rel=1e-7)
    assert lim.mr_ucl == pytest.approx(4.9005, rel=1e-12)
    assert lim.n == 5
    assert json.loads(json.dumps(lim.to_dict())) == lim.to_dict()


def test_imr_limits_default_baseline_accepts_twenty_lots():
    # Worked by hand: 0,1,0,1,... (20 values) -> mean 0.5, every MR = 1, sigma-hat = 1/1.128.
    lim = imr_limits([0.0, 1.0] * 10)
    assert lim.center == pytest.approx(0.5)
    assert lim.sigma == pytest.approx(1 / 1.128)
    assert lim.n == 20


@pytest.mark.parametrize(
    ("values", "kwargs", "match"),
    [
        ([1.0] * 5 + [2.0] * 14, {}, r"at least 20 lots; received 19 values"),
        ([1.0, 2.0, 3.0], {"min_baseline": 4}, r"at least 4 lots; received 3 values"),
        ([1.0, float("nan")] * 10, {}, r"10 of 20 values are missing or not finite"),
        ([1.0, float("inf")] * 10, {}, r"not finite \(first at point 1\)"),
        ([[1.0, 2.0]] * 10, {}, r"flat list.*shape \(10, 2\)"),
        ([5.0] * 20, {}, r"all 20 baseline values are identical"),
        ([1.0, 2.0], {"min_baseline": 1}, r"at least 2 lots.*received 1"),
    ],
)
def test_imr_limits_rejects_what_cannot_give_limits(values, kwargs, match):
    with pytest.raises(CalculationError, match=match):
        imr_limits(values, **kwargs)


# --------------------------------------------------------------------------- the eight rules
def test_rule_1_point_beyond_three_sigma():
    seq = [0.5, -0.5, 0.2, -3.4]  # point 3 below c - 3 sigma
    assert hits(seq, 1) == [(3, 3, "below")]
    assert hits(seq[:-1], 1) == []
    assert hits([0.0, 3.0], 1) == []  # exactly on the 3-sigma line is not beyond (module convention)


def test_rule_2_nine_in_a_row_on_one_side():
    seq = [-0.5, 0.5, -0.2] + [0.3] * 9  # points 3..11 above
    assert hits(seq, 2) == [(11, 3, "above")]
    assert hits(seq[:-1], 2) == []
    desc = [s.description for s in rule_signals(seq, 0.0, 1.0) if s.rule == 2]
    assert desc == ["rule 2: nine points in a row on one side of the centre (above the centre line, points 3–11)"]


def test_rule_2_one_run_signals_once():
    # A point of a signalled run does not count again for the same rule (module convention):
    # a run of ten signals at its ninth point only; the next signal needs nine fresh points (17).
    assert [i for i, _, _ in hits([-0.4] * 10, 2)] == [8]
    assert [(i, f) for i, f, _ in hits([-0.4] * 18, 2)] == [(8, 0), (17, 9)]


def test_rule_2_point_on_centre_line_breaks_the_run():
    seq = [0.5] * 4 + [0.0] + [0.5] * 8
    assert hits(seq, 2) == []
    assert hits(seq + [0.5], 2) == [(13, 5, "above")]


def test_rule_3_six_points_steadily_increasing_or_decreasing():
    up = [0.3, -0.2, -0.1, 0.0, 0.1, 0.2, 0.3]  # points 1..6 rise by five steps
    assert hits(up, 3) == [(6, 1, None)]
    assert hits(up[:-1], 3) == []
    down = [-v for v in up]
    assert hits(down, 3) == [(6, 1, None)]
    descs = [s.description for s in rule_signals(down, 0.0, 1.0) if s.rule == 3]
    assert descs == ["rule 3: six points in a row steadily rising or falling (falling, points 1–6)"]


def test_rule_3_tie_breaks_the_run():
    tied = [0.3, -0.2, -0.1, -0.1, 0.1, 0.2, 0.3]  # equal points 2 and 3
    assert hits(tied, 3) == []


def test_rule_4_fourteen_points_alternating():
    seq = [0.0] + [0.2, -0.2] * 7  # 15 points, every step alternates: up, down, up, ...
    # the run 0..13 signals; 1..14 reuses its points, so it does not signal again
    assert hits(seq, 4) == [(13, 0, None)]
    assert hits(seq[:-2], 4) == []
    exact = [0.2, -0.2] * 7  # exactly fourteen points
    assert hits(exact, 4) == [(13, 0, None)]
    assert hits(exact[:-1], 4) == []


def test_rule_4_tie_breaks_the_alternation():
    seq = [0.2, -0.2] * 7
    seq[7] = seq[6]  # equal neighbours: no up or down step between points 6 and 7
    assert hits(seq, 4) == []


def test_rule_5_two_of_three_beyond_two_sigma_same_side():
    seq = [0.0, 0.0, 2.5, 0.5, 2.4]
    assert hits(seq, 5) == [(4, 2, "above")]
    assert hits(seq[:-1], 5) == []
    assert hits([-2.1, -2.2], 5) == [(1, 0, "below")]
    assert hits([2.5, 0.0, -2.5, 0.0], 5) == []  # beyond 2 sigma, but on opposite sides


def test_rule_6_four_of_five_beyond_one_sigma_same_side():
    seq = [0.0, 1.5, 1.2, 0.3, 1.8, 1.1]  # points 1, 2, 4, 5 above c + sigma
    assert hits(seq, 6) == [(5, 1, "above")]
    assert hits(seq[:-1], 6) == []
    assert hits([-1.5, 1.2, 1.3, -1.8, -1.1], 6) == []  # only three of the five below


def test_rule_7_fifteen_points_within_one_sigma():
    seq = [1.5] + [0.2, -0.3, 0.4] * 5  # points 1..15 within 1 sigma
    assert hits(seq, 7) == [(15, 1, None)]
    assert hits(seq[:-1], 7) == []
    assert hits([1.0] * 15, 7) == [(14, 0, None)]  # on the 1-sigma line counts as within


def test_rule_8_eight_points_on_both_sides_none_within_one_sigma():
    # Nelson 1984, test 8: "eight points in a row on both sides of the centre line with none in
    # zone C" — every point beyond 1σ, and both sides represented.
    seq = [0.2, 1.5, -1.5, 1.2, -1.3, 1.1, -2.0, 1.4, -1.6]  # points 1..8, none within 1 sigma
    assert hits(seq, 8) == [(8, 1, None)]
    assert hits(seq[:-1], 8) == []
    broken = list(seq)
    broken[4] = -0.9
    assert hits(broken, 8) == []
    one_side = [0.2] + [1.5] * 8  # eight beyond +1σ, none below: rule 2/6 territory, not rule 8
    assert hits(one_side, 8) == []
    one_below = [0.2] + [1.5] * 7 + [-1.1]  # a single point on the other side is enough
    assert hits(one_below, 8) == [(8, 1, None)]
    state = ChartState.from_history(one_side[:-1], ControlLimits(0.0, 1.0, 1.128, 3.685, 3.0, -3.0, 20))
    assert state.push(1.5, rules=(8,))[1] == ()
    assert [s.rule for s in state.push(-1.5, rules=(8,))[1]] == [8]


def test_rule_8_wording_and_earlier_records():
    assert rule_text(NelsonRule.EIGHT_BEYOND_1_SIGMA) == (
        "rule 8: eight points in a row on both sides of the centre with none within 1σ")
    # a hold reason stored with the earlier wording is still read as rule 8
    old = "Km: Nelson rule 8 (eight points in a row beyond 1σ on either side) at lot L9, value 0.41 mM"
    assert rules_named_in(old) == (NelsonRule.EIGHT_BEYOND_1_SIGMA,)


@pytest.mark.parametrize(("rule", "run", "fresh_signal_at"), [
    # (rule, values forming one run that signals at its last point and continues, first fresh signal)
    (2, [0.5] * 20, [8, 17]),                     # nine on one side: 9 fresh points each time
    (3, [0.1 * i for i in range(-5, 11)], [5, 11]),  # six rising: 0..5, then 6..11
    (6, [1.5] * 10, [3, 7]),                      # four of five beyond 1σ: 0..3, then 4..7
    (5, [2.5] * 5, [1, 3]),                       # two of three beyond 2σ: 0..1, then 2..3
    (7, [0.2, -0.2] * 16, [14, 29]),              # fifteen within 1σ
])
def test_a_run_signals_once_and_its_points_do_not_count_again(rule, run, fresh_signal_at):
    # Simulation with known truth: runs built by hand on centre 0, σ 1 (Nelson 1984 patterns;
    # one signal per run, then counting afresh: Montgomery, Introduction to Statistical Quality
    # Control, sensitizing rules, from memory).
    assert [s.index for s in rule_signals(run, 0.0, 1.0, rules=(rule,))] == fresh_signal_at
    limits = ControlLimits(0.0, 1.0, 1.128, 3.685, 3.0, -3.0, 20)
    state, seen = ChartState.from_history([], limits), []
    for value in run:
        state, new = state.push(value, rules=(rule,))
        seen += [s.index for s in new]
    assert seen == fresh_signal_at


def test_a_held_lots_run_marks_its_points_for_the_next_lots():
    # Five rising released points; lot A (held, not charted) completes six rising. The next
    # lots B and C also rise above the fifth point, but they would reuse A's run: no signal.
    limits = ControlLimits(0.0, 1.0, 1.128, 3.685, 3.0, -3.0, 20)
    released = [-0.4, -0.3, -0.2, -0.1, 0.0]
    state = ChartState.from_history(released, limits)
    _, signals = state.push(0.1, rules=(3,))
    assert [s.rule for s in signals] == [3]  # A completes the run
    # A is held: the chart keeps only the released points, with the run's points marked as used
    marked = ChartState.from_history(released, limits, marks={NelsonRule.SIX_RISING_OR_FALLING: [len(released)]})
    assert marked.push(0.15, rules=(3,))[1] == ()  # B: no second hold from the same points
    unmarked = ChartState.from_history(released, limits)
    assert [s.rule for s in unmarked.push(0.15, rules=(3,))[1]] == [3]  # what happened before: B held too
    # only the marked rule is affected: rule 2 still sees all points
    assert marked.fresh_from[1] == 0


def test_history_signals_before_the_judged_points_do_not_mark():
    # A baseline with nine points above the centre was never judged: its pattern does not use up
    # the points, so a tenth point above still completes a run and signals.
    limits = ControlLimits(0.0, 1.0, 1.128, 3.685, 3.0, -3.0, 20)
    history = [0.5] * 9
    assert ChartState.from_history(history, limits).push(0.5, rules=(2,))[1] == ()
    judged_later = ChartState.from_history(history, limits, judged_from=9)
    assert [s.index for s in judged_later.push(0.5, rules=(2,))[1]] == [9]


def test_rules_are_switchable_and_signals_are_json_able():
    seq = [0.0, 0.0, 2.5, 0.5, 3.4]
    every = rule_signals(seq, 0.0, 1.0)
    assert {s.rule for s in every} == {1, 5}
    only1 = rule_signals(seq, 0.0, 1.0, rules=(1,))
    assert [(s.rule, s.index) for s in only1] == [(1, 4)]
    assert rule_signals(seq, 0.0, 1.0, rules=()) == ()
    d = only1[0].to_dict()
    assert json.loads(json.dumps(d)) == d
    assert d["description"] == "rule 1: one point beyond 3σ (above the centre line, point 4)"


def test_centre_and_sigma_scale_the_zones():
    # Same rule-5 pattern on a chart with centre 100 and sigma 4: 2 sigma -> 108.
    seq = [100.0, 100.0, 110.0, 102.0, 109.6]
    assert hits(seq, 5, center=100.0, sigma=4.0) == [(4, 2, "above")]
    assert hits([100.0, 100.0, 108.0, 102.0, 108.0], 5, center=100.0, sigma=4.0) == []


@pytest.mark.parametrize(
    ("kwargs", "error", "match"),
    [
        ({"sigma": 0.0}, CalculationError, r"sigma must be a finite number above 0, received 0.0"),
        ({"sigma": -1.0}, CalculationError, r"sigma must be .* above 0"),
        ({"center": float("nan")}, CalculationError, r"centre line must be a finite number"),
        ({"rules": (1, 9)}, SpecificationError, r"run rule 9 is not known; allowed .* 1 to 8"),
        ({"rules": (0,)}, SpecificationError, r"run rule 0 is not known"),
        ({"rules": ("2",)}, SpecificationError, r"run rule '2' is not known"),
        ({"values": [0.0, float("nan")]}, CalculationError, r"1 of 2 values are missing"),
    ],
)
def test_rule_signals_rejects_bad_arguments(kwargs, error, match):
    args = {"values": [0.0, 1.0, 2.0], "center": 0.0, "sigma": 1.0} | kwargs
    with pytest.raises(error, match=match):
        rule_signals(**args)


# --------------------------------------------------------------------------- incremental state
def _random_series(rng: np.random.Generator) -> np.ndarray:
    """Series that exercise every rule: drifts, alternation, a coarse grid (ties), a shifted mean."""
    n = int(rng.integers(1, 80))
    kind = rng.integers(4)
    if kind == 0:
        x = rng.normal(rng.normal(0, 1), rng.uniform(0.3, 2.0), n)
    elif kind == 1:
        x = np.cumsum(rng.normal(0.1, 0.3, n))
    elif kind == 2:
        x = (-1.0) ** np.arange(n) * rng.uniform(0.1, 2.5, n)
    else:
        x = rng.normal(0, 0.4, n)
    return np.round(x, 1)  # coarse grid: ties and points exactly on 0, 1, 2 and 3 sigma lines


def test_push_equals_batch_on_500_seeded_series():
    rng = np.random.default_rng(20240611)
    # centre 0, sigma 1: values on a 0.1 grid land exactly on the centre and the 1/2/3-sigma lines
    limits = ControlLimits(center=0.0, sigma=1.0, mr_bar=1.128, mr_ucl=3.685, ucl=3.0, lcl=-3.0, n=20)
    seen_rules: set[int] = set()
    for _ in range(500):
        x = _random_series(rng)
        k = int(rng.integers(0, x.size + 1))  # history length before incremental pushes
        batch = rule_signals(x, limits.center, limits.sigma)
        seen_rules |= {s.rule for s in batch}
        state = ChartState.from_history(x[:k], limits)
        pushed: list = []
        for value in x[k:]:
            state, new = state.push(float(value))
            assert all(s.index == state.count - 1 for s in new)
            pushed.extend(new)
        assert tuple(pushed) == tuple(s for s in batch if s.index >= k)
        assert state.count == x.size
    assert seen_rules == {1, 2, 3, 4, 5, 6, 7, 8}  # the comparison covered every rule


def test_push_keeps_only_the_last_fourteen_points():
    limits = imr_limits([0.0, 1.128] * 10)
    state = ChartState.from_history(np.arange(100.0), limits)
    assert state.count == 100
    assert state.tail_values == tuple(float(v) for v in range(86, 100))
    state, _ = state.push(3.0)
    assert len(state.tail_values) == len(state.tail_zones) == 14
    assert state.tail_values[-1] == 3.0
    assert json.loads(json.dumps(state.to_dict())) == state.to_dict()


def test_push_respects_the_rule_switches():
    limits = imr_limits([0.0, 1.128] * 10)
    state = ChartState.from_history([], limits)
    _, signals = state.push(limits.center + 5.0, rules=(2, 3))
    assert signals == ()
    _, signals = state.push(limits.center + 5.0, rules=(1,))
    assert [(s.rule, s.index, s.side) for s in signals] == [(1, 0, "above")]


@pytest.mark.parametrize(
    ("value", "rules", "error", "match"),
    [
        (float("nan"), (1,), CalculationError, r"lot value for point 3 is nan"),
        (1.0, (12,), SpecificationError, r"run rule 12 is not known"),
    ],
)
def test_push_rejects_bad_input(value, rules, error, match):
    state = ChartState.from_history([0.0, 1.0, 2.0], imr_limits([0.0, 1.128] * 10))
    with pytest.raises(error, match=match):
        state.push(value, rules)


# --------------------------------------------------------------------------- capability
def test_capability_worked_by_hand():
    # Worked by hand: values 9.8, 10.2, 10.0, 10.4, 9.6; LSL 9.4, USL 11.
    # mean = 50/5 = 10.0; MRs 0.4, 0.2, 0.4, 0.8 -> MR-bar 0.45 -> sigma_within 0.45/1.128 = 0.398936
    # Cpk = min(11 - 10, 10 - 9.4) / (3 * 0.398936) = 0.6 / 1.196809 = 0.501333
    # deviations -0.2, 0.2, 0, 0.4, -0.4 -> sum of squares 0.40 -> s = sqrt(0.40/4) = 0.316228
    # Ppk = 0.6 / (3 * 0.316228) = 0.632456
    cap = capability([9.8, 10.2, 10.0, 10.4, 9.6], lsl=9.4, usl=11.0)
    assert cap.mean == pytest.approx(10.0, rel=1e-12)
    assert cap.sigma_within == pytest.approx(0.398936, rel=1e-6)
    assert cap.cpk == pytest.approx(0.501333, rel=1e-6)
    assert cap.sigma_overall == pytest.approx(0.316228, rel=1e-6)
    assert cap.ppk == pytest.approx(0.632456, rel=1e-6)
    assert cap.n == 5
    assert json.loads(json.dumps(cap.to_dict())) == cap.to_dict()


def test_capability_one_sided_and_given_sigma():
    data = [9.8, 10.2, 10.0, 10.4, 9.6]
    # Worked by hand: upper only -> (11 - 10) / (3 * 0.398936) = 0.835556
    assert capability(data, usl=11.0).cpk == pytest.approx(0.835556, rel=1e-6)
    # lower only -> (10 - 9.4) / (3 * 0.398936) = 0.501333
    assert capability(data, lsl=9.4).cpk == pytest.approx(0.501333, rel=1e-6)
    # given sigma 0.5 -> 0.6 / 1.5 = 0.4
    assert capability(data, lsl=9.4, usl=11.0, sigma_within=0.5).cpk == pytest.approx(0.4)
    # mean outside the limits gives a negative Cpk: (10 - 10.3) / (3 * 0.5) = -0.2
    assert capability(data, usl=10.3 - 0.6, sigma_within=0.5).cpk == pytest.approx(-0.2)


@pytest.mark.parametrize(
    ("kwargs", "error", "match"),
    [
        ({}, CalculationError, r"at least one specification limit"),
        ({"lsl": 11.0, "usl": 9.0}, SpecificationError, r"lower specification limit \(11.0\) must be below"),
        ({"lsl": float("nan")}, SpecificationError, r"lower specification limit must be finite"),
        ({"usl": 11.0, "values": [10.0]}, CalculationError, r"at least 2 values; received 1"),
        ({"usl": 11.0, "values": [10.0, 10.0]}, CalculationError, r"all 2 values are identical"),
        ({"usl": 11.0, "sigma_within": 0.0}, CalculationError, r"short-term sigma .* above 0"),
    ],
)
def test_capability_rejects_bad_input(kwargs, error, match):
    args = {"values": [9.8, 10.2, 10.0, 10.4, 9.6]} | kwargs
    with pytest.raises(error, match=match):
        capability(**args)


def test_signals_carry_their_rule_typed():
    signals = rule_signals([0.0, 0.5, -3.5], 0.0, 1.0)
    assert [(s.rule, type(s.rule)) for s in signals] == [(NelsonRule.ONE_BEYOND_3_SIGMA, NelsonRule)]


def test_one_wording_per_rule_in_legends_and_hold_reasons():
    # The words a reviewer has read since the first release (tests/golden/demo, lot LLC-2611-027).
    rule = NelsonRule.ONE_BEYOND_3_SIGMA
    assert rule_text(rule) == "rule 1: one point beyond 3σ"
    assert named_rule(rule) == "Nelson rule 1 (one point beyond 3σ)"
    # rule 8 reads as published since the verdicts work ("both sides", Nelson 1984); the earlier
    # wording is still recognised in stored reasons (test_rule_8_wording_and_earlier_records)
    assert rule_text(NelsonRule(8)) == "rule 8: eight points in a row on both sides of the centre with none within 1σ"


def test_a_recorded_reason_gives_back_the_rules_it_names():
    reason = ("Specific activity: Nelson rule 1 (one point beyond 3σ) at lot LLC-2611-027, value 177.4 U/mg; "
              "lots LLC-2611-027; chart centre 205.3, σ 6.3, 3σ limits 186.4–224.2 (limits v1)")
    assert rules_named_in(reason) == (NelsonRule.ONE_BEYOND_3_SIGMA,)
    assert rules_named_in("Specific activity: 177 U/mg is below the limit 180") == ()
    assert all(rules_named_in(f"x: {named_rule(r)} at lot y") == (r,) for r in NelsonRule)
