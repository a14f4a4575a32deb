"""Individuals and moving-range (I-MR) control charts across lots and the Nelson run rules.

Capability is in ``pipeline.science.process_capability``.

Pure functions over numpy arrays; results are frozen dataclasses with ``to_dict()``.

Conventions used by every rule (in the batch scan and in the incremental state alike):

* "beyond kσ above" means ``x > centre + k·σ``, "beyond kσ below" means ``x < centre − k·σ``
  (strict); a point exactly on a 1σ, 2σ or 3σ line is not beyond it.
* "within 1σ" means not beyond 1σ on either side.
* "above/below the centre line" is strict: a point exactly on the centre line is on neither side
  and breaks a rule-2 run.
* Point numbers (``index``, ``first_index`` and the numbers in descriptions) are 0-based
  positions in the series.
* One run signals once: a point that is part of a run that has signalled a rule does not count
  again toward that rule. After a signal of rule r completing at point i, the next signal of
  rule r must lie wholly after i (points i + 1 on); other rules are not affected. A run of ten
  points on one side thus signals rule 2 once, at its ninth point; the tenth starts no new run
  until eight more points follow it. Nelson (J. Quality Technology 16(4), 1984) states each test
  as a pattern; counting afresh after a signal is the practice of acting on a signal and then
  restarting the count (Montgomery, Introduction to Statistical Quality Control, the chapter on
  Shewhart charts and sensitizing rules; from memory). The released series of a product omits
  held lots, so without this a run completed by one held lot would hold the next lots in turn
  with the same points (``ChartState.fresh_from`` carries the marks across them).
"""

from __future__ import annotations

from collections.abc import Iterable, Mapping, Sequence
from dataclasses import asdict, dataclass

import numpy as np
from numpy.lib.stride_tricks import sliding_window_view
from numpy.typing import ArrayLike, NDArray

from pipeline.errors import CalculationError, SpecificationError
from pipeline.vocabulary import NelsonRule

# Control-chart constants for moving ranges of two consecutive points (subgroup size n = 2):
# ASTM Manual on Presentation of Data and Control Chart Analysis (MNL 7), factor tables;
# Montgomery, Introduction to Statistical Quality Control, Appendix VI.
D2_N2 = 1.128
D4_N2 = 3.267

ALL_RULES: tuple[NelsonRule, ...] = tuple(NelsonRule)
_R1, _R2, _R3, _R4, _R5, _R6, _R7, _R8 = ALL_RULES  # the rules by number, as the scans test them
HISTORY_POINTS = 14  # rule 7 looks at 15 points: the new one plus the 14 before it


# --------------------------------------------------------------------------- result objects
@dataclass(frozen=True)
class ControlLimits:
    """Frozen I-MR limits of one attribute (values in the attribute's own unit)."""

    center: float
    sigma: float
    mr_bar: float
    mr_ucl: float
    ucl: float
    lcl: float
    n: int

    def to_dict(self) -> dict[str, float | int]:
        return asdict(self)


@dataclass(frozen=True)
class Signal:
    """One run-rule pattern that completes at point ``index`` (it started at ``first_index``)."""

    rule: NelsonRule
    index: int
    first_index: int
    side: str | None
    description: str  # the rule's wording, then where the pattern lies

    def to_dict(self) -> dict[str, int | str | None]:
        return asdict(self)


# --------------------------------------------------------------------------- validation
def _as_series(values: ArrayLike, what: str) -> NDArray[np.float64]:
    arr = np.asarray(values, dtype=np.float64)
    if arr.ndim != 1:
        raise CalculationError(
            f"{what}: expected one value per lot (a flat list), "
            f"received an array of shape {arr.shape}"
        )
    bad = np.flatnonzero(~np.isfinite(arr))
    if bad.size:
        raise CalculationError(
            f"{what}: {bad.size} of {arr.size} values are missing or not finite "
            f"(first at point {int(bad[0])}); every value must be a finite number"
        )
    return arr


def _check_rules(rules: Iterable[int]) -> tuple[NelsonRule, ...]:
    chosen = tuple(rules)
    for rule in chosen:
        is_int = isinstance(rule, int | np.integer) and not isinstance(rule, bool)
        if not is_int or rule not in ALL_RULES:
            raise SpecificationError(
                f"run rule {rule!r} is not known; allowed rules are the Nelson rules 1 to 8"
            )
    return tuple(sorted({NelsonRule(int(r)) for r in chosen}))


