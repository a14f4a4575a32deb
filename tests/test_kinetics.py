"""Kinetic constants: published worked example, batched vs one-curve fits, interval coverage,
model choice, Km quality and turnover units."""

import json
import math

import numpy as np
import pytest
from scipy.optimize import curve_fit

from pipeline.errors import CalculationError
from pipeline.science.kinetic_constants import km_determination, turnover
from pipeline.science.kinetic_model_choice import choose_kinetic_model
from pipeline.science.michaelis_menten import (
    MICHAELIS_MENTEN,
    MichaelisMentenFit,
    fit_michaelis_menten,
    fit_michaelis_menten_batch,
)
from pipeline.science.substrate_inhibition import SUBSTRATE_INHIBITION, fit_substrate_inhibition

# Puromycin, treated (Treloar 1974, in Bates & Watts, Nonlinear Regression Analysis and Its
# Applications, 1988, App. A1.3): substrate in ppm, rate in counts/min^2.
PUROMYCIN_S = [0.02, 0.02, 0.06, 0.06, 0.11, 0.11, 0.22, 0.22, 0.56, 0.56, 1.10, 1.10]
PUROMYCIN_V = [76, 47, 97, 107, 123, 139, 159, 152, 191, 201, 207, 200]
# Published fit (same source): Vmax 212.68 (SE 6.947), Km 0.06412 (SE 0.008281),
# residual SE 10.93 on 10 df.
PUROMYCIN_VMAX, PUROMYCIN_VMAX_SE = 212.68, 6.947
PUROMYCIN_KM, PUROMYCIN_KM_SE = 0.06412, 0.008281
PUROMYCIN_RESIDUAL_SE, PUROMYCIN_DOF = 10.93, 10

# Simulated design (invented for these tests): 8 substrate levels spanning 0.2-5 x Km in
# duplicate, the usual design (docs/assay-rules.md, "Kinetic constants"; common practice).
DESIGN_KM_MM = 2.0
DESIGN_S_MM = np.repeat([0.4, 0.8, 1.5, 2.5, 4.0, 6.0, 8.0, 10.0], 2)


def michaelis_menten(s, vmax, km):
    return vmax * s / (km + s)


def simulated_curves(n_curves, seed, ragged=False):
    """Simulated Michaelis-Menten rates: Vmax 5-20 U/mg, Km 1-3 mM, normal noise 3 % of Vmax."""
    rng = np.random.default_rng(seed)
    vmax = rng.uniform(5, 20, n_curves)
    km = rng.uniform(1, 3, n_curves)
    s = np.broadcast_to(DESIGN_S_MM, (n_curves, DESIGN_S_MM.size))
    rate = michaelis_menten(s, vmax[:, None], km[:, None])
    rate = rate + rng.normal(0, 0.03 * vmax[:, None], s.shape)
    mask = np.ones(s.shape, dtype=bool)
    if ragged:  # drop 0-6 points at random from each curve
        for i in range(n_curves):
            mask[i, rng.choice(s.shape[1], rng.integers(0, 7), replace=False)] = False
        rate = np.where(mask, rate, np.nan)
    return s, rate, mask


def rel_diff(a, b):
    return np.max(np.abs(np.asarray(a) / np.asarray(b) - 1))


