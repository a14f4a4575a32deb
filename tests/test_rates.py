"""Initial rates: window choice on simulated kinetic traces, properties, plate layouts.

Every trace here is simulated (seeded numpy Generator), with a read every 0.5 min for
20 min and a read noise of 0.001 AU SD (a typical plate-reader noise level, from memory).
"""

from __future__ import annotations

import math

import numpy as np
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st
from scipy.special import lambertw

from pipeline.errors import CalculationError, InputError, SpecificationError
from pipeline.science.plate_wells import all_wells, parse_well, well_index
from pipeline.science.rates import RateWindowSettings, blank_corrected, initial_rates

TIME_MIN = np.arange(0.0, 20.0 + 1e-9, 0.5)  # 41 reads
NOISE_AU = 0.001
REPLICATES = 24


def simulated_plate(trace: np.ndarray, seed: int, wells: int = REPLICATES) -> np.ndarray:
    """Replicate wells of one simulated trace with independent Gaussian read noise."""
    rng = np.random.default_rng(seed)
    return trace[None, :] + rng.normal(0.0, NOISE_AU, (wells, trace.size))


def names(count: int) -> list[str]:
    return list(all_wells(96)[:count])


def slopes(rates) -> np.ndarray:
    return np.array([r.slope_au_per_min for r in rates])


# --------------------------------------------------------------------------- window choice


def _lag_trace(v: float = 0.05, tau: float = 1.0) -> np.ndarray:
    # Simulated hysteretic start: rate v·(1 − exp(−t/τ)), so A = A0 + v·(t − τ·(1 − exp(−t/τ))).
    return 0.05 + v * (TIME_MIN - tau * (1.0 - np.exp(-TIME_MIN / tau)))


def _burst_trace(v: float = 0.05, burst_au: float = 0.2, k: float = 2.0) -> np.ndarray:
    # Simulated pre-steady-state burst: B·(1 − exp(−k·t)) on top of the steady rate v.
    return 0.05 + v * TIME_MIN + burst_au * (1.0 - np.exp(-k * TIME_MIN))


def test_lag_is_flagged_and_excluded_by_default() -> None:
    rates = initial_rates(TIME_MIN, simulated_plate(_lag_trace(), seed=11), names(REPLICATES))
    for r in rates:
        assert r.flag == "lag" and not r.ok, r.reason
        assert "a lag: the first reads rise more slowly" in r.reason and "excluded as the method says" in r.reason
        assert math.isnan(r.slope_au_per_min)


def test_lag_gives_the_steady_state_slope_where_the_method_says() -> None:
    settings = RateWindowSettings(shape_action="steady-state")
    rates = initial_rates(TIME_MIN, simulated_plate(_lag_trace(), seed=11), names(REPLICATES), settings)
    for r in rates:  # the hysteretic curve fitted from the first read, its time constant with it
        assert r.ok and r.shape == "lag" and r.slope_kind == "steady-state", r.reason
        assert r.window_start_min == 0.0 and "steady-state slope after the lag" in r.reason and r.slope_dof == r.n_points - 4
    # Simulated steady state 0.05 AU/min (τ = 1 min, 20-min read); the old search of an unbent later stretch read −2 % here.
    assert abs(slopes(rates).mean() / 0.05 - 1) <= 0.005
    assert all(abs(r.slope_au_per_min - 0.05) <= 4 * r.slope_se_au_per_min for r in rates)


def test_a_lag_too_long_for_the_read_stays_flagged_with_that_reason() -> None:
    # τ = 10 min on a 20-min read: the window lasts 2 τ, the steady state is not reached.
    settings = RateWindowSettings(shape_action="steady-state")
    rates = initial_rates(TIME_MIN, simulated_plate(_lag_trace(tau=10.0), seed=14), names(REPLICATES), settings)
    for r in rates:
        assert r.flag == "lag" and math.isnan(r.slope_au_per_min) and "too long for a steady state within" in r.reason


def test_burst_is_flagged_or_steady_state() -> None:
    plate = simulated_plate(_burst_trace(), seed=12)
    for r in initial_rates(TIME_MIN, plate, names(REPLICATES)):
        assert r.flag == "burst", r.reason
        assert "a burst: the first reads rise faster" in r.reason
    steady = initial_rates(TIME_MIN, plate, names(REPLICATES), RateWindowSettings(shape_action="steady-state"))
    for r in steady:
        # At least 1.5 time constants of the burst are outside the window.
        assert r.ok and r.window_start_min >= 1.5 / 2.0, r.reason
    np.testing.assert_allclose(slopes(steady), 0.05, rtol=0.05)


