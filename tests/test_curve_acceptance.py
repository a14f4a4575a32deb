"""Standard-curve acceptance: exclude, refit, count (simulated curves with known truth).

Criteria checked (FDA Bioanalytical Method Validation 2018 and ICH M10 2022, from memory):
non-zero calibrators within ±15 % (±20 % at the lowest level); at least 75 % of them and at least
six levels meeting it; failing calibrators excluded and the curve refitted; a level run in
duplicate counts when at least half its replicates meet the criterion.
"""

from __future__ import annotations

import numpy as np
import pytest

from pipeline.science.curve_acceptance import accept_standard_curve

LEVELS = np.array([0.0, 0.125, 0.25, 0.5, 0.75, 1.0, 1.5])  # mg/mL BSA (the demo plant's, invented)
X = np.repeat(LEVELS, 2)


def _signal(x: np.ndarray, seed: int = 3) -> np.ndarray:
    # Linear truth A = 0.05 + 0.8·x with 0.002 AU read noise (simulated).
    return 0.05 + 0.8 * x + np.random.default_rng(seed).normal(0, 0.002, x.size)


def test_one_bad_standard_is_excluded_named_and_the_curve_refitted() -> None:
    y = _signal(X)
    y[9] = 0.05 + 0.8 * 0.75 * 1.4  # one 0.75 mg/mL replicate reads 40 % high
    result = accept_standard_curve(X, y, "linear")
    assert result.accepted, result.reasons
    assert [row.nominal_mg_per_ml for row in result.excluded] == [0.75]
    assert "standard 0.75 mg/mL" in result.exclusions[0] and "allowed ±15 %" in result.exclusions[0]
    assert (result.calibrators, result.kept, result.levels_kept) == (12, 11, 6)
    # The refit no longer carries the outlier: slope back to the truth 0.8 within 1 %.
    assert result.curve.params[1] == pytest.approx(0.8, rel=0.01)
    assert all(row.within_limit is not False for row in result.curve.back_calculated)


def test_fewer_than_75_percent_within_limits_rejects_the_curve() -> None:
    y = _signal(X)
    for i in (3, 5, 9, 11):  # one replicate of four levels, 45 % high: 8 of 12 kept (67 %)
        y[i] = 0.05 + 0.8 * X[i] * 1.45
    result = accept_standard_curve(X, y, "linear")
    assert not result.accepted
    assert result.kept == 8
    assert "only 8 of 12 standards (67 %) are within their limits; at least 75 % are needed" in result.reasons


def test_fewer_than_six_levels_rejects_the_curve() -> None:
    x = np.repeat(LEVELS[:-1], 2)  # five non-zero levels
    result = accept_standard_curve(x, _signal(x), "linear")
    assert not result.accepted
    assert any("only 5 concentration levels" in r and "at least 6" in r for r in result.reasons)


def test_a_lost_lowest_level_moves_the_calibrated_range() -> None:
    levels = np.array([0.0, 0.0625, 0.125, 0.25, 0.5, 0.75, 1.0, 1.5])
    x = np.repeat(levels, 2)
    y = _signal(x, seed=4)
    y[2:4] = 0.05 + 0.8 * 0.0625 * 1.6  # both replicates of the lowest level read 60 % high
    result = accept_standard_curve(x, y, "linear")
    assert result.accepted, result.reasons
    assert sorted(row.nominal_mg_per_ml for row in result.excluded) == [0.0625, 0.0625]
    assert result.curve.range_low_mg_per_ml == 0.125 and result.levels_kept == 6


def test_a_level_with_half_its_replicates_kept_still_counts() -> None:
    y = _signal(X)
    y[3] = 0.05 + 0.8 * 0.125 * 1.5  # one of the two 0.125 mg/mL standards fails (±20 % there)
    result = accept_standard_curve(X, y, "linear")
    assert result.accepted and result.levels_kept == 6 and result.kept == 11