class TestPuromycin:
    def test_one_curve_fit_matches_the_published_values(self):
        fit = fit_michaelis_menten(PUROMYCIN_S, PUROMYCIN_V)
        assert fit.converged
        assert fit.vmax == pytest.approx(PUROMYCIN_VMAX, rel=1e-3)
        assert fit.km == pytest.approx(PUROMYCIN_KM, rel=1e-3)
        assert fit.vmax_se == pytest.approx(PUROMYCIN_VMAX_SE, rel=1e-2)
        assert fit.km_se == pytest.approx(PUROMYCIN_KM_SE, rel=1e-2)
        assert fit.residual_se == pytest.approx(PUROMYCIN_RESIDUAL_SE, rel=1e-3)
        assert fit.dof == PUROMYCIN_DOF
        assert fit.n == 12

    def test_interval_is_student_t_on_10_df(self):
        fit = fit_michaelis_menten(PUROMYCIN_S, PUROMYCIN_V)
        t_975_10 = 2.228139  # Student t, 0.975 quantile, 10 df (standard t tables)
        lo, hi = fit.km_ci95
        assert (hi - lo) / 2 == pytest.approx(t_975_10 * fit.km_se, rel=1e-6)
        assert lo < fit.km < hi

    def test_batched_fit_of_one_curve_matches_the_published_values(self):
        fit = fit_michaelis_menten_batch(PUROMYCIN_S, np.array([PUROMYCIN_V], dtype=float)).fit(0)
        assert fit.converged
        assert fit.vmax == pytest.approx(PUROMYCIN_VMAX, rel=1e-3)
        assert fit.km == pytest.approx(PUROMYCIN_KM, rel=1e-3)
        assert fit.km_se == pytest.approx(PUROMYCIN_KM_SE, rel=1e-2)
        assert fit.dof == PUROMYCIN_DOF

    def test_results_serialise_to_strict_json(self):
        fit = fit_michaelis_menten(PUROMYCIN_S, PUROMYCIN_V)
        data = json.loads(json.dumps(fit.to_dict(), allow_nan=False))
        assert data["model"] == MICHAELIS_MENTEN
        assert data["km_ci95"] == list(fit.km_ci95)
        batch = fit_michaelis_menten_batch(PUROMYCIN_S, np.array([PUROMYCIN_V, PUROMYCIN_V], float))
        data = json.loads(json.dumps(batch.to_dict(), allow_nan=False))
        assert len(data["km"]) == 2 and len(data["km_ci95"][0]) == 2


class TestBatchedAgreesWithOneCurve:
    def test_thousand_curves_match_the_one_curve_form(self):
        s, rate, _ = simulated_curves(1000, seed=11)
        batch = fit_michaelis_menten_batch(DESIGN_S_MM, rate)
        assert batch.converged.all()
        for i in range(1000):
            one = fit_michaelis_menten(s[i], rate[i])
            assert rel_diff([batch.vmax[i], batch.km[i]], [one.vmax, one.km]) < 1e-6
            assert rel_diff([batch.vmax_se[i], batch.km_se[i]], [one.vmax_se, one.km_se]) < 1e-6
            assert rel_diff(batch.km_ci95[i], one.km_ci95) < 1e-6
            assert batch.dof[i] == one.dof

    def test_thousand_curves_match_scipy_curve_fit(self):
        s, rate, _ = simulated_curves(1000, seed=12)
        batch = fit_michaelis_menten_batch(s, rate)
        for i in range(1000):
            popt, pcov = curve_fit(
                michaelis_menten,
                s[i],
                rate[i],
                p0=[rate[i].max(), np.median(s[i])],
                xtol=1e-15,
                ftol=1e-15,
                gtol=1e-15,
            )
            assert rel_diff([batch.vmax[i], batch.km[i]], popt) < 1e-6
            assert rel_diff([batch.vmax_se[i], batch.km_se[i]], np.sqrt(np.diag(pcov))) < 1e-6

    def test_ragged_curves_match_the_one_curve_fit_of_their_points(self):
        s, rate, mask = simulated_curves(200, seed=13, ragged=True)
        batch = fit_michaelis_menten_batch(s, rate, mask=mask)
        assert batch.converged.all()
        for i in range(200):
            one = fit_michaelis_menten(s[i][mask[i]], rate[i][mask[i]])
            assert batch.n[i] == mask[i].sum() == one.n
            assert rel_diff([batch.vmax[i], batch.km[i]], [one.vmax, one.km]) < 1e-6
            assert rel_diff(batch.km_se[i], one.km_se) < 1e-6

    def test_weighted_curves_match_the_weighted_one_curve_fit(self):
        s, rate, _ = simulated_curves(100, seed=14)
        weights = 1 / (0.05 * np.abs(rate) + 0.1) ** 2  # 1/sigma^2 for a 5 % + 0.1 U/mg error
        batch = fit_michaelis_menten_batch(s, rate, weights=weights)
        for i in range(100):
            one = fit_michaelis_menten(s[i], rate[i], weights=weights[i])
            assert rel_diff([batch.vmax[i], batch.km[i]], [one.vmax, one.km]) < 1e-6
            assert rel_diff(batch.vmax_se[i], one.vmax_se) < 1e-6

    def test_unfittable_curve_is_reported_without_stopping_the_batch(self):
        s, rate, mask = simulated_curves(3, seed=15)
        mask[1, 2:] = False  # curve 1 keeps two points only
        batch = fit_michaelis_menten_batch(s, rate, mask=mask)
        assert np.isnan(batch.km[1]) and not batch.converged[1]
        assert batch.status[1] == "too-few-points"
        assert "too few points: 2 in use" in batch.message(1)
        assert batch.converged[0] and batch.converged[2]
        one_level = fit_michaelis_menten_batch([0.0, 2.0, 2.0, 2.0], [[0.0, 5.1, 4.9, 5.0]])
        assert one_level.status[0] == "too-few-levels" and np.isnan(one_level.vmax[0])
        with pytest.raises(CalculationError, match="curve 1 could not be fitted"):
            batch.fit(1)

    def test_batch_arrays_are_read_only(self):
        batch = fit_michaelis_menten_batch(PUROMYCIN_S, np.array([PUROMYCIN_V], dtype=float))
        with pytest.raises(ValueError):
            batch.km[0] = 1.0


