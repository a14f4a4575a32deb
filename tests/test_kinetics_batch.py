"""Batched substrate-inhibition fit and model choice against the one-curve forms: a published
worked example, simulated curves of both rate laws, ragged and weighted curves, bad inputs."""

import json

import numpy as np
import pytest

from pipeline.errors import CalculationError
from pipeline.science.batched_least_squares import FAIL_START, FITTED, fit_batched_least_squares
from pipeline.science.kinetic_data import BATCH_NOT_FITTED
from pipeline.science.kinetic_model_choice import choose_kinetic_model, choose_kinetic_models
from pipeline.science.michaelis_menten import MICHAELIS_MENTEN, batched_linearised, batched_model
from pipeline.science.substrate_inhibition import (
    SUBSTRATE_INHIBITION,
    SubstrateInhibitionFit,
    fit_substrate_inhibition,
)
from pipeline.science.substrate_inhibition_batch import fit_substrate_inhibition_batch

# Puromycin, treated (Treloar 1974, in Bates & Watts, Nonlinear Regression Analysis and Its
# Applications, 1988, App. A1.3; docs/assay-rules.md): substrate in ppm, rate in counts/min^2.
PUROMYCIN_S = [0.02, 0.02, 0.06, 0.06, 0.11, 0.11, 0.22, 0.22, 0.56, 0.56, 1.10, 1.10]
PUROMYCIN_V = [76, 47, 97, 107, 123, 139, 159, 152, 191, 201, 207, 200]
# Published Michaelis-Menten fit (same source): Vmax 212.68, Km 0.06412, 10 df.
PUROMYCIN_VMAX, PUROMYCIN_KM, PUROMYCIN_DOF = 212.68, 0.06412, 10
# Puromycin, untreated (same experiment, from memory: the 11-point companion series, the
# last level measured once). Used only as a second, shorter curve for the ragged batch.
UNTREATED_S = [0.02, 0.02, 0.06, 0.06, 0.11, 0.11, 0.22, 0.22, 0.56, 0.56, 1.10]
UNTREATED_V = [67, 51, 84, 86, 98, 115, 131, 124, 144, 158, 160]

# Simulated design (invented for these tests): 8 substrate levels 0.25-32 mM in duplicate.
S_MM = np.repeat([0.25, 0.5, 1.0, 2.0, 4.0, 8.0, 16.0, 32.0], 2)