def _check_center_sigma(center: float, sigma: float) -> None:
    if not np.isfinite(center):
        raise CalculationError(f"the centre line must be a finite number, received {center!r}")
    if not (np.isfinite(sigma) and sigma > 0):
        raise CalculationError(f"sigma must be a finite number above 0, received {sigma!r}")


# --------------------------------------------------------------------------- limits
def imr_limits(values: ArrayLike, *, min_baseline: int = 20) -> ControlLimits:
    """I-MR limits from a baseline of individual lot values.

    MRᵢ = |xᵢ − xᵢ₋₁| (i = 1 … n−1),  MR̄ = mean(MR),  centre = x̄,
    σ̂ = MR̄ / d₂ (d₂ = 1.128),  UCL/LCL = x̄ ± 3σ̂,  MR UCL = D₄·MR̄ (D₄ = 3.267).
    """
    if min_baseline < 2:
        raise CalculationError(
            "the minimum baseline must be at least 2 lots (one moving range), "
            f"received {min_baseline}"
        )
    x = _as_series(values, "control-limit baseline")
    if x.size < min_baseline:
        raise CalculationError(
            f"control limits need a baseline of at least {min_baseline} lots; "
            f"received {x.size} values"
        )
    mr_bar = float(np.mean(np.abs(np.diff(x))))
    if mr_bar == 0.0:
        raise CalculationError(
            f"all {x.size} baseline values are identical, so the moving range is 0 and sigma "
            "cannot be estimated"
        )
    center = float(np.mean(x))
    sigma = mr_bar / D2_N2
    return ControlLimits(
        center=center,
        sigma=sigma,
        mr_bar=mr_bar,
        mr_ucl=D4_N2 * mr_bar,
        ucl=center + 3.0 * sigma,
        lcl=center - 3.0 * sigma,
        n=int(x.size),
    )


# --------------------------------------------------------------------------- descriptions
RULE_WORDING: dict[NelsonRule, str] = {  # the one wording of each rule that a person reads
    NelsonRule.ONE_BEYOND_3_SIGMA: "one point beyond 3σ",
    NelsonRule.NINE_ON_ONE_SIDE: "nine points in a row on one side of the centre",
    NelsonRule.SIX_RISING_OR_FALLING: "six points in a row steadily rising or falling",
    NelsonRule.FOURTEEN_ALTERNATING: "fourteen points in a row alternating up and down",
    NelsonRule.TWO_OF_THREE_BEYOND_2_SIGMA: "two of three points beyond 2σ on one side",
    NelsonRule.FOUR_OF_FIVE_BEYOND_1_SIGMA: "four of five points beyond 1σ on one side",
    NelsonRule.FIFTEEN_WITHIN_1_SIGMA: "fifteen points in a row within 1σ",
    NelsonRule.EIGHT_BEYOND_1_SIGMA: "eight points in a row on both sides of the centre with none within 1σ",
}


def rule_text(rule: NelsonRule) -> str:
    """'rule 1: one point beyond 3σ' — a rule as a chart's legend and notes name it."""
    return f"rule {rule.value}: {RULE_WORDING[rule]}"


def named_rule(rule: NelsonRule) -> str:
    """'Nelson rule 1 (one point beyond 3σ)' — a rule as a lot's hold reason names it."""
    return f"Nelson rule {rule.value} ({RULE_WORDING[rule]})"


# Wordings that earlier versions wrote into stored hold reasons, still recognised when read back.
EARLIER_WORDING: dict[NelsonRule, tuple[str, ...]] = {
    NelsonRule.EIGHT_BEYOND_1_SIGMA: ("eight points in a row beyond 1σ on either side",),
}


def rules_named_in(reason: str) -> tuple[NelsonRule, ...]:
    """The rules a recorded hold reason names, by their ``named_rule`` phrase (or an earlier wording).

    For decisions read back from the store whose trend findings keep each signal as the reason
    text only; findings recorded since rule numbers are stored carry them (``TrendFinding.rules``).
    """
    return tuple(rule for rule in NelsonRule
                 if named_rule(rule) in reason
                 or any(f"Nelson rule {rule.value} ({w})" in reason for w in EARLIER_WORDING.get(rule, ())))