class TestIntervalCoverage:
    def test_km_interval_covers_the_truth_about_95_percent_of_the_time(self):
        # Simulated: Vmax 10 U/mg, Km 2 mM, normal noise SD 0.3 U/mg, 2,000 curves, seed 20240601.
        rng = np.random.default_rng(20240601)
        truth_vmax, n_curves = 10.0, 2000
        mean = michaelis_menten(DESIGN_S_MM, truth_vmax, DESIGN_KM_MM)
        rate = mean + rng.normal(0, 0.3, (n_curves, DESIGN_S_MM.size))
        batch = fit_michaelis_menten_batch(DESIGN_S_MM, rate)
        assert batch.converged.all()
        km_covered = (batch.km_ci95[:, 0] <= DESIGN_KM_MM) & (DESIGN_KM_MM <= batch.km_ci95[:, 1])
        vmax_covered = (batch.vmax_ci95[:, 0] <= truth_vmax) & (truth_vmax <= batch.vmax_ci95[:, 1])
        assert 0.93 <= km_covered.mean() <= 0.97
        assert 0.93 <= vmax_covered.mean() <= 0.97


class TestModelChoice:
    # Simulated (invented): substrate 0.25-32 mM in duplicate, 3 % proportional normal noise.
    S_MM = np.repeat([0.25, 0.5, 1.0, 2.0, 4.0, 8.0, 16.0, 32.0], 2)

    def test_strong_substrate_inhibition_is_chosen_and_flagged(self):
        # Simulated substrate-inhibition model v = Vmax S/(Km + S + S^2/Ki),
        # Vmax 10 U/mg, Km 1 mM, Ki 5 mM (strong: rate falls above ~2 mM), seed 7.
        rng = np.random.default_rng(7)
        rate = 10 * self.S_MM / (1 + self.S_MM + self.S_MM**2 / 5)
        rate = rate * (1 + rng.normal(0, 0.03, rate.size))
        choice = choose_kinetic_model(self.S_MM, rate)
        assert choice.model == SUBSTRATE_INHIBITION
        assert choice.flagged
        assert choice.p_value < 0.05
        assert "substrate inhibition" in choice.reason
        assert choice.substrate_inhibition.ki == pytest.approx(5, rel=0.2)
        assert choice.substrate_inhibition.km == pytest.approx(1, rel=0.2)
        assert json.dumps(choice.to_dict(), allow_nan=False)

    def test_published_michaelis_menten_data_are_not_flagged(self):
        # Puromycin treated (Bates & Watts 1988, App. A1.3) is their Michaelis-Menten example.
        choice = choose_kinetic_model(PUROMYCIN_S, PUROMYCIN_V)
        assert choice.model == MICHAELIS_MENTEN
        assert not choice.flagged
        assert choice.p_value >= 0.05

    def test_plain_michaelis_menten_data_are_flagged_only_at_the_test_level(self):
        # Simulated Michaelis-Menten model, Vmax 10 U/mg, Km 1 mM, normal noise SD 0.2 U/mg,
        # 200 curves, seed 4. At alpha = 0.05 about 5 % false alarms are expected (binomial
        # SD 1.5 %), so the flagged share must lie within 1-10 %; most curves are not flagged.
        rng = np.random.default_rng(4)
        flagged, chosen = 0, 0
        for _ in range(200):
            rate = 10 * self.S_MM / (1 + self.S_MM) + rng.normal(0, 0.2, self.S_MM.size)
            choice = choose_kinetic_model(self.S_MM, rate)
            flagged += choice.flagged
            chosen += choice.model == SUBSTRATE_INHIBITION
            assert choice.flagged == (choice.p_value < 0.05)
        assert 0.01 <= flagged / 200 <= 0.10
        assert chosen <= flagged

    def test_strong_inhibition_is_found_in_every_simulated_curve(self):
        # Simulated substrate-inhibition model, Vmax 10 U/mg, Km 1 mM, Ki 5 mM, normal noise
        # SD 0.2 U/mg, 50 curves, seed 5.
        rng = np.random.default_rng(5)
        mean = 10 * self.S_MM / (1 + self.S_MM + self.S_MM**2 / 5)
        for _ in range(50):
            choice = choose_kinetic_model(self.S_MM, mean + rng.normal(0, 0.2, self.S_MM.size))
            assert choice.model == SUBSTRATE_INHIBITION and choice.flagged

    def test_f_statistic_follows_the_extra_sum_of_squares_formula(self):
        rng = np.random.default_rng(9)
        rate = 10 * self.S_MM / (1 + self.S_MM + self.S_MM**2 / 20)
        rate = rate * (1 + rng.normal(0, 0.03, rate.size))
        choice = choose_kinetic_model(self.S_MM, rate)
        rss1, rss2 = choice.michaelis_menten.rss, choice.substrate_inhibition.rss
        assert choice.f_statistic == pytest.approx((rss1 - rss2) / (rss2 / (16 - 3)), rel=1e-9)

    def test_substrate_inhibition_fit_recovers_exact_parameters(self):
        # Noise-free simulated data: the fit must return the generating constants.
        rate = 8 * self.S_MM / (0.5 + self.S_MM + self.S_MM**2 / 12)
        fit = fit_substrate_inhibition(self.S_MM, rate)
        assert (fit.vmax, fit.km, fit.ki) == pytest.approx((8, 0.5, 12), rel=1e-8)

    def test_alpha_outside_zero_one_is_rejected(self):
        with pytest.raises(CalculationError, match="alpha"):
            choose_kinetic_model(PUROMYCIN_S, PUROMYCIN_V, alpha=1.5)