def simulated_curves(n_curves, seed, substrate=S_MM):
    """Simulated rates: the first half plain Michaelis-Menten v = Vmax S/(Km + S), the second
    half substrate inhibition v = Vmax S/(Km + S + S^2/Ki) with Ki = 2-6 x Km; Vmax 5-20 U/mg,
    Km 0.5-2 mM, normal noise SD 3 % of Vmax."""
    rng = np.random.default_rng(seed)
    vmax = rng.uniform(5, 20, n_curves)[:, None]
    km = rng.uniform(0.5, 2, n_curves)[:, None]
    ki = rng.uniform(2, 6, n_curves)[:, None] * km
    inverse_ki = np.where(np.arange(n_curves)[:, None] < n_curves // 2, 0.0, 1 / ki)
    mean = vmax * substrate / (km + substrate + inverse_ki * substrate**2)
    return mean + rng.normal(0, 0.03 * vmax, (n_curves, substrate.size))


def assert_close(batch, one, se, what):
    """|batch - one| <= 1e-6 max(|one|, se): 1e-6 relative for a determined parameter.

    The one-curve solver stops when the RSS falls by less than 1e-15 (relative), which fixes
    a parameter only to about sqrt(1e-15) ~ 3e-8 of its SE; a parameter whose SE exceeds its
    value (1/Ki of a plain Michaelis-Menten curve, a Km far below the lowest level) has no
    1e-6 relative precision to compare, so there the bound is 1e-6 of the SE."""
    assert abs(batch - one) <= 1e-6 * max(abs(one), se), f"{what}: {batch!r} vs {one!r}"


def assert_same_choice(batch, one):
    """Same decision and wording; both fits agree where both converged."""
    assert (batch.model, batch.flagged, batch.reason) == (one.model, one.flagged, one.reason)
    assert batch.alpha == one.alpha
    b, o = batch.michaelis_menten, one.michaelis_menten
    assert (b.n, b.dof) == (o.n, o.dof)
    assert_close(b.vmax, o.vmax, o.vmax_se, "Michaelis-Menten Vmax")
    assert_close(b.km, o.km, o.km_se, "Michaelis-Menten Km")
    assert (batch.substrate_inhibition is None) == (one.substrate_inhibition is None)
    if one.substrate_inhibition is None:
        assert batch.f_statistic is None and batch.p_value is None
        return
    assert batch.f_statistic == pytest.approx(one.f_statistic, rel=1e-6, abs=1e-9)
    b, o = batch.substrate_inhibition, one.substrate_inhibition
    if b.converged and o.converged:
        assert_same_si_fit(b, o)


def assert_same_si_fit(b, o):
    """Vmax, Km, 1/Ki (see assert_close), their SEs to 1e-6 relative, the RSS to 1e-9."""
    assert (b.n, b.dof) == (o.n, o.dof)
    assert_close(b.vmax, o.vmax, o.vmax_se, "Vmax")
    assert_close(b.km, o.km, o.km_se, "Km")
    assert_close(b.inverse_ki, o.inverse_ki, o.inverse_ki_se, "1/Ki")
    assert (b.vmax_se, b.km_se, b.inverse_ki_se) == pytest.approx(
        (o.vmax_se, o.km_se, o.inverse_ki_se), rel=1e-6
    )
    assert b.rss == pytest.approx(o.rss, rel=1e-9)


@pytest.fixture(scope="module")
def five_hundred():
    """500 simulated curves (seed 20), their batched choices and the one-curve choices."""
    rates = simulated_curves(500, seed=20)
    return rates, choose_kinetic_models(S_MM, rates), [choose_kinetic_model(S_MM, r) for r in rates]


class TestPuromycin:
    def test_batch_choice_equals_the_one_curve_choice(self):
        s = np.full((2, 12), np.nan)
        v = np.full((2, 12), np.nan)
        s[0], v[0] = PUROMYCIN_S, PUROMYCIN_V
        s[1, :11], v[1, :11] = UNTREATED_S, UNTREATED_V
        choices = choose_kinetic_models(s, v, mask=np.isfinite(v))
        assert len(choices) == 2
        assert_same_choice(choices[0], choose_kinetic_model(PUROMYCIN_S, PUROMYCIN_V))
        assert_same_choice(choices[1], choose_kinetic_model(UNTREATED_S, UNTREATED_V))

    def test_published_michaelis_menten_example_keeps_michaelis_menten(self):
        (choice,) = choose_kinetic_models(PUROMYCIN_S, [PUROMYCIN_V])
        assert choice.model == MICHAELIS_MENTEN
        assert not choice.flagged
        assert choice.p_value >= 0.05
        assert choice.reason.startswith("Michaelis-Menten kept")
        assert choice.michaelis_menten.vmax == pytest.approx(PUROMYCIN_VMAX, rel=1e-3)
        assert choice.michaelis_menten.km == pytest.approx(PUROMYCIN_KM, rel=1e-3)
        assert choice.michaelis_menten.dof == PUROMYCIN_DOF
        assert choice.substrate_inhibition.dof == PUROMYCIN_DOF - 1

    def test_batch_fit_equals_the_one_curve_fit(self):
        batch = fit_substrate_inhibition_batch(PUROMYCIN_S, [PUROMYCIN_V])
        fit = batch.fit(0)
        assert isinstance(fit, SubstrateInhibitionFit)
        one = fit_substrate_inhibition(PUROMYCIN_S, PUROMYCIN_V)
        assert fit.converged and one.converged
        assert_same_si_fit(fit, one)
        assert fit.vmax_ci95 == pytest.approx(one.vmax_ci95, rel=1e-6)
        assert fit.km_ci95 == pytest.approx(one.km_ci95, rel=1e-6)
        assert (fit.ki, fit.ki_se) == pytest.approx((one.ki, one.ki_se), rel=1e-6)
        assert fit.ki_ci95 == pytest.approx(one.ki_ci95, rel=1e-6)
        assert json.dumps(batch.to_dict(), allow_nan=False)
        assert json.dumps(fit.to_dict(), allow_nan=False)


class TestSimulatedCurves:
    def test_every_choice_equals_the_one_curve_choice(self, five_hundred):
        _, batch, one = five_hundred
        assert len(batch) == len(one) == 500
        for i, (b, o) in enumerate(zip(batch, one, strict=True)):
            try:
                assert_same_choice(b, o)
            except AssertionError as exc:
                raise AssertionError(f"curve {i}: {exc}") from exc

    def test_both_fits_converge_on_every_curve(self, five_hundred):
        _, batch, one = five_hundred
        assert all(c.substrate_inhibition.converged for c in batch)
        assert all(c.substrate_inhibition.converged for c in one)

    def test_inhibited_curves_are_found_and_plain_ones_mostly_kept(self, five_hundred):
        # Curves 0-249 are simulated Michaelis-Menten: at alpha 0.05 about 5 % false alarms
        # (binomial SD 1.4 %), so at most 10 %. Curves 250-499 are simulated with Ki = 2-6 Km
        # over substrate up to 16-64 Km: the inhibition is strong, at least 95 % are found.
        _, batch, _ = five_hundred
        chosen = np.array([c.model == SUBSTRATE_INHIBITION for c in batch])
        assert chosen[:250].mean() <= 0.10
        assert chosen[250:].mean() >= 0.95
        assert all(c.flagged for c in batch[250:] if c.model == SUBSTRATE_INHIBITION)

    def test_f_statistic_follows_the_extra_sum_of_squares_formula(self, five_hundred):
        # F = ((RSS1 - RSS2)/(df1 - df2)) / (RSS2/df2), df1 = n - 2, df2 = n - 3
        # (extra-sum-of-squares F test, common practice).
        _, batch, _ = five_hundred
        for c in batch[::50]:
            rss1, rss2 = c.michaelis_menten.rss, c.substrate_inhibition.rss
            assert c.f_statistic == pytest.approx((rss1 - rss2) / (rss2 / (16 - 3)), rel=1e-9)

    def test_ragged_and_weighted_curves_equal_the_one_curve_form(self):
        # 100 simulated curves on 0.4-10 mM in duplicate, 0-6 points dropped per curve at
        # random and weights 0.5-2 (seed 21); the one-curve form sees only the kept points.
        s = np.repeat([0.4, 0.8, 1.5, 2.5, 4.0, 6.0, 8.0, 10.0], 2)
        rates = simulated_curves(100, seed=21, substrate=s)
        rng = np.random.default_rng(22)
        weights = rng.uniform(0.5, 2, rates.shape)
        mask = np.ones(rates.shape, dtype=bool)
        for row in mask:
            row[rng.choice(s.size, rng.integers(0, 7), replace=False)] = False
        batch = choose_kinetic_models(s, np.where(mask, rates, np.nan), weights, mask)
        for i, row in enumerate(mask):
            one = choose_kinetic_model(s[row], rates[i, row], weights[i, row])
            assert_same_choice(batch[i], one)

    def test_a_sparse_noisy_curve_reaches_the_one_curve_optimum(self):
        # Invented numbers: a substrate-inhibition curve with 10 % noise and several levels
        # lost. From the Hanes-Woolf start an unguarded step crosses Km + S + S^2/Ki = 0 at
        # the lowest level and ends in a far worse minimum (RSS 58 against 6.3); the batch
        # must stay where the rate law has no pole at a measured level.
        s = np.array([0.25, 2, 2, 4, 8, 8, 16, 32, 32])
        v = np.array([6.44, 7.12, 5.82, 5.56, 2.89, 2.93, 0.42, 1.61, 2.58])
        fit = fit_substrate_inhibition_batch(s, [v]).fit(0)
        one = fit_substrate_inhibition(s, v)
        assert fit.converged and one.converged
        assert_same_si_fit(fit, one)
        assert np.all(fit.km + s + fit.inverse_ki * s**2 > 0)

    def test_noise_free_inhibition_returns_the_generating_constants(self):
        # Noise-free simulated data, Vmax 8, Km 0.5, Ki 12 and Vmax 3, Km 2, Ki 4.
        rates = [8 * S_MM / (0.5 + S_MM + S_MM**2 / 12), 3 * S_MM / (2 + S_MM + S_MM**2 / 4)]
        batch = fit_substrate_inhibition_batch(S_MM, rates)
        assert batch.converged.all()
        assert batch.vmax == pytest.approx([8, 3], rel=1e-8)
        assert batch.km == pytest.approx([0.5, 2], rel=1e-8)
        assert batch.ki == pytest.approx([12, 4], rel=1e-8)


class TestCurvesThatCannotBeTested:
    def test_three_points_keep_michaelis_menten_with_the_one_curve_words(self):
        s, v = [0.5, 1.0, 4.0], [2.0, 3.1, 4.4]
        (choice,) = choose_kinetic_models(s, [v])
        one = choose_kinetic_model(s, v)
        assert choice.reason == one.reason
        assert choice.reason.startswith("only 3 points")
        assert choice.substrate_inhibition is None and choice.model == MICHAELIS_MENTEN

    def test_two_levels_cannot_test_inhibition(self):
        s, v = [1.0, 1.0, 4.0, 4.0], [3.0, 3.2, 6.1, 5.9]
        (choice,) = choose_kinetic_models(s, [v])
        one = choose_kinetic_model(s, v)
        assert choice.reason == one.reason
        assert "too few substrate levels: 2" in choice.reason
        assert not choice.flagged

    def test_an_untestable_curve_does_not_stop_the_others(self):
        rates = np.vstack([simulated_curves(2, seed=23), np.full(S_MM.size, np.nan)])
        mask = np.ones(rates.shape, dtype=bool)
        mask[2] = False
        mask[2, [0, 1, 2, 3]] = True  # two levels, four points
        rates[2, :4] = [1.0, 1.1, 1.8, 1.9]
        batch = fit_substrate_inhibition_batch(S_MM, rates, mask=mask)
        assert batch.converged[:2].all()
        assert str(batch.status[2]) == "too-few-levels"
        assert np.isnan(batch.vmax[2])
        with pytest.raises(
            CalculationError, match="curve 2 could not be fitted: too few substrate"
        ):
            batch.fit(2)
        assert BATCH_NOT_FITTED not in batch.status


class TestInvalidInputs:
    @pytest.mark.parametrize(
        ("kwargs", "match"),
        [
            ({"rate": PUROMYCIN_V}, "table of curves"),
            ({"substrate": [1.0, 2.0]}, "does not pair up"),
            ({"weights": -np.ones((1, 12))}, "must be finite and not negative"),
            ({"weights": np.ones((1, 11))}, "weights of shape"),
            ({"mask": np.ones((1, 5), dtype=bool)}, "mask of shape"),
            ({"rate": [[np.nan] + PUROMYCIN_V[1:]]}, "mask it out"),
            ({"substrate": [-0.02] + PUROMYCIN_S[1:]}, "must not be negative"),
        ],
    )
    def test_bad_arrays_are_refused(self, kwargs, match):
        args = {"substrate": PUROMYCIN_S, "rate": [PUROMYCIN_V], **kwargs}
        with pytest.raises(CalculationError, match=match):
            fit_substrate_inhibition_batch(**args)
        with pytest.raises(CalculationError, match=match):
            choose_kinetic_models(**args)

    @pytest.mark.parametrize("alpha", [0, 1, 1.5, -0.05, "0.05"])
    def test_alpha_outside_zero_one_is_refused(self, alpha):
        with pytest.raises(CalculationError, match="alpha must lie between 0 and 1"):
            choose_kinetic_models(PUROMYCIN_S, [PUROMYCIN_V], alpha=alpha)

    def test_a_curve_without_michaelis_menten_fit_is_named(self):
        rates = [PUROMYCIN_V, [50.0, 60.0] + [np.nan] * 10]
        mask = np.isfinite(np.asarray(rates, dtype=float))
        with pytest.raises(CalculationError, match="curve 1: too few points: 2 in use"):
            choose_kinetic_models(PUROMYCIN_S, rates, mask=mask)

    def test_a_curve_outside_the_batch_is_refused(self):
        batch = fit_substrate_inhibition_batch(PUROMYCIN_S, [PUROMYCIN_V])
        with pytest.raises(CalculationError, match="curve 3 does not exist: the batch holds 1"):
            batch.fit(3)


class TestBatchedEngine:
    """The batched Levenberg-Marquardt engine on its own (exact synthetic data, invented)."""

    def test_exact_rows_are_recovered_and_a_bad_start_fails_alone(self):
        s = np.tile(S_MM, (3, 1))
        v = np.array([[10.0], [4.0], [7.0]]) * s / (np.array([[2.0], [0.5], [1.0]]) + s)
        p0 = np.array([[8.0, 1.0], [5.0, 1.0], [np.nan, 1.0]])
        fit = fit_batched_least_squares(batched_model, batched_linearised, s, v, np.ones_like(s), p0)
        assert fit.failure.tolist() == [FITTED, FITTED, FAIL_START]
        assert fit.converged[:2].all() and not fit.converged[2]
        assert fit.params[:2] == pytest.approx(np.array([[10.0, 2.0], [4.0, 0.5]]), rel=1e-10)
        assert (fit.dof == S_MM.size - 2).all()

    def test_only_two_or_three_parameters(self):
        s = np.tile(S_MM, (1, 1))
        with pytest.raises(CalculationError, match="2 or 3 parameters"):
            fit_batched_least_squares(batched_model, batched_linearised, s, s, np.ones_like(s), np.ones((1, 4)))