def _describe(rule: NelsonRule, first: int, last: int, side: str | None, rising: bool = True) -> str:
    """'rule 2: nine points in a row on one side of the centre (above the centre line, points 3–11)'."""
    if rule == NelsonRule.SIX_RISING_OR_FALLING:
        where = "rising, " if rising else "falling, "
    else:
        where = "" if side is None else f"{side} the centre line, "
    span = f"point {last}" if first == last else f"points {first}–{last}"
    return f"{rule_text(rule)} ({where}{span})"


def _signal(rule: NelsonRule, first: int, last: int, side: str | None, rising: bool = True) -> Signal:
    return Signal(rule, last, first, side, _describe(rule, first, last, side, rising))


def _thresholds(center: float, sigma: float) -> tuple[float, ...]:
    """Lines at centre ± 1σ, 2σ, 3σ: (c+σ, c+2σ, c+3σ, c−σ, c−2σ, c−3σ)."""
    return tuple(center + k * sigma for k in (1, 2, 3)) + tuple(
        center - k * sigma for k in (1, 2, 3)
    )


# --------------------------------------------------------------------------- batch scan
def _windows_all(flags: NDArray[np.bool_], length: int) -> NDArray[np.intp]:
    """Start positions of every window of ``length`` consecutive True flags."""
    if flags.size < length:
        return np.empty(0, dtype=np.intp)
    return np.flatnonzero(sliding_window_view(flags, length).all(axis=1))


Marks = Mapping[int, Sequence[int]]  # rule → positions p: a run signalled just before point p (by a point not in the series)


def _marks_until(marks: Sequence[int], index: int) -> int:
    """The highest mark at or before ``index`` (0 if none): points before it may not count."""
    return max((p for p in marks if p <= index), default=0)


def _one_per_run(candidates: list[Signal], marks: Sequence[int] = ()) -> list[Signal]:
    """Of one rule's fixed-length patterns, those that reuse no point of an earlier signal of the rule."""
    kept: list[Signal] = []
    fresh = 0
    for signal in sorted(candidates, key=lambda s: s.index):
        fresh = max(fresh, _marks_until(marks, signal.index))
        if signal.first_index >= fresh:
            kept.append(signal)
            fresh = signal.index + 1
    return kept


def rule_signals(
    values: ArrayLike, center: float, sigma: float, rules: Iterable[int] = ALL_RULES, marks: Marks | None = None
) -> tuple[Signal, ...]:
    """The Nelson-rule signals (Nelson, J. Quality Technology 16(4), 1984) of a series, one per run.

    With zones measured from the centre c in units of σ:
    1 one point beyond c ± 3σ; 2 nine in a row strictly on one side of c; 3 six in a row
    steadily rising or falling (five strict steps; a tie breaks it); 4 fourteen in a row
    alternating up and down (a tie breaks it); 5 two of three in a row beyond 2σ on one side;
    6 four of five in a row beyond 1σ on one side; 7 fifteen in a row within 1σ; 8 eight in a
    row on both sides of c with none within 1σ (every point beyond 1σ, at least one above and
    one below: Nelson's "on both sides"). A signal is reported where a pattern completes; for
    rules 5 and 6 that point is itself beyond the line (a window clipped at the start of the
    series, or at the end of the rule's last signal, counts). A point of a signalled run does not
    count again for the same rule (module docstring); ``marks`` gives, per rule, the positions p
    where a run completed by a point outside the series (a held lot, between points p − 1 and p)
    signalled: signals completing at p or later use no point before p. Sorted by (index, rule).
    """
    marks = marks or {}
    chosen = _check_rules(rules)
    _check_center_sigma(center, sigma)
    x = _as_series(values, "trend series")
    center, sigma = float(center), float(sigma)
    p1, p2, p3, m1, m2, m3 = _thresholds(center, sigma)
    above, below = x > center, x < center
    a1, a2, a3, b1, b2, b3 = x > p1, x > p2, x > p3, x < m1, x < m2, x < m3
    diffs = np.diff(x)
    found: list[Signal] = []
    if _R1 in chosen:
        found += [_signal(_R1, int(i), int(i), "above" if a3[i] else "below")
                  for i in np.flatnonzero(a3 | b3)]
    if _R2 in chosen:
        found += _one_per_run([_signal(_R2, int(s), int(s) + 8, side)
                               for flags, side in ((above, "above"), (below, "below"))
                               for s in _windows_all(flags, 9)], marks.get(_R2, ()))
    if _R3 in chosen:
        found += _one_per_run([_signal(_R3, int(s), int(s) + 5, None, rising)
                               for flags, rising in ((diffs > 0, True), (diffs < 0, False))
                               for s in _windows_all(flags, 5)], marks.get(_R3, ()))
    if _R4 in chosen:
        signs = np.sign(diffs)
        alternating = signs[1:] * signs[:-1] < 0  # a zero step (tie) gives 0: breaks the run
        found += _one_per_run([_signal(_R4, int(s), int(s) + 13, None) for s in _windows_all(alternating, 12)],
                              marks.get(_R4, ()))
    for rule, k, m, up, down in ((_R5, 2, 3, a2, b2), (_R6, 4, 5, a1, b1)):
        if rule in chosen:
            found += _k_of_m(rule, up, down, k, m, marks.get(rule, ()))
    if _R7 in chosen:
        found += _one_per_run([_signal(_R7, int(s), int(s) + 14, None) for s in _windows_all(~(a1 | b1), 15)],
                              marks.get(_R7, ()))
    if _R8 in chosen:
        outside = _windows_all(a1 | b1, 8)
        both = [s for s in outside if a1[s: s + 8].any() and b1[s: s + 8].any()]
        found += _one_per_run([_signal(_R8, int(s), int(s) + 7, None) for s in both], marks.get(_R8, ()))
    return tuple(sorted(found, key=lambda s: (s.index, s.rule)))


