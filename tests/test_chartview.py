"""The chart a reviewer reads: limits, zones, moving ranges, signals, capability, re-baseline maths.

Reference numbers are worked by hand from the I-MR formulas with the control-chart constants
for moving ranges of two, d₂ = 1.128 and D₄ = 3.267 (ASTM Manual on Presentation of Data and
Control Chart Analysis, MNL 7, factor tables). Zone and rule conventions: Nelson, J. Quality
Technology 16(4), 1984, with the strict "beyond" of pipeline.trend.
"""

from __future__ import annotations

import json

import pytest

from pipeline.controlled.specs import Attribute
from pipeline.errors import CalculationError
from pipeline.release.chart_view import (
    OTHER_CHART_TREND,
    ChartHistory,
    HeldPoint,
    ReleasedPoint,
    StoredLimits,
    build_chart_view,
    propose_limits,
    select_baseline,
    zone_of,
    zone_text,
)
from pipeline.vocabulary import HoldCategory, NelsonRule

ATTRIBUTE = Attribute(code="specific_activity", title="Specific activity", source="specific_activity",
                      unit="U/mg", digits=1, minimum=5.0, maximum=20.0, trend=True,
                      trend_rules=(1, 2, 3, 4), baseline_n=5)
SERIES = (10.0, 12.0, 11.0, 13.0, 12.0)
LOTS = ("A1", "A2", "A3", "A4", "A5")


def released(values=SERIES, lots=LOTS, start=1):
    return tuple(ReleasedPoint(lot, v, start + 10 * i) for i, (lot, v) in enumerate(zip(lots, values)))


def limits_from(points, version=1):
    proposal = propose_limits(points)
    lim = proposal.limits
    return StoredLimits(version, lim.center, lim.sigma, lim.mr_bar, proposal.lots,
                        "2026-11-30T08:00:00+00:00", "QA reviewer", "first baseline")


def history(points, held=(), limits="auto", versions=None):
    lim = limits_from(points) if limits == "auto" else limits
    return ChartHistory("TEST-1", ATTRIBUTE.code, lim, versions or ((lim,) if lim else ()),
                        len(points), tuple(points), tuple(held))


# --------------------------------------------------------------------------- the numbers
def test_limits_of_a_small_series_worked_by_hand():
    # Worked by hand: 10, 12, 11, 13, 12 -> mean 58/5 = 11.6; moving ranges 2, 1, 2, 1 ->
    # MR-bar 1.5; sigma-hat = 1.5 / 1.128 = 1.3297872; UCL = 11.6 + 3 * 1.3297872 = 15.589362;
    # LCL = 7.610638; MR UCL = 3.267 * 1.5 = 4.9005 (d2, D4: ASTM MNL 7).
    view = build_chart_view(history(released()), ATTRIBUTE, window=30)
    lim = view.limits
    assert lim is not None
    assert lim.center == pytest.approx(11.6, rel=1e-12)
    assert lim.mr_bar == pytest.approx(1.5, rel=1e-12)
    assert lim.sigma == pytest.approx(1.3297872, rel=1e-7)
    assert lim.ucl == pytest.approx(15.589362, rel=1e-7)
    assert lim.lcl == pytest.approx(7.610638, rel=1e-7)
    assert lim.mr_ucl == pytest.approx(4.9005, rel=1e-12)
    assert view.status == "limits version 1, frozen from 5 lots"
    assert [m.moving_range for m in view.moving_ranges] == pytest.approx([2.0, 1.0, 2.0, 1.0])
    assert [m.position for m in view.moving_ranges] == [1, 2, 3, 4]
    assert not any(m.beyond_ucl for m in view.moving_ranges)
    assert all(r.baseline and r.released for r in view.rows)
    assert json.loads(json.dumps(view.to_dict())) == view.to_dict()