class TestKmDetermination:
    def test_puromycin_km_is_well_determined(self):
        fit = fit_michaelis_menten(PUROMYCIN_S, PUROMYCIN_V)
        quality = km_determination(fit, PUROMYCIN_S, max_relative_se=0.2)
        assert quality.well_determined
        assert quality.km_relative_se == pytest.approx(0.008281 / 0.06412, rel=1e-2)

    def test_km_above_the_highest_substrate_is_poorly_determined(self):
        # Simulated: Km 20 mM but substrate only up to 4 mM (noise-free, the fit is exact).
        s = np.array([0.5, 1.0, 1.5, 2.0, 3.0, 4.0])
        fit = fit_michaelis_menten(s, michaelis_menten(s, 50.0, 20.0))
        assert fit.km == pytest.approx(20.0, rel=1e-6)
        quality = km_determination(fit, s, max_relative_se=0.5)
        assert not quality.well_determined
        assert "poorly determined" in quality.reason
        assert "above the highest tested substrate" in quality.reason

    def test_large_relative_se_is_poorly_determined(self):
        fit = fit_michaelis_menten(PUROMYCIN_S, PUROMYCIN_V)  # relative SE about 12.9 %
        quality = km_determination(fit, PUROMYCIN_S, max_relative_se=0.10)
        assert not quality.well_determined
        assert "relative SE" in quality.reason

    def test_unconverged_fit_is_poorly_determined(self):
        fit = MichaelisMentenFit(
            vmax=1.0,
            km=0.5,
            vmax_se=0.01,
            km_se=0.01,
            vmax_ci95=(0.9, 1.1),
            km_ci95=(0.4, 0.6),
            cov_vmax_km=0.0,
            residual_se=0.1,
            rss=0.1,
            n=8,
            dof=6,
            converged=False,
            message="stopped",
        )
        quality = km_determination(fit, [0.1, 1.0, 2.0], max_relative_se=0.5)
        assert not quality.well_determined
        assert "did not converge" in quality.reason

    def test_limit_must_be_positive(self):
        fit = fit_michaelis_menten(PUROMYCIN_S, PUROMYCIN_V)
        with pytest.raises(CalculationError, match="relative SE"):
            km_determination(fit, PUROMYCIN_S, max_relative_se=0.0)