def test_reads_at_or_above_the_linear_limit_are_excluded() -> None:
    # Simulated fast well: 0.15 AU/min, capped at 2.8 AU by the reader.
    v = 0.15
    trace = np.minimum(0.05 + v * TIME_MIN, 2.8)
    plate = simulated_plate(trace, seed=13)
    rates = initial_rates(TIME_MIN, plate, names(REPLICATES))
    for r, well in zip(rates, plate, strict=True):
        assert r.ok
        first_high = TIME_MIN[np.argmax(well >= 2.0)]
        assert r.window_start_min == 0.0
        assert r.window_end_min < first_high
        assert "saturated" in r.reason
    np.testing.assert_allclose(slopes(rates), v, rtol=0.01)


def _depletion_curve(time_min: np.ndarray, s0_mm: float, km_mm: float, vmax_mm_per_min: float,
                     epsilon_l: float) -> np.ndarray:
    # Integrated Michaelis–Menten progress curve, closed form with the Lambert W function
    # (Schnell & Mendoza 1997, J. Theor. Biol. 187:207): S(t) = Km·W((S0/Km)·exp((S0 − Vmax·t)/Km)).
    s_mm = km_mm * np.real(lambertw((s0_mm / km_mm) * np.exp((s0_mm - vmax_mm_per_min * time_min) / km_mm)))
    return 0.05 + epsilon_l * (s0_mm - s_mm)


def test_window_stops_at_the_conversion_limit_and_the_rate_is_unbiased() -> None:
    # ε405 = 18 mM⁻¹cm⁻¹ for 4-nitrophenolate (common practice), l = 0.6 cm; a 40-min read in
    # which the rate falls to under half its initial value.
    time_min = np.arange(0.0, 40.0 + 1e-9, 0.5)
    km_mm = s0_mm = 0.15
    vmax_mm_per_min, epsilon_l = 0.0075, 18.0 * 0.6
    trace = _depletion_curve(time_min, s0_mm, km_mm, vmax_mm_per_min, epsilon_l)
    v0 = epsilon_l * vmax_mm_per_min * s0_mm / (km_mm + s0_mm)
    assert v0 == pytest.approx(0.0405)
    rates = initial_rates(time_min, simulated_plate(trace, seed=14), names(REPLICATES),
                          substrate_mm=[s0_mm] * REPLICATES, au_per_mm=epsilon_l)
    true_conversion = (trace - 0.05) / (epsilon_l * s0_mm)
    for r in rates:
        assert r.ok and r.window_start_min == 0.0, r.reason
        end = int(round(r.window_end_min / 0.5))
        assert 0.08 < true_conversion[end] <= 0.11, r.reason
        assert r.conversion_pct <= 10.0 and "% of the substrate converted" in r.reason
        assert abs(r.slope_au_per_min - v0) < 4.5 * r.slope_se_au_per_min
    # The quadratic's slope at the first read: unbiased to within 1 % (the mean of 24 wells).
    assert slopes(rates).mean() == pytest.approx(v0, rel=0.01)


def test_a_well_too_fast_for_the_conversion_limit_is_flagged_not_fitted() -> None:
    # 0.2 mM substrate converted at 0.05 mM/min: 10 % within the first 0.4 min (one read).
    trace = _depletion_curve(TIME_MIN, 0.2, 1.0, 0.3, 10.0)
    (r,) = initial_rates(TIME_MIN, trace[None, :], ["F06"], substrate_mm=[0.2], au_per_mm=10.0)
    assert r.flag == "conversion-limit" and math.isnan(r.slope_au_per_min)
    assert "more than 10 % of the substrate is converted" in r.reason and "dilute" in r.reason


