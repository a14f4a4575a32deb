"""Protein standard curves, back-calculation inside the calibrated range, A280, replicates."""

from __future__ import annotations

import json
import math

import numpy as np
import pytest

from pipeline.errors import CalculationError, SpecificationError
from pipeline.science.protein_readings import back_calculate, protein_from_a280, replicate_summary
from pipeline.science.standard_curves import curve_response, fit_standard_curve

# BSA standards 0–1.5 mg/mL (common practice for dye-binding and copper assays).
BSA_MG_PER_ML = np.array([0.0, 0.125, 0.25, 0.5, 0.75, 1.0, 1.5])


# --------------------------------------------------------------------------- exact data


def test_linear_curve_recovers_exact_parameters() -> None:
    # Exact synthetic data: A = 0.05 + 0.6·x must give back exactly those parameters.
    curve = fit_standard_curve(BSA_MG_PER_ML, 0.05 + 0.6 * BSA_MG_PER_ML, "linear")
    assert curve.param_names == ("intercept_au", "slope_au_per_mg_per_ml")
    assert curve.params == pytest.approx((0.05, 0.6), rel=1e-12)
    assert curve.r2 == pytest.approx(1.0)
    assert curve.accepted and curve.reasons == ()
    assert (curve.range_low_mg_per_ml, curve.range_high_mg_per_ml) == (0.125, 1.5)
    judged = [row for row in curve.back_calculated if row.within_limit is not None]
    assert len(judged) == 6 and all(row.within_limit for row in judged)
    assert all(abs(row.bias_pct) < 1e-9 for row in judged)
    blank = curve.back_calculated[0]
    assert blank.nominal_mg_per_ml == 0.0 and blank.bias_pct is None and blank.within_limit is None


def test_quadratic_curve_recovers_exact_parameters() -> None:
    # Exact synthetic data with a bend: A = 0.05 + 0.9·x − 0.2·x² (vertex at 2.25 mg/mL,
    # outside the standards, so the curve rises over the whole range).
    absorbance = 0.05 + 0.9 * BSA_MG_PER_ML - 0.2 * BSA_MG_PER_ML**2
    curve = fit_standard_curve(BSA_MG_PER_ML, absorbance, "quadratic")
    assert curve.params == pytest.approx((0.05, 0.9, -0.2), rel=1e-10)
    assert curve.accepted
    # The root inside the range: 0.05 + 0.9·x − 0.2·x² = 0.7 gives x = 0.9037 (and 3.596 outside).
    x = (0.9 - math.sqrt(0.81 - 4 * 0.2 * 0.65)) / (2 * 0.2)
    (reading,) = back_calculate(curve, 0.7)
    assert reading.in_range and reading.in_well_mg_per_ml == pytest.approx(x, rel=1e-12)
    assert x == pytest.approx(0.9037, abs=1e-4)


@pytest.mark.parametrize("weighting", [None, "1/x", "1/x2", "1/y2"])
def test_4pl_recovers_exact_parameters(weighting: str | None) -> None:
    # Exact synthetic 4PL data y = d + (a − d)/(1 + (x/c)^b), a = 0.1, b = 1.3, c = 0.8, d = 2.0.
    a, b, c, d = 0.1, 1.3, 0.8, 2.0
    x = BSA_MG_PER_ML
    curve = fit_standard_curve(x, d + (a - d) / (1 + (x / c) ** b), "4pl", weighting=weighting)
    assert curve.param_names == ("a_au", "b_hill", "c_mg_per_ml", "d_au")
    assert curve.params == pytest.approx((a, b, c, d), rel=1e-6)
    assert curve.accepted
    # Analytic inverse at the mid-point: y = (a + d)/2 ⇔ x = c.
    (reading,) = back_calculate(curve, (a + d) / 2, dilution_factor=4.0)
    assert reading.in_well_mg_per_ml == pytest.approx(c, rel=1e-6)
    assert reading.concentration_mg_per_ml == pytest.approx(4 * c, rel=1e-6)


def test_absorbance_at_matches_the_model() -> None:
    curve = fit_standard_curve(BSA_MG_PER_ML, 0.05 + 0.6 * BSA_MG_PER_ML, "linear")
    assert curve.absorbance_at(1.0) == pytest.approx(0.65)
    np.testing.assert_allclose(curve.absorbance_at(np.array([0.0, 0.5])), [0.05, 0.35])


# --------------------------------------------------------------------------- weighting