def test_zones_of_the_hand_worked_series():
    # Worked by hand with centre 11.6, sigma 1.3297872: 10 is 1.203 sigma below (beyond the
    # -1 sigma line 10.270), 12 is 0.301 above, 11 is 0.451 below, 13 is 1.053 above (beyond
    # +1 sigma = 12.930).
    view = build_chart_view(history(released()), ATTRIBUTE)
    assert [r.zone for r in view.rows] == [-2, 1, -1, 2, 1]
    assert [r.zone_text for r in view.rows] == ["1–2σ below", "≤1σ above", "≤1σ below",
                                                "1–2σ above", "≤1σ above"]
    assert view.rows[0].sigma_units == pytest.approx(-1.6 / 1.3297872, rel=1e-7)


@pytest.mark.parametrize(
    ("value", "zone"),
    [(0.0, 0), (1.0, 1), (1.0001, 2), (2.0, 2), (2.5, 3), (3.0, 3), (3.0001, 4),
     (-1.0, -1), (-2.0, -2), (-3.0, -3), (-3.5, -4)],
)
def test_zone_lines_are_not_beyond_themselves(value, zone):
    # Convention of pipeline.trend: "beyond k sigma" is strict, a point on a line is inside.
    assert zone_of(value, 0.0, 1.0) == zone
    assert zone_text(zone) in ("on centre", *(f"{w} {s}" for w in ("≤1σ", "1–2σ", "2–3σ", ">3σ")
                                              for s in ("above", "below")))


def test_capability_over_the_released_lots_only_worked_by_hand():
    # A held lot H1 (6.0) decided between A3 and A4 is under investigation: it is not part of the
    # process the chart describes, so capability uses the released lots only (as the chart does).
    # Released: 10, 12, 11, 13, 12 -> mean 11.6; moving ranges 2, 1, 2, 1 -> MR-bar 1.5,
    # sigma within = 1.5/1.128 = 1.329787; squared deviations sum 5.2, s = sqrt(5.2/4) = 1.140175.
    # Nearest limit LSL 5: 6.6. Cpk = 6.6/3.989362 = 1.654400; Ppk = 6.6/3.420526 = 1.929528
    # (worked by hand). Bissell 1990 (from memory) with the moving range's effective degrees of
    # freedom nu = 0.62*4 = 2.48 (Wheeler & Chambers, from memory): SE = sqrt(1/45 + 2.737039/4.96)
    # = sqrt(0.574048) = 0.757657; 95 % interval 1.6544 -/+ 1.959964*0.757657 = 1.484981
    # -> 0.169419 to 3.139381.
    held = HeldPoint("H1", 6.0, 25, "held: out of trend", (HoldCategory.OUT_OF_TREND,), True,
                     ("Specific activity: Nelson rule 1 (one point beyond 3σ) at lot H1, value 6.0 U/mg",))
    view = build_chart_view(history(released(), [held]), ATTRIBUTE)
    assert [r.lot_id for r in view.rows] == ["A1", "A2", "A3", "H1", "A4", "A5"]
    cap = view.capability
    assert cap is not None and cap.cpk_interval is not None
    assert cap.n == 5
    assert cap.mean == pytest.approx(11.6, rel=1e-9)
    assert cap.sigma_within == pytest.approx(1.329787, rel=1e-6)
    assert cap.sigma_overall == pytest.approx(1.140175, rel=1e-6)
    assert cap.cpk == pytest.approx(1.654400, rel=1e-5)
    assert cap.ppk == pytest.approx(1.929528, rel=1e-5)
    assert (cap.cpk_interval.low, cap.cpk_interval.high) == pytest.approx((0.169419, 3.139381), rel=1e-5)
    assert view.capability_note.startswith("over the 5 released lots in the window (1 held lot left out); "
                                           "only 5 released lots (fewer than 30)")
    # the held lot stays off the charted series: the moving range at A4 is |13 - 11| = 2
    assert [m.moving_range for m in view.moving_ranges] == pytest.approx([2.0, 1.0, 2.0, 1.0])
    row = view.rows[3]
    assert (row.released, row.category, row.zone, row.signal_rules) == (False, HoldCategory.OUT_OF_TREND, -4,
                                                                         (NelsonRule.ONE_BEYOND_3_SIGMA,))
    assert row.zone_text == ">3σ below"  # 6.0 < LCL 7.610638
    assert row.signal_notes == ("rule 1: one point beyond 3σ (when held)",)
    assert [(s.lot_id, s.rule, s.source) for s in view.signals] == [("H1", NelsonRule.ONE_BEYOND_3_SIGMA, "decision")]
    assert view.signals[0].detail == held.trend_signals[0]
    assert view.signals[0].description == "rule 1: one point beyond 3σ"