def test_settings_out_of_range_are_refused() -> None:
    from pipeline.errors import CalculationError

    with pytest.raises(CalculationError, match="calibrator fraction"):
        accept_standard_curve(X, _signal(X), "linear", min_fraction=1.5)


# --------------------------------------------------------------------------- the curve's share of a protein SE


def test_inverse_prediction_se_of_a_line_matches_the_textbook_formula() -> None:
    # Straight-line calibration (Draper & Smith, Applied Regression Analysis, 3rd ed., 3.2):
    # SE of x̂ from the line alone = (s/|b|)·√(1/n + (x̂ − x̄)²/Sxx).
    from pipeline.science.curve_uncertainty import inverse_prediction_se
    from pipeline.science.standard_curves import fit_standard_curve

    y = _signal(X, seed=8)
    curve = fit_standard_curve(X, y, "linear")
    b = curve.params[1]
    s = np.sqrt(np.sum((y - (curve.params[0] + b * X)) ** 2) / (X.size - 2))
    x_hat = 0.6
    expected = s / abs(b) * np.sqrt(1 / X.size + (x_hat - X.mean()) ** 2 / np.sum((X - X.mean()) ** 2))
    assert inverse_prediction_se(curve, x_hat) == pytest.approx(expected, rel=1e-6)


@pytest.mark.slow
@pytest.mark.parametrize(("read_sd_au", "standard_sd_au"), [(0.004, 0.01), (0.012, 0.01)],
                         ids=["curve-share-matters", "replicates-matter"])
def test_protein_interval_with_the_curve_share_covers(read_sd_au: float, standard_sd_au: float) -> None:
    # Simulated plates (known truth 0.6 mg/mL in the well for four lots, each read in triplicate,
    # invented scatter): the replicates alone miss the curve's error shared by all three (89 %
    # measured where the curve's share matters); the plate's pooled repeatability ⊕ the curve
    # (Welch–Satterthwaite) covers, also where the replicates' scatter matters as much (each lot's
    # own 2-dof SD ⊕ the curve measured 92.7 % there: ν_eff is largest when that SD is small).
    from pipeline.assay.plates import replicate_measurement
    from pipeline.assay.protein_plates import with_curve_uncertainty, with_plate_scatter
    from pipeline.science.standard_curves import fit_standard_curve
    from pipeline.vocabulary import ReplicateScatter

    rng = np.random.default_rng(31)
    hits = hits_own = hits_replicates_only = lots = 0
    for _ in range(1000):
        y = 0.05 + 0.8 * X + rng.normal(0, standard_sd_au, X.size)
        curve = fit_standard_curve(X, y, "linear", min_r2=0.9)
        plate = {}
        for lot in "ABCD":
            reads = 0.05 + 0.8 * 0.6 + rng.normal(0, read_sd_au, 3)
            plate[lot] = replicate_measurement("protein", "mg/mL", (reads - curve.params[0]) / curve.params[1],
                                               100.0, f"lot {lot} protein")
        pooled = with_plate_scatter(plate, ReplicateScatter.POOLED_PER_PLATE)
        for lot, own in plate.items():
            assert own.value is not None and own.ci95 is not None
            lots += 1
            hits_replicates_only += own.ci95[0] <= 0.6 <= own.ci95[1]
            low, high = with_curve_uncertainty(own, curve, own.value).ci95
            hits_own += low <= 0.6 <= high
            low, high = with_curve_uncertainty(pooled[lot], curve, own.value).ci95
            hits += low <= 0.6 <= high
    print(f"coverage {hits / lots:.3f} (own SD ⊕ curve {hits_own / lots:.3f}, replicates only "
          f"{hits_replicates_only / lots:.3f})")
    assert 0.93 <= hits / lots <= 0.97
    assert hits_replicates_only < hits if read_sd_au < standard_sd_au / 2 else hits_own < hits