def test_slow_noisy_sample_keeps_its_rate_and_a_blank_gets_a_line_over_the_whole_read() -> None:
    rng = np.random.default_rng(16)
    # Simulated: wells drifting 0.0002 AU/min (spontaneous hydrolysis), at the noise floor.
    flat = 0.08 + 0.0002 * TIME_MIN + rng.normal(0.0, NOISE_AU, (2, TIME_MIN.size))
    rates = initial_rates(TIME_MIN, flat, ["A01", "A02"], blank_wells=["A02"])
    # No R² rule: a slow well is fitted on its whole window, with its honest SE.
    assert rates[0].ok and abs(rates[0].slope_au_per_min - 0.0002) < 4 * rates[0].slope_se_au_per_min
    assert rates[1].ok and rates[1].n_points == TIME_MIN.size and rates[1].slope_kind == "blank-line"
    # OLS slope SE for 41 reads: σ/√Σ(t − t̄)² = 0.001/√1435 ≈ 2.6e-5 AU/min.
    assert abs(rates[1].slope_au_per_min - 0.0002) < 4 * 2.6e-5
    assert rates[1].slope_se_au_per_min == pytest.approx(2.6e-5, rel=0.3)
    assert rates[1].slope_dof == TIME_MIN.size - 2


def test_blank_fixed_window_from_the_method() -> None:
    flat = 0.08 + 0.0002 * TIME_MIN
    (r,) = initial_rates(TIME_MIN, flat[None, :], ["A01"], RateWindowSettings(blank_window_min=10.0),
                         blank_wells=["A01"])
    assert (r.n_points, r.window_end_min) == (21, 10.0)
    assert r.slope_au_per_min == pytest.approx(0.0002, rel=1e-9)


def test_exact_linear_trace_uses_every_read() -> None:
    trace = 0.1 + 0.02 * TIME_MIN
    (r,) = initial_rates(TIME_MIN, trace[None, :], ["B07"])
    assert r.ok and r.flag is None
    assert r.n_points == TIME_MIN.size
    assert (r.window_start_min, r.window_end_min) == (0.0, 20.0)
    assert r.slope_au_per_min == pytest.approx(0.02, rel=1e-12)
    assert r.intercept_au == pytest.approx(0.1, rel=1e-12)
    assert r.r2 == pytest.approx(1.0)
    assert r.slope_se_au_per_min < 1e-12


@pytest.mark.parametrize(
    ("trace", "flag", "words"),
    [
        (np.r_[0.5, 1.2, 1.9, 2.6, np.full(37, 3.0)], "saturated", "reaches the linear limit"),
        (np.r_[0.1, 0.12, np.nan, np.linspace(0.16, 0.9, 38)], "non-finite", "non-numeric read"),
    ],
    ids=["saturated-after-three-reads", "blank-cell-at-third-read"],
)
def test_unusable_wells_are_flagged(trace: np.ndarray, flag: str, words: str) -> None:
    (r,) = initial_rates(TIME_MIN, trace[None, :], ["C03"])
    assert r.flag == flag
    assert words in r.reason and "C03" in r.reason
    assert math.isnan(r.slope_au_per_min)


def test_too_few_reads_on_the_plate() -> None:
    t = np.array([0.0, 1.0, 2.0, 3.0])
    (r,) = initial_rates(t, (0.1 + 0.05 * t)[None, :], ["D04"])
    assert r.flag == "too-few-points"
    assert "only 4 reads" in r.reason


def test_decreasing_trace_nadh_oxidation() -> None:
    # Simulated NADH consumption at 340 nm: absorbance falls 0.03 AU/min from 1.2 AU.
    trace = 1.2 - 0.03 * TIME_MIN
    (r,) = initial_rates(TIME_MIN, simulated_plate(trace, seed=17, wells=1), ["E05"])
    assert r.ok
    assert r.slope_au_per_min == pytest.approx(-0.03, rel=0.02)


def test_to_dict_is_json_ready() -> None:
    trace = np.r_[0.5, 1.2, 1.9, 2.6, np.full(37, 3.0)]
    (r,) = initial_rates(TIME_MIN, trace[None, :], ["C03"])
    out = r.to_dict()
    assert out["slope_au_per_min"] is None and out["flag"] == "saturated" and out["ok"] is False
    assert out["well"] == "C03" and out["n_points"] == 0


# --------------------------------------------------------------------------- properties


_slope = st.floats(min_value=0.002, max_value=0.08)
_sign = st.sampled_from([-1.0, 1.0])


@settings(max_examples=40, deadline=None)
@given(slope=_slope, sign=_sign, intercept=st.floats(min_value=0.05, max_value=0.3))
def test_rate_of_a_perfectly_linear_trace_is_its_slope(
    slope: float, sign: float, intercept: float
) -> None:
    t = TIME_MIN[:21]
    start = intercept if sign > 0 else intercept + 1.0
    (r,) = initial_rates(t, (start + sign * slope * t)[None, :], ["A01"])
    assert r.ok
    assert r.slope_au_per_min == pytest.approx(sign * slope, rel=1e-9)
    assert r.n_points == t.size