class TestTurnover:
    def test_worked_unit_example(self):
        # 10 U/mg = 10 umol/min per mg = 10e-6 mol/min per 1e-3 g = 1e-2 mol/(min g).
        # Times MW 30,000 g/mol: 300 mol substrate per min per mol enzyme = 300/60 = 5 per s.
        # kcat/Km with Km 0.5 mM = 5e-4 M: 5 / 5e-4 = 1e4 per M per s.
        result = turnover(10.0, 0.5, 0.5, 0.05, 30_000.0)
        assert result.kcat_per_s == pytest.approx(5.0, rel=1e-12)
        assert result.kcat_over_km_per_m_per_s == pytest.approx(1.0e4, rel=1e-12)
        # Relative SEs: Vmax 5 %, Km 10 %. se(kcat) = 5 * 0.05 = 0.25 per s;
        # se(kcat/Km) = 1e4 * sqrt(0.05^2 + 0.10^2) = 1118.03 per M per s.
        assert result.kcat_se_per_s == pytest.approx(0.25, rel=1e-12)
        assert result.kcat_over_km_se_per_m_per_s == pytest.approx(1118.034, rel=1e-6)

    def test_positive_covariance_shrinks_the_efficiency_error(self):
        # Correlation 0.8: cov = 0.8 * 0.5 * 0.05 = 0.02; relative variance
        # 0.0025 + 0.01 - 2 * 0.02 / (10 * 0.5) = 0.0045, sqrt = 0.067082 -> 670.82 per M per s.
        result = turnover(10.0, 0.5, 0.5, 0.05, 30_000.0, cov_vmax_km=0.02)
        assert result.kcat_over_km_se_per_m_per_s == pytest.approx(670.820, rel=1e-5)
        assert result.to_dict()["kcat_per_s"] == pytest.approx(5.0)

    @pytest.mark.parametrize(
        ("args", "match"),
        [
            ((10.0, 0.5, 0.5, 0.05, 0.0), "molecular weight"),
            ((0.0, 0.5, 0.5, 0.05, 30_000.0), "Vmax"),
            ((10.0, -0.5, 0.5, 0.05, 30_000.0), "SE of Vmax"),
            ((10.0, 0.5, np.nan, 0.05, 30_000.0), "Km"),
            ((10.0, 0.5, 0.5, 0.05, 30_000.0, 1.0), "correlation"),
        ],
    )
    def test_rejected_with_a_message(self, args, match):
        with pytest.raises(CalculationError, match=match):
            turnover(*args)


class TestInvalidInput:
    @pytest.mark.parametrize(
        ("substrate", "rate", "match"),
        [
            ([0.1, 0.5], [1.0, 2.0], "too few points"),
            ([0.1, 0.5, 1.0, 2.0], [1.0, np.nan, 2.0, 2.5], "point 2 of 4"),
            ([0.1, -0.5, 1.0, 2.0], [1.0, 1.5, 2.0, 2.5], "must not be negative"),
            ([0.1, 0.5, 1.0], [1.0, 1.5, 2.0, 2.5], "pair up"),
            ([0.5, 0.5, 0.5, 0.0], [1.0, 1.1, 0.9, 0.0], "substrate levels"),
            ([[0.1, 0.5, 1.0]], [1.0, 1.5, 2.0], "shape"),
        ],
    )
    def test_one_curve_fit_rejects(self, substrate, rate, match):
        with pytest.raises(CalculationError, match=match):
            fit_michaelis_menten(substrate, rate)

    @pytest.mark.parametrize(
        ("weights", "match"),
        [([1.0, 1.0, 0.0, 1.0], "positive"), ([1.0, 1.0, 1.0], "pair up")],
    )
    def test_bad_weights_are_rejected(self, weights, match):
        with pytest.raises(CalculationError, match=match):
            fit_michaelis_menten([0.1, 0.5, 1.0, 2.0], [1.0, 1.5, 2.0, 2.5], weights=weights)

    def test_substrate_inhibition_needs_four_points(self):
        with pytest.raises(CalculationError, match="too few points"):
            fit_substrate_inhibition([0.1, 0.5, 1.0], [1.0, 1.5, 2.0])

    @pytest.mark.parametrize(
        ("substrate", "rate", "kwargs", "match"),
        [
            ([0.1, 0.5, 1.0], [1.0, 1.5, 2.0], {}, "table of curves"),
            ([0.1, 0.5], [[1.0, 1.5, 2.0]], {}, "does not pair up"),
            ([0.1, 0.5, 1.0], [[1.0, np.nan, 2.0]], {}, "curve 0, point 2"),
            ([0.1, -0.5, 1.0], [[1.0, 1.5, 2.0]], {}, "must not be negative"),
            ([0.1, 0.5, 1.0], [[1.0, 1.5, 2.0]], {"weights": [[1.0, -1.0, 1.0]]}, "not negative"),
            ([0.1, 0.5, 1.0], [[1.0, 1.5, 2.0]], {"mask": [[True, False]]}, "mask of shape"),
        ],
    )
    def test_batch_rejects(self, substrate, rate, kwargs, match):
        with pytest.raises(CalculationError, match=match):
            fit_michaelis_menten_batch(substrate, rate, **kwargs)

    def test_masked_nan_is_allowed_in_a_batch(self):
        rate = np.array([[np.nan, 76, 47, 97, 107, 123, 139, 159, 152, 191, 201, 207, 200]])
        substrate = np.r_[0.01, PUROMYCIN_S]
        batch = fit_michaelis_menten_batch(substrate, rate, mask=~np.isnan(rate))
        assert batch.km[0] == pytest.approx(PUROMYCIN_KM, rel=1e-3)


