"""Capability intervals and the minimum-n warning (pipeline.science.process_capability).

Check values:
* Cp interval — Montgomery, Introduction to Statistical Quality Control (6th ed., the example on
  confidence intervals for Cp; from memory): USL 62, LSL 38, n = 20, s = 1.75, Ĉp = 2.29,
  95 % interval 1.57 ≤ Cp ≤ 3.01 with χ²₀.₉₇₅,₁₉ = 8.91 and χ²₀.₀₂₅,₁₉ = 32.85 (the chi-square
  table values are standard, e.g. NIST/SEMATECH e-Handbook table of the chi-square distribution).
* Cpk interval — Montgomery, same chapter (from memory), Bissell's approximation with n = 20 and
  Ĉpk = 1.33: 0.88 ≤ Cpk ≤ 1.78. Worked again by hand: 1/(9·20) = 0.005556,
  1.33²/(2·19) = 0.046550, √0.052106 = 0.228267, ×1.96 = 0.447403 → 0.8826 to 1.7774.
* Coverage of the intervals in simulation (known truth, fixed seed): Bissell's interval is
  stated for normal data with σ from the sample SD (Ppk); for Cpk, σ = MR̄/d₂ with the effective
  degrees of freedom 0.62·(n − 1) of an average moving range (Wheeler & Chambers, from memory).
"""

from __future__ import annotations

import numpy as np
import pytest

from pipeline.errors import CalculationError
from pipeline.science.process_capability import (
    MIN_CAPABILITY_N,
    bissell_interval,
    capability,
    chi_square_interval,
)


def test_cp_interval_against_montgomerys_worked_example():
    cp = (62 - 38) / (6 * 1.75)
    assert cp == pytest.approx(2.2857, abs=1e-4)
    interval = chi_square_interval(cp, 20)
    assert interval.low == pytest.approx(1.57, abs=0.006)
    assert interval.high == pytest.approx(3.01, abs=0.006)


def test_cpk_interval_against_the_bissell_worked_example():
    interval = bissell_interval(1.33, 20)
    assert interval.low == pytest.approx(0.8826, abs=1e-4)
    assert interval.high == pytest.approx(1.7774, abs=1e-4)
    assert round(interval.low, 2) == 0.88 and round(interval.high, 2) == 1.78  # as printed in the example


def test_capability_carries_intervals_and_the_small_n_warning():
    rng = np.random.default_rng(7)
    values = rng.normal(100.0, 2.0, 24)
    cap = capability(values, lsl=90.0, usl=110.0)
    assert cap.cpk_interval is not None and cap.cpk_interval.low < cap.cpk < cap.cpk_interval.high
    assert cap.ppk_interval is not None and cap.ppk_interval.low < cap.ppk < cap.ppk_interval.high
    assert cap.cp is not None and cap.cp_interval is not None and cap.cp_interval.low < cap.cp < cap.cp_interval.high
    assert cap.warning is not None and f"fewer than {MIN_CAPABILITY_N}" in cap.warning and "24" in cap.warning
    enough = capability(rng.normal(100.0, 2.0, MIN_CAPABILITY_N), lsl=90.0, usl=110.0)
    assert enough.warning is None
    one_sided = capability(values, usl=110.0)
    assert one_sided.cp is None and one_sided.cp_interval is None and one_sided.cpk_interval is not None


@pytest.mark.parametrize(("kwargs", "match"), [
    ({"confidence": 1.0}, r"confidence must lie between 0 and 1"),
    ({"lsl": None, "usl": None}, r"at least one specification limit"),
])
def test_capability_refuses_what_it_cannot_compute(kwargs, match):
    with pytest.raises(CalculationError, match=match):
        capability([9.8, 10.2, 10.0, 10.4, 9.6], **({"lsl": 9.0, "usl": 11.0} | kwargs))


@pytest.mark.slow
@pytest.mark.parametrize("n", [20, 50])
def test_cpk_and_ppk_intervals_cover_the_true_value_about_95_percent_of_the_time(n):
    # Simulation with known truth: normal lots, μ = 100, σ = 2, USL 108 → true Cpk = Ppk = 8/6;
    # 3,000 studies of n lots each (seed fixed). Coverage printed, checked within 93–97 %.
    rng = np.random.default_rng(20261202 + n)
    truth = (108.0 - 100.0) / (3 * 2.0)
    cpk_hits = ppk_hits = 0
    studies = 3000
    for _ in range(studies):
        cap = capability(rng.normal(100.0, 2.0, n), usl=108.0)
        assert cap.cpk_interval is not None and cap.ppk_interval is not None
        cpk_hits += cap.cpk_interval.low <= truth <= cap.cpk_interval.high
        ppk_hits += cap.ppk_interval.low <= truth <= cap.ppk_interval.high
    cpk_cover, ppk_cover = cpk_hits / studies, ppk_hits / studies
    print(f"n = {n}: 95 % interval coverage, Cpk (MR-bar, nu = 0.62(n-1)) {cpk_cover:.3f}, "
          f"Ppk (s) {ppk_cover:.3f}, over {studies} studies")
    assert 0.93 <= cpk_cover <= 0.97
    assert 0.93 <= ppk_cover <= 0.97


@pytest.mark.slow
def test_cp_and_pp_intervals_cover_the_true_value_about_95_percent_of_the_time():
    # Simulation with known truth: μ = 100, σ = 2, limits 92–108 → Cp = Pp = 16/12; n = 30,
    # 3,000 studies (seed fixed). Chi-square interval (Pp: n − 1 df; Cp: 0.62·(n − 1) df).
    rng = np.random.default_rng(20261203)
    truth = 16.0 / 12.0
    cp_hits = pp_hits = 0
    for _ in range(3000):
        cap = capability(rng.normal(100.0, 2.0, 30), lsl=92.0, usl=108.0)
        assert cap.cp_interval is not None and cap.pp_interval is not None
        cp_hits += cap.cp_interval.low <= truth <= cap.cp_interval.high
        pp_hits += cap.pp_interval.low <= truth <= cap.pp_interval.high
    print(f"n = 30: 95 % interval coverage, Cp {cp_hits / 3000:.3f}, Pp {pp_hits / 3000:.3f}")
    assert 0.93 <= cp_hits / 3000 <= 0.97 and 0.93 <= pp_hits / 3000 <= 0.97