def test_weighted_linear_fit_matches_the_closed_form() -> None:
    # Weighted least-squares line (textbook closed form):
    # slope = Σw(x − x̄w)(y − ȳw) / Σw(x − x̄w)², intercept = ȳw − slope·x̄w.
    x = BSA_MG_PER_ML[1:]
    y = np.array([0.131, 0.205, 0.352, 0.498, 0.655, 0.948])  # invented readings
    for weighting, w in (
        ("1/x", 1 / x),
        ("1/x2", 1 / x**2),
        ("1/y2", 1 / y**2),
        (None, np.ones_like(x)),
    ):
        xw, yw = np.sum(w * x) / w.sum(), np.sum(w * y) / w.sum()
        slope = np.sum(w * (x - xw) * (y - yw)) / np.sum(w * (x - xw) ** 2)
        curve = fit_standard_curve(x, y, "linear", weighting=weighting)
        assert curve.params == pytest.approx((yw - slope * xw, slope), rel=1e-10), weighting


def test_blank_takes_the_weight_of_the_lowest_standard() -> None:
    # With 1/x² weighting the blank gets the weight of the 0.125 mg/mL standard, 1/0.125².
    y = np.array([0.04, 0.131, 0.205, 0.352, 0.498, 0.655, 0.948])
    x = BSA_MG_PER_ML
    w = 1 / np.where(x > 0, x, 0.125) ** 2
    xw, yw = np.sum(w * x) / w.sum(), np.sum(w * y) / w.sum()
    slope = np.sum(w * (x - xw) * (y - yw)) / np.sum(w * (x - xw) ** 2)
    curve = fit_standard_curve(x, y, "linear", weighting="1/x2")
    assert curve.params[1] == pytest.approx(slope, rel=1e-10)


# --------------------------------------------------------------------------- acceptance


def test_a_standard_beyond_15_percent_rejects_the_curve_and_is_named() -> None:
    # Exact line A = 0.05 + 0.6·x, except the 0.75 mg/mL standard reads 0.62 instead of 0.50.
    y = 0.05 + 0.6 * BSA_MG_PER_ML
    y[4] = 0.62
    curve = fit_standard_curve(BSA_MG_PER_ML, y, "linear", min_r2=0.9)
    assert not curve.accepted
    failed = [row for row in curve.back_calculated if row.within_limit is False]
    assert [row.nominal_mg_per_ml for row in failed] == [0.75]
    assert failed[0].bias_pct > 15.0
    assert any(
        reason.startswith("standard 0.75 mg/mL back-calculates to") and "allowed ±15 %" in reason
        for reason in curve.reasons
    )


def test_lowest_standard_is_allowed_20_percent() -> None:
    # FDA BMV 2018: ±20 % at the lowest standard, ±15 % elsewhere. Exact line A = 0.05 + 0.6·x
    # except the lowest standard, which reads as 1.29 × its nominal; the unweighted line then
    # reads it back about 17 % high.
    x = BSA_MG_PER_ML[1:]
    y = 0.05 + 0.6 * x
    y[0] = 0.05 + 0.6 * 1.29 * 0.125
    curve = fit_standard_curve(x, y, "linear")
    lowest = curve.back_calculated[0]
    assert lowest.limit_pct == 20.0 and 15.0 < lowest.bias_pct <= 20.0
    assert lowest.within_limit and curve.accepted
    assert all(row.limit_pct == 15.0 for row in curve.back_calculated[1:])
    stricter = fit_standard_curve(x, y, "linear", lowest_bias_limit_pct=15.0)
    assert not stricter.accepted
    assert stricter.reasons[0].startswith("standard 0.125 mg/mL (lowest standard) back-calculates")


def test_low_r2_rejects_the_curve() -> None:
    y = np.array([0.05, 0.20, 0.15, 0.40, 0.38, 0.70, 0.90])
    curve = fit_standard_curve(BSA_MG_PER_ML, y, "linear")
    assert not curve.accepted
    assert any(
        reason.startswith("R² 0.9") and "below the method minimum 0.99" in reason
        for reason in curve.reasons
    )


def test_quadratic_turning_over_inside_the_range_is_rejected() -> None:
    # Exact parabola with its vertex at 1.0 mg/mL: A = 0.05 + 1.0·x − 0.5·x².
    y = 0.05 + 1.0 * BSA_MG_PER_ML - 0.5 * BSA_MG_PER_ML**2
    curve = fit_standard_curve(BSA_MG_PER_ML, y, "quadratic")
    assert not curve.accepted
    assert any("turns over at 1 mg/mL" in reason for reason in curve.reasons)
    with pytest.raises(CalculationError, match="standard curve is not accepted"):
        back_calculate(curve, 0.3)


def test_to_dict_is_json_ready() -> None:
    curve = fit_standard_curve(BSA_MG_PER_ML, 0.05 + 0.6 * BSA_MG_PER_ML, "linear")
    out = json.loads(json.dumps(curve.to_dict()))
    assert out["params"]["slope_au_per_mg_per_ml"] == pytest.approx(0.6)
    assert out["back_calculated"][0]["bias_pct"] is None
    assert out["accepted"] is True and out["reasons"] == []
    readings = back_calculate(curve, [0.35, 2.0])
    assert (
        json.loads(json.dumps([r.to_dict() for r in readings]))[1]["concentration_mg_per_ml"]
        is None
    )