def _k_of_m(rule: NelsonRule, up: NDArray[np.bool_], down: NDArray[np.bool_], k: int, m: int,
            marks: Sequence[int] = ()) -> list[Signal]:
    """One rule's k-of-m signals on either side, one per run of points.

    A point j beyond the line on one side signals when at least k of the points
    max(j − m + 1, fresh) … j are beyond on that side; ``fresh`` then moves past j, so the rule's
    next signal uses none of these points (on either side).
    """
    out: list[Signal] = []
    fresh = 0
    for j in np.flatnonzero(up | down).tolist():
        flags, side = (up, "above") if up[j] else (down, "below")
        fresh = max(fresh, _marks_until(marks, j))
        start = max(j - m + 1, fresh)
        window = flags[start: j + 1]
        if int(window.sum()) >= k:
            out.append(_signal(rule, start + int(np.argmax(window)), j, side))
            fresh = j + 1
    return out


# --------------------------------------------------------------------------- incremental state
def _zone(value: float, lines: Sequence[float], center: float) -> int:
    """Signed zone: 0 on the centre line, ±1 within 1σ, ±2 beyond 1σ, ±3 beyond 2σ, ±4 beyond 3σ."""
    p1, p2, p3, m1, m2, m3 = lines
    if value > center:
        return 4 if value > p3 else 3 if value > p2 else 2 if value > p1 else 1
    if value < center:
        return -4 if value < m3 else -3 if value < m2 else -2 if value < m1 else -1
    return 0


def _signals_at_end(
    vals: Sequence[float], zones: Sequence[int], index: int, chosen: tuple[NelsonRule, ...]
) -> list[Signal]:
    """Signals completing at the last point of a tail of ≤ 15 points; the last is at ``index``."""
    n, z = len(vals), zones[-1]
    side = "above" if z > 0 else "below" if z < 0 else None
    sgn = 1 if z > 0 else -1
    out: list[Signal] = []
    if _R1 in chosen and abs(z) == 4:
        out.append(_signal(_R1, index, index, side))
    if _R2 in chosen and n >= 9 and z != 0 and all(q * sgn > 0 for q in zones[-9:]):
        out.append(_signal(_R2, index - 8, index, side))
    steps = [vals[j] - vals[j - 1] for j in range(1, n)]
    if _R3 in chosen and n >= 6:
        if all(d > 0 for d in steps[-5:]):
            out.append(_signal(_R3, index - 5, index, None, True))
        elif all(d < 0 for d in steps[-5:]):
            out.append(_signal(_R3, index - 5, index, None, False))
    if _R4 in chosen and n >= 14:
        last13 = steps[-13:]
        if all((a > 0 > b) or (a < 0 < b) for a, b in zip(last13, last13[1:], strict=False)):
            out.append(_signal(_R4, index - 13, index, None))
    for rule, level, k, m in ((_R5, 3, 2, 3), (_R6, 2, 4, 5)):
        if rule in chosen and z * sgn >= level:
            window = zones[-m:]
            hits = [j for j, q in enumerate(window) if q * sgn >= level]
            if len(hits) >= k:
                out.append(_signal(rule, index - len(window) + 1 + hits[0], index, side))
    if _R7 in chosen and n >= 15 and all(abs(q) <= 1 for q in zones[-15:]):
        out.append(_signal(_R7, index - 14, index, None))
    if _R8 in chosen and n >= 8 and all(abs(q) >= 2 for q in zones[-8:]) and \
            any(q > 0 for q in zones[-8:]) and any(q < 0 for q in zones[-8:]):
        out.append(_signal(_R8, index - 7, index, None))
    return out