def test_no_capability_without_specification_limits():
    reported_only = Attribute(code="km", title="Km", source="km", unit="mM", digits=3, trend=True,
                              baseline_n=5)
    view = build_chart_view(history(released()), reported_only)
    assert view.capability is None
    assert "no specification limits" in view.capability_note


# --------------------------------------------------------------------------- signals and window
def test_rule_signals_on_the_released_series_inside_the_window():
    # Centre 0, sigma 1 (hand-made chart): nine released lots in a row above the centre complete
    # Nelson rule 2 at the ninth (lot R8); lots R0..R8 are 0.5 each, R9 is -0.5.
    values = [0.5] * 9 + [-0.5]
    lots = [f"R{i}" for i in range(10)]
    lim = StoredLimits(1, 0.0, 1.0, 1.128, tuple(lots[:5]), "2026-11-30T08:00:00+00:00", "QA", "test")
    points = released(values, lots)
    view = build_chart_view(history(points, limits=lim), ATTRIBUTE, window=4)
    assert [r.lot_id for r in view.rows] == ["R6", "R7", "R8", "R9"]
    assert [(s.rule, s.lot_id, s.first_lot) for s in view.signals] == [(NelsonRule.NINE_ON_ONE_SIDE, "R8", "R0")]
    assert view.signals[0].description == ("rule 2: nine points in a row on one side of the centre "
                                           "(R0 … R8)")
    assert view.rows[2].signal_rules == (NelsonRule.NINE_ON_ONE_SIDE,)
    # the window's first moving range uses the released lot before it (R5 -> R6: 0)
    assert view.moving_ranges[0].lot_id == "R6"
    # a signal completing before the window is not listed
    earlier = build_chart_view(history(points[:9] + (ReleasedPoint("R9", 0.5, 200),), limits=lim),
                               ATTRIBUTE, window=1)
    # R1 … R9 would reuse R1 … R8 of the run that signalled at R8: one run signals once
    assert earlier.signals == ()


def test_moving_range_beyond_its_upper_limit_is_flagged():
    # Limits from the hand series (MR UCL 4.9005); a next released lot at 18 gives MR |18 - 12| = 6.
    base = released()
    lim = limits_from(base)
    points = base + (ReleasedPoint("A6", 18.0, 100),)
    view = build_chart_view(history(points, limits=lim), ATTRIBUTE)
    assert view.moving_ranges[-1].moving_range == pytest.approx(6.0)
    assert view.moving_ranges[-1].beyond_ucl
    assert view.rows[-1].signal_rules == (NelsonRule.ONE_BEYOND_3_SIGMA,)  # 18 > UCL 15.589


def test_before_limits_are_frozen_the_points_are_still_there():
    points = released()[:3]
    view = build_chart_view(ChartHistory("TEST-1", ATTRIBUTE.code, None, (), 3, points, ()), ATTRIBUTE)
    assert view.status == "not yet established: 3 of 5 baseline lots"
    assert not view.established
    assert [r.value for r in view.rows] == [10.0, 12.0, 11.0]
    assert all(r.zone is None and r.zone_text == "—" for r in view.rows)
    assert view.signals == ()
    assert [m.moving_range for m in view.moving_ranges] == pytest.approx([2.0, 1.0])