# --------------------------------------------------------------------------- back-calculation


def test_outside_the_range_is_none_with_a_reassay_reason() -> None:
    curve = fit_standard_curve(BSA_MG_PER_ML, 0.05 + 0.6 * BSA_MG_PER_ML, "linear")
    # f(0.125) = 0.125, f(1.5) = 0.95; 0.35 ↔ 0.5 mg/mL in the well.
    above, inside, below, edge, missing = back_calculate(
        curve, np.array([1.2, 0.35, 0.09, 0.95, np.nan]), dilution_factor=20.0
    )
    assert inside.in_range and inside.in_well_mg_per_ml == pytest.approx(0.5)
    assert inside.concentration_mg_per_ml == pytest.approx(10.0)
    for reading, side in (
        (above, "above the highest standard"),
        (below, "below the lowest standard"),
    ):
        assert not reading.in_range
        assert reading.concentration_mg_per_ml is None and reading.in_well_mg_per_ml is None
        assert reading.reason == (
            f"outside the calibrated range 0.125–1.5 mg/mL ({side}): re-assay at another dilution"
        )
    assert edge.in_range and edge.in_well_mg_per_ml == pytest.approx(1.5)
    assert not missing.in_range and missing.reason == "the reading is not a number"


def test_4pl_reading_beyond_its_asymptote_is_outside_not_extrapolated() -> None:
    a, b, c, d = 0.1, 1.3, 0.8, 2.0
    x = BSA_MG_PER_ML
    curve = fit_standard_curve(x, d + (a - d) / (1 + (x / c) ** b), "4pl")
    (reading,) = back_calculate(curve, 2.5)  # above the upper asymptote d: no inverse at all
    assert (
        reading.concentration_mg_per_ml is None and "above the highest standard" in reading.reason
    )


def test_decreasing_curve_sides_are_by_concentration() -> None:
    # Signal falls with protein (exact line A = 1.0 − 0.5·x): a high absorbance means little protein.
    curve = fit_standard_curve(BSA_MG_PER_ML, 1.0 - 0.5 * BSA_MG_PER_ML, "linear")
    high_signal, low_signal, inside = back_calculate(curve, [0.99, 0.2, 0.75])
    assert "below the lowest standard" in high_signal.reason
    assert "above the highest standard" in low_signal.reason
    assert inside.in_well_mg_per_ml == pytest.approx(0.5)


def test_per_sample_dilution_factors() -> None:
    curve = fit_standard_curve(BSA_MG_PER_ML, 0.05 + 0.6 * BSA_MG_PER_ML, "linear")
    readings = back_calculate(curve, [0.35, 0.35], dilution_factor=[10.0, 50.0])
    assert [r.concentration_mg_per_ml for r in readings] == pytest.approx([5.0, 25.0])


# --------------------------------------------------------------------------- A280 and replicates


def test_protein_from_a280_bsa() -> None:
    # BSA: A280 of a 1 mg/mL solution ≈ 0.667 at 1 cm (E1% 6.67; from memory).
    assert protein_from_a280(0.667, 0.667, 1.0, 1.0) == pytest.approx(1.0)
    # Diluted 5-fold and read in a 0.5 cm cell: 0.3335 / (0.667 · 0.5) · 5 = 5 mg/mL.
    assert protein_from_a280(0.3335, 0.667, 0.5, 5.0) == pytest.approx(5.0)
    np.testing.assert_allclose(
        protein_from_a280(np.array([0.667, 1.334]), 0.667, 1.0, 2.0), [2.0, 4.0]
    )


def test_replicate_summary_nist_numacc1() -> None:
    # NIST StRD univariate data set NumAcc1: 10000001, 10000003, 10000002;
    # certified mean 10000002, standard deviation 1 (from memory).
    summary = replicate_summary([10000001, 10000003, 10000002])
    assert summary.mean == 10000002.0
    assert summary.sd == pytest.approx(1.0, rel=1e-12)
    assert summary.n == 3
    assert summary.se == pytest.approx(1 / math.sqrt(3))
    assert summary.cv_pct == pytest.approx(1e-5)


def test_replicate_summary_single_value() -> None:
    summary = replicate_summary([0.42])
    assert summary.mean == 0.42 and summary.n == 1
    assert math.isnan(summary.sd) and summary.to_dict()["cv_pct"] is None


# --------------------------------------------------------------------------- invalid inputs