@dataclass(frozen=True)
class ChartState:
    """What a chart must remember to judge the next lot: limits, last 14 points, lot count, and
    for each rule the first point that may still count toward it (``fresh_from``, 0-based).

    ``push`` costs O(1) in the length of the history and gives the same signals as
    ``rule_signals`` on the whole series, restricted to the new point: a signal of rule r moves
    ``fresh_from[r]`` past the new point, so the points of that run do not count for r again.
    """

    limits: ControlLimits
    tail_values: tuple[float, ...]
    tail_zones: tuple[int, ...]
    count: int
    fresh_from: tuple[int, ...] = (0,) * len(ALL_RULES)  # by rule number − 1

    @classmethod
    def from_history(cls, values: ArrayLike, limits: ControlLimits, *, judged_from: int = 0,
                     marks: Marks | None = None) -> ChartState:
        """State after the lots in ``values`` (oldest first) have been charted.

        Runs that signalled in the history mark their points as used (``rule_signals``); only
        signals completing at point ``judged_from`` or later count (points before it, such as a
        baseline, were never judged). ``marks`` are runs completed by points not in ``values``
        (held lots): rule → positions p, as in ``rule_signals``.
        """
        _check_center_sigma(limits.center, limits.sigma)
        x = _as_series(values, "trend history")
        lines = _thresholds(limits.center, limits.sigma)
        tail = [float(v) for v in x[-HISTORY_POINTS:]] if x.size else []
        zones = tuple(_zone(v, lines, limits.center) for v in tail)
        fresh = [0] * len(ALL_RULES)
        marks = marks or {}
        for rule, positions in marks.items():
            fresh[NelsonRule(rule) - 1] = max([0, *(min(int(p), int(x.size)) for p in positions)])
        for signal in rule_signals(x, limits.center, limits.sigma, marks=marks) if x.size else ():
            if signal.index >= judged_from:
                fresh[signal.rule - 1] = max(fresh[signal.rule - 1], signal.index + 1)
        return cls(limits, tuple(tail), zones, int(x.size), tuple(fresh))

    def push(
        self, value: float, rules: Iterable[int] = ALL_RULES
    ) -> tuple[ChartState, tuple[Signal, ...]]:
        """Chart one new lot value; return the new state and the signals completing at it."""
        chosen = _check_rules(rules)
        v = float(value)
        if not np.isfinite(v):
            raise CalculationError(
                f"lot value for point {self.count} is {value!r}; it must be a finite number"
            )
        lines = _thresholds(self.limits.center, self.limits.sigma)
        vals = (*self.tail_values, v)
        zones = (*self.tail_zones, _zone(v, lines, self.limits.center))
        found: list[Signal] = []
        fresh = list(self.fresh_from)
        for rule in chosen:
            usable = self.count - fresh[rule - 1] + 1  # the new point and the history points still free
            start = max(0, len(vals) - usable)
            signals = _signals_at_end(vals[start:], zones[start:], self.count, (rule,))
            if signals:
                fresh[rule - 1] = self.count + 1
            found += signals
        state = ChartState(self.limits, vals[-HISTORY_POINTS:], zones[-HISTORY_POINTS:],
                           self.count + 1, tuple(fresh))
        return state, tuple(sorted(found, key=lambda s: s.rule))

    def to_dict(self) -> dict[str, object]:
        return {
            "limits": self.limits.to_dict(),
            "tail_values": list(self.tail_values),
            "tail_zones": list(self.tail_zones),
            "count": self.count,
            "fresh_from": list(self.fresh_from),
        }