def test_held_lot_categories_concern_this_chart():
    lim = limits_from(released())
    other = HeldPoint("H2", 11.0, 33, "held: out of trend", (HoldCategory.OUT_OF_TREND,), False, ())
    oos = HeldPoint("H3", 4.0, 34, "held: out of specification, incomplete",
                    (HoldCategory.OUT_OF_SPECIFICATION, HoldCategory.INCOMPLETE), False, ())
    blank = HeldPoint("H4", None, 35, "held: invalid assay", (HoldCategory.INVALID_ASSAY,), False, ())
    view = build_chart_view(history(released(), [other, oos, blank], limits=lim), ATTRIBUTE)
    by_lot = {r.lot_id: r for r in view.rows}
    assert by_lot["H2"].category == OTHER_CHART_TREND
    assert by_lot["H2"].signal_rules == ()
    assert by_lot["H3"].category == HoldCategory.OUT_OF_SPECIFICATION
    assert by_lot["H4"].value is None and by_lot["H4"].zone_text == "—"
    # a held lot already on the chart (released earlier) is shown once, as charted
    dup = HeldPoint("A2", 30.0, 99, "held: review required", (HoldCategory.REVIEW_REQUIRED,), False, ())
    again = build_chart_view(history(released(), [dup], limits=lim), ATTRIBUTE)
    assert [r.lot_id for r in again.rows] == list(LOTS)


def test_previous_version_is_reported():
    v1 = StoredLimits(1, 10.0, 1.0, 1.128, LOTS, "2026-11-01T08:00:00+00:00", "lotgate", "baseline", False)
    v2 = limits_from(released(), version=2)
    view = build_chart_view(history(released(), limits=v2, versions=(v1, v2)), ATTRIBUTE)
    assert view.previous == v1
    assert view.limits == v2


def test_window_must_hold_a_lot():
    with pytest.raises(CalculationError, match="at least 1 lot, received 0"):
        build_chart_view(history(released()), ATTRIBUTE, window=0)


# --------------------------------------------------------------------------- re-baseline maths
def test_rebaseline_selection_and_limits_worked_by_hand():
    # From A2, three lots: 12, 11, 13 -> mean 12; moving ranges 1, 2 -> MR-bar 1.5;
    # sigma-hat 1.5/1.128 = 1.3297872 (worked by hand; d2 from ASTM MNL 7).
    chosen = select_baseline(released(), "A2", 3)
    assert [p.lot_id for p in chosen] == ["A2", "A3", "A4"]
    proposal = propose_limits(chosen)
    assert proposal.limits.center == pytest.approx(12.0)
    assert proposal.limits.mr_bar == pytest.approx(1.5)
    assert proposal.limits.sigma == pytest.approx(1.3297872, rel=1e-7)
    assert proposal.lots == ("A2", "A3", "A4")
    assert [p.lot_id for p in select_baseline(released(), None, 2)] == ["A4", "A5"]
    assert json.loads(json.dumps(proposal.to_dict())) == proposal.to_dict()


@pytest.mark.parametrize(
    ("from_lot", "count", "match"),
    [
        (None, 1, r"at least 2 lots .* 1 requested"),
        ("A9", 2, r"lot A9 is not among the 5 released lots"),
        ("A4", 3, r"3 baseline lots requested from A4, but only 2"),
        (None, 6, r"6 baseline lots requested, but the chart has only 5"),
    ],
)
def test_rebaseline_selection_refusals(from_lot, count, match):
    with pytest.raises(CalculationError, match=match):
        select_baseline(released(), from_lot, count)


def test_proposal_needs_two_lots():
    with pytest.raises(CalculationError, match="at least 2 lots"):
        propose_limits(released()[:1])