@settings(max_examples=30, deadline=None)
@given(offset=st.floats(min_value=-0.5, max_value=0.8), seed=st.integers(0, 2**16))
def test_constant_offset_leaves_the_rate_unchanged(offset: float, seed: int) -> None:
    trace = 0.6 + 0.03 * TIME_MIN[:25] + np.random.default_rng(seed).normal(0, NOISE_AU, 25)
    t = TIME_MIN[:25]
    (base,) = initial_rates(t, trace[None, :], ["A01"])
    (moved,) = initial_rates(t, (trace + offset)[None, :], ["A01"])
    assert moved.slope_au_per_min == pytest.approx(base.slope_au_per_min, rel=1e-9)
    assert (moved.window_start_min, moved.n_points) == (base.window_start_min, base.n_points)


@settings(max_examples=30, deadline=None)
@given(k=st.floats(min_value=0.2, max_value=2.0), seed=st.integers(0, 2**16))
def test_scaling_absorbance_scales_the_rate(k: float, seed: int) -> None:
    t = TIME_MIN[:25]
    trace = 0.05 + 0.03 * t + np.random.default_rng(seed).normal(0, NOISE_AU, 25)
    (base,) = initial_rates(t, trace[None, :], ["A01"])
    (scaled,) = initial_rates(t, (k * trace)[None, :], ["A01"])
    assert scaled.slope_au_per_min == pytest.approx(k * base.slope_au_per_min, rel=1e-9)
    assert scaled.n_points == base.n_points


# --------------------------------------------------------------------------- 384-well plate


def test_384_well_plate_gradient() -> None:
    wells = all_wells(384)
    assert len(wells) == 384 and wells[0] == "A01" and wells[-1] == "P24"
    rng = np.random.default_rng(384)
    # Simulated plate: rate grows along the columns; column 24 is substrate blank.
    true = np.array([0.002 * (well_index(w, 384) % 24 + 1) for w in wells])
    true[23::24] = 0.0
    plate = 0.06 + true[:, None] * TIME_MIN + rng.normal(0.0, NOISE_AU, (384, TIME_MIN.size))
    blanks = [w for w in wells if w.endswith("24")]
    rates = initial_rates(TIME_MIN, plate, wells, blank_wells=blanks)
    assert [r.well for r in rates] == list(wells)
    got = slopes(rates)
    # Straight lines: a lag or burst is flagged falsely in at most α = 1 % of wells (here 1 of 384).
    flagged = [r for r in rates if not r.ok]
    assert len(flagged) <= 4 and all(r.flag in ("lag", "burst") for r in flagged)
    rates = [r for r in rates if r.ok or r.well.endswith("24")]
    true = np.array([t for t, w in zip(true, wells, strict=True) if w in {r.well for r in rates}])
    got = slopes(rates)
    # Each rate within 4.5 SE of its truth; without substrate given, every read is in the window.
    # SE of a quadratic's slope at the first of 41 reads over 20 min, σ·√[(XᵀX)⁻¹]₁₁ ≈ 1.0e-4
    # (for blanks, the line's σ/√Σ(t − t̄)² ≈ 2.6e-5).
    for r, expected in zip(rates, true, strict=True):
        assert r.n_points == TIME_MIN.size
        assert abs(r.slope_au_per_min - expected) < 4.5 * r.slope_se_au_per_min, r.well
        assert r.slope_se_au_per_min < 2.0e-4
    correction = blank_corrected(got[true > 0], got[true == 0])
    assert correction.n_blanks == 16
    assert abs(correction.blank_mean_au_per_min) < 3 * correction.blank_se_au_per_min


# --------------------------------------------------------------------------- helpers and inputs


def test_blank_correction_subtracts_the_mean_blank() -> None:
    result = blank_corrected([0.050, 0.040, float("nan")], [0.001, 0.003])
    assert result.blank_mean_au_per_min == pytest.approx(0.002)
    # SE of the mean of 0.001 and 0.003: sd 0.001414 / √2 = 0.001.
    assert result.blank_se_au_per_min == pytest.approx(0.001)
    assert result.corrected_slopes_au_per_min[:2] == pytest.approx((0.048, 0.038))
    assert math.isnan(result.corrected_slopes_au_per_min[2])
    assert result.to_dict()["corrected_slopes_au_per_min"][2] is None
    single = blank_corrected(0.05, [0.001])
    assert (
        math.isnan(single.blank_se_au_per_min) and single.to_dict()["blank_se_au_per_min"] is None
    )