# ---------------------------------------------------------------- the confidence band


# Puromycin, treated (Treloar 1974, in Bates & Watts 1988, App. A1.3): Vmax = 212.68 (SE 6.947),
# Km = 0.06412 (SE 0.008281), 10 degrees of freedom. Student's t(0.975, 10) = 2.228 (table of
# the t distribution in any statistics handbook, e.g. NIST/SEMATECH e-Handbook, table 1.3.6.7.2).
VMAX, VMAX_SE, KM, KM_SE, DOF, T_975_10 = 212.68, 6.947, 0.06412, 0.008281, 10, 2.228


def band_fit(cov_vmax_km):
    """The published fit as a result object, with the given covariance of Vmax and Km."""
    return MichaelisMentenFit(vmax=VMAX, km=KM, vmax_se=VMAX_SE, km_se=KM_SE, vmax_ci95=(math.nan, math.nan),
                              km_ci95=(math.nan, math.nan), cov_vmax_km=cov_vmax_km, residual_se=10.93,
                              rss=math.nan, n=12, dof=DOF, converged=True, message="published")


def test_band_half_width_at_km_with_zero_covariance():
    # At S = Km: g = [Km/(2Km), −Vmax·Km/(2Km)²] = [1/2, −Vmax/(4Km)], so with cov = 0
    # var f = (0.5·se_v)² + (Vmax/(4Km)·se_k)² and half-width = t·√var.
    fitted, half = band_fit(0.0).rate_at([KM]), band_fit(0.0).eval_uncertainty([KM])
    expected = T_975_10 * math.sqrt((0.5 * VMAX_SE) ** 2 + (VMAX / (4 * KM) * KM_SE) ** 2)
    assert fitted[0] == pytest.approx(VMAX / 2, rel=1e-12)
    assert half[0] == pytest.approx(expected, rel=2e-4)  # the table's t has four digits


def test_band_tends_to_t_times_se_vmax_at_saturating_substrate():
    # S → ∞: g → [1, 0], so the half-width → t·se_v whatever the covariance.
    half = band_fit(0.04).eval_uncertainty([KM * 1e7])
    assert half[0] == pytest.approx(T_975_10 * VMAX_SE, rel=2e-4)


def test_band_is_zero_at_no_substrate():
    fitted, half = band_fit(0.04).rate_at([0.0]), band_fit(0.04).eval_uncertainty([0.0])
    assert fitted[0] == 0.0 and half[0] == 0.0




def test_rate_curve_carries_the_band_a_chart_draws():
    # The curve spans 0 to 1.04 x max(highest tested level, 2 Km); its band is rate -/+ half-width.
    fit = band_fit(0.04)
    curve = fit.curve([0.02, 1.10])
    assert curve.substrate[0] == 0.0 and curve.substrate[-1] == pytest.approx(1.04 * 1.10)
    s = np.array(curve.substrate)
    assert np.allclose(curve.rate, fit.rate_at(s), rtol=1e-14)
    assert np.allclose(np.array(curve.band_high) - np.array(curve.rate), fit.eval_uncertainty(s), rtol=1e-12)
    assert np.allclose(np.array(curve.rate) - np.array(curve.band_low), fit.eval_uncertainty(s), rtol=1e-12)