@pytest.mark.parametrize(
    ("kwargs", "error", "match"),
    [
        (
            {"model": "cubic"},
            SpecificationError,
            "model 'cubic' is not known; allowed: linear, quadratic, 4pl",
        ),
        (
            {"model": "linear", "weighting": "1/x3"},
            SpecificationError,
            "weighting '1/x3' is not known",
        ),
        (
            {"model": "linear", "min_r2": 1.2},
            SpecificationError,
            "min_r2 must be between 0 and 1; received 1.2",
        ),
        (
            {"model": "linear", "bias_limit_pct": 0},
            SpecificationError,
            "bias_limit_pct must be a positive percentage",
        ),
        (
            {"model": "linear", "nominal_mg_per_ml": [0, 0.5, 1.0]},
            CalculationError,
            "3 concentrations and 7 absorbances",
        ),
        (
            {"model": "linear", "nominal_mg_per_ml": [-0.1, 0.125, 0.25, 0.5, 0.75, 1.0, 1.5]},
            CalculationError,
            "must be ≥ 0 mg/mL; received -0.1",
        ),
        (
            {"model": "linear", "absorbance": [0.1, np.nan, 0.2, 0.3, 0.4, 0.5, 0.6]},
            CalculationError,
            "must all be numbers",
        ),
        (
            {"model": "4pl", "nominal_mg_per_ml": [0, 0, 0.5, 0.5, 1.0, 1.0, 1.0]},
            CalculationError,
            "4pl standard curve needs more than 4 standards at 4 or more concentrations",
        ),
        (
            {"model": "linear", "nominal_mg_per_ml": [0, 0, 0, 0, 0, 0, 1.0]},
            CalculationError,
            "two of them above zero",
        ),
        (
            {
                "model": "linear",
                "weighting": "1/y2",
                "absorbance": [0.0, 0.0, 0.2, 0.3, 0.4, 0.5, 0.6],
            },
            CalculationError,
            "non-zero absorbances",
        ),
    ],
)
def test_invalid_curve_inputs(kwargs: dict, error: type, match: str) -> None:
    args = {"nominal_mg_per_ml": BSA_MG_PER_ML, "absorbance": 0.05 + 0.6 * BSA_MG_PER_ML, **kwargs}
    with pytest.raises(error, match=match):
        fit_standard_curve(**args)


@pytest.mark.parametrize(
    ("call", "match"),
    [
        (
            lambda c: back_calculate(c, 0.3, dilution_factor=0.0),
            "dilution factor must be a positive, finite number; received 0.0",
        ),
        (
            lambda c: protein_from_a280(0.5, -1.0, 1.0, 1.0),
            "extinction coefficient at 280 nm .*received -1.0",
        ),
        (lambda c: protein_from_a280(0.5, 0.667, 0.0, 1.0), "path length .*received 0.0"),
        (lambda c: replicate_summary([]), "at least one is needed"),
        (lambda c: replicate_summary([1.0, np.nan]), "no replicate is dropped automatically"),
    ],
)
def test_invalid_sample_inputs(call, match: str) -> None:
    curve = fit_standard_curve(BSA_MG_PER_ML, 0.05 + 0.6 * BSA_MG_PER_ML, "linear")
    with pytest.raises(CalculationError, match=match):
        call(curve)


def test_standard_curve_models():
    # A = p0 + p1·x (+ p2·x²); 4PL A = d + (a − d)/(1 + (x/c)^b): at x = c it is (a + d)/2.
    assert curve_response("linear", np.array([0.1, 2.0]), np.array([0.5]))[0] == pytest.approx(1.1)
    assert curve_response("quadratic", np.array([0.1, 2.0, -0.5]), np.array([1.0]))[0] == pytest.approx(1.6)
    assert curve_response("4pl", np.array([0.05, 1.2, 0.8, 2.0]), np.array([0.8]))[0] == pytest.approx(1.025)


def test_linear_curve_band_is_the_textbook_prediction_interval_of_the_mean():
    # Straight line, unweighted (any regression textbook, e.g. Draper & Smith, Applied Regression
    # Analysis, 1998, section 3.1): var(ŷ(x)) = s²·(1/n + (x − x̄)²/Sxx), half-width t(0.975, n − 2)·√var.
    rng = np.random.default_rng(3)
    y = 0.05 + 0.6 * BSA_MG_PER_ML + rng.normal(0, 0.004, BSA_MG_PER_ML.size)
    curve = fit_standard_curve(BSA_MG_PER_ML, y, "linear", min_r2=0.9)
    x = BSA_MG_PER_ML
    n, sxx = x.size, float(np.sum((x - x.mean()) ** 2))
    s2 = float(np.sum((y - curve.absorbance_at(x)) ** 2)) / (n - 2)
    at = np.array([0.0, 0.6, 1.5])
    expected = 2.570582 * np.sqrt(s2 * (1 / n + (at - x.mean()) ** 2 / sxx))  # t(0.975, 5), t table
    assert curve.dof == n - 2
    assert np.allclose(curve.eval_uncertainty(at), expected, rtol=1e-6)