@pytest.mark.parametrize(
    ("blanks", "match"),
    [([], "at least one blank"), ([0.001, float("nan")], "flagged blank well")],
)
def test_blank_correction_needs_blank_rates(blanks: list[float], match: str) -> None:
    with pytest.raises(CalculationError, match=match):
        blank_corrected([0.05], blanks)


@pytest.mark.parametrize(
    ("well", "plate_format", "expected"),
    [
        ("A01", 96, 0),
        ("a1", 96, 0),
        ("H12", 96, 95),
        ("B03", 96, 14),
        ("P24", 384, 383),
        ("I01", 384, 192),
    ],
)
def test_well_index_row_major(well: str, plate_format: int, expected: int) -> None:
    assert well_index(well, plate_format) == expected


@pytest.mark.parametrize(
    ("well", "plate_format", "match"),
    [
        ("I01", 96, "outside a 96-well plate; allowed A01 to H12"),
        ("A13", 96, "outside a 96-well plate"),
        ("Q01", 384, "outside a 384-well plate; allowed A01 to P24"),
        ("A00", 384, "outside"),
        ("1A", 96, "not a well name"),
        ("A01", 48, "plate format 48 is not supported"),
    ],
)
def test_wells_outside_the_plate_are_rejected(well: str, plate_format: int, match: str) -> None:
    with pytest.raises(InputError, match=match):
        parse_well(well, plate_format)


def test_all_wells_96() -> None:
    wells = all_wells(96)
    assert len(wells) == 96 and wells[11] == "A12" and wells[12] == "B01"
    assert parse_well("h12") == (7, 11)


def test_settings_from_mapping() -> None:
    s = RateWindowSettings.from_mapping({"min_points": 6, "max_conversion": 0.05, "shape_action": "steady-state"})
    assert (s.min_points, s.max_conversion, s.linear_limit_au) == (6, 0.05, 2.0)
    assert s.to_dict()["max_slope_change"] == 0.10 and s.to_dict()["shape_action"] == "steady-state"


@pytest.mark.parametrize(
    ("mapping", "match"),
    [
        ({"min_point": 5}, r"unknown rate-window setting\(s\) \['min_point'\]"),
        ({"min_points": 4}, "at least 5"),
        ({"min_points": 5.5}, "whole number"),
        ({"max_conversion": 0.8}, "max_conversion must be a fraction above 0 and at most 0.5; received 0.8"),
        ({"linear_limit_au": -1.0}, "linear_limit_au must be a positive absorbance"),
        ({"max_slope_change": float("nan")}, "max_slope_change"),
        ({"curvature_alpha": "low"}, "received 'low'"),
        ({"shape_action": "ignore"}, "shape_action must be one of"),
        ({"blank_window_min": -2.0}, "blank_window_min must be a positive time"),
    ],
)
def test_invalid_settings(mapping: dict, match: str) -> None:
    with pytest.raises(SpecificationError, match=match):
        RateWindowSettings.from_mapping(mapping)


@pytest.mark.parametrize(
    ("time", "absorbance", "wells", "match"),
    [
        (TIME_MIN, np.zeros((2, 40)), ["A01", "A02"], "one column per read time"),
        (TIME_MIN, np.zeros((2, 41)), ["A01"], "1 well names given for 2 absorbance traces"),
        (TIME_MIN, np.zeros((2, 41)), ["A01", "A01"], r"repeated: \['A01'\]"),
        (TIME_MIN[::-1], np.zeros((1, 41)), ["A01"], "strictly increasing"),
        (np.r_[TIME_MIN[:-1], np.nan], np.zeros((1, 41)), ["A01"], "finite"),
        (TIME_MIN, [["x"] * 41], ["A01"], "must be numbers"),
    ],
)
def test_invalid_plate_inputs(time, absorbance, wells, match: str) -> None:
    with pytest.raises(InputError, match=match):
        initial_rates(time, absorbance, wells)


def test_unknown_blank_well() -> None:
    with pytest.raises(InputError, match=r"blank well\(s\) \['H12'\]"):
        initial_rates(TIME_MIN, np.zeros((1, 41)), ["A01"], blank_wells=["H12"])
