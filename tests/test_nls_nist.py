"""General least squares against certified NIST StRD results and by its own invariants."""

import json

import numpy as np
import pytest

from pipeline.errors import CalculationError
from pipeline.science.least_squares import fit_least_squares

# NIST StRD nonlinear regression, data set MGH09 (Kowalik & Osborne 1978), "higher difficulty":
# y = b1 (x^2 + x b2) / (x^2 + x b3 + b4). Data, start 2 and certified values as published by
# NIST (Statistical Reference Datasets, Nonlinear Regression, MGH09).
MGH09_X = [4.0, 2.0, 1.0, 0.5, 0.25, 0.167, 0.125, 0.1, 0.0833, 0.0714, 0.0625]
MGH09_Y = [0.1957, 0.1947, 0.1735, 0.1600, 0.0844, 0.0627, 0.0456, 0.0342, 0.0323, 0.0235, 0.0246]
MGH09_START2 = [0.25, 0.39, 0.415, 0.39]
MGH09_CERTIFIED = [1.9280693458e-01, 1.9128232873e-01, 1.2305650693e-01, 1.3606233068e-01]
MGH09_CERTIFIED_SD = [1.1435312227e-02, 1.9633220911e-01, 8.0842031232e-02, 9.0025542308e-02]
MGH09_CERTIFIED_RSS = 3.0750560385e-04
MGH09_DOF = 7  # 11 observations - 4 parameters (NIST StRD MGH09)


def mgh09(x, b):
    return b[0] * (x**2 + x * b[1]) / (x**2 + x * b[2] + b[3])


def mgh09_jacobian(x, b):
    num = x**2 + x * b[1]
    den = x**2 + x * b[2] + b[3]
    return np.column_stack(
        [num / den, b[0] * x / den, -b[0] * num * x / den**2, -b[0] * num / den**2]
    )


def line(x, p):
    return p[0] + p[1] * x


def line_jacobian(x, p):
    return np.column_stack([np.ones_like(x), x])


def significant_digits_agree(value, certified, digits):
    return abs(value - certified) <= 0.5 * 10 ** (1 - digits) * abs(certified)


class TestMGH09:
    @pytest.mark.parametrize("method", ["lm", "trf"])
    def test_parameters_and_rss_match_certified_values(self, method):
        res = fit_least_squares(
            mgh09,
            mgh09_jacobian,
            MGH09_X,
            MGH09_Y,
            MGH09_START2,
            method=method,
            param_names=["b1", "b2", "b3", "b4"],
        )
        assert res.converged
        for value, certified in zip(res.params, MGH09_CERTIFIED, strict=True):
            assert significant_digits_agree(value, certified, 6), (value, certified)
        assert significant_digits_agree(res.rss, MGH09_CERTIFIED_RSS, 6)
        assert res.dof == MGH09_DOF
        assert res.n == 11

    def test_standard_deviations_match_certified_values(self):
        res = fit_least_squares(mgh09, mgh09_jacobian, MGH09_X, MGH09_Y, MGH09_START2)
        for se, certified in zip(res.se, MGH09_CERTIFIED_SD, strict=True):
            assert significant_digits_agree(se, certified, 4), (se, certified)
        # NIST's residual standard deviation = sqrt(RSS / dof).
        assert res.residual_se == pytest.approx(np.sqrt(MGH09_CERTIFIED_RSS / MGH09_DOF), rel=1e-6)

    def test_interval_uses_student_t_with_n_minus_p_dof(self):
        res = fit_least_squares(mgh09, mgh09_jacobian, MGH09_X, MGH09_Y, MGH09_START2)
        t_975_7 = 2.364624  # Student t, 0.975 quantile, 7 df (standard t tables)
        lo, hi = res.ci95[0]
        assert (hi - lo) / 2 == pytest.approx(t_975_7 * res.se[0], rel=1e-6)
        assert (lo + hi) / 2 == pytest.approx(res.params[0], rel=1e-12)

    def test_result_serialises_to_strict_json(self):
        res = fit_least_squares(
            mgh09,
            mgh09_jacobian,
            MGH09_X,
            MGH09_Y,
            MGH09_START2,
            param_names=["b1", "b2", "b3", "b4"],
        )
        data = json.loads(json.dumps(res.to_dict(), allow_nan=False))
        assert data["param_names"] == ["b1", "b2", "b3", "b4"]
        assert data["dof"] == 7
        assert len(data["covariance"]) == 4
        assert res.param("b3") == res.params[2]


class TestLinearCase:
    # Straight line through (1, 1), (2, 2), (3, 2): least squares by hand (common practice):
    # slope = Sxy/Sxx = 1/2, intercept = ybar - slope*xbar = 5/3 - 1 = 2/3,
    # RSS = 1/6, s^2 = 1/6 on 1 df, se(slope) = sqrt(s^2/Sxx) = sqrt(1/12).
    def test_matches_the_closed_form(self):
        res = fit_least_squares(line, line_jacobian, [1, 2, 3], [1, 2, 2], [0.0, 0.0])
        assert res.params == pytest.approx((2 / 3, 0.5), rel=1e-10)
        assert res.rss == pytest.approx(1 / 6, rel=1e-10)
        assert res.se[1] == pytest.approx(np.sqrt(1 / 12), rel=1e-10)
        assert res.covariance[0][1] == res.covariance[1][0]

    def test_uniform_weights_change_nothing_but_the_weighted_rss(self):
        plain = fit_least_squares(mgh09, mgh09_jacobian, MGH09_X, MGH09_Y, MGH09_START2)
        weighted = fit_least_squares(
            mgh09, mgh09_jacobian, MGH09_X, MGH09_Y, MGH09_START2, weights=[4.0] * 11
        )
        assert weighted.params == pytest.approx(plain.params, rel=1e-6)
        assert weighted.se == pytest.approx(plain.se, rel=1e-6)
        assert weighted.rss == pytest.approx(4 * plain.rss, rel=1e-8)

    def test_weight_two_equals_a_duplicated_point(self):
        x, y = np.array([1.0, 2, 3, 4]), np.array([1.0, 2.5, 2.9, 4.4])
        weighted = fit_least_squares(line, line_jacobian, x, y, [0, 0], weights=[1, 2, 1, 1])
        doubled = fit_least_squares(line, line_jacobian, np.r_[x, 2.0], np.r_[y, 2.5], [0, 0])
        assert weighted.params == pytest.approx(doubled.params, rel=1e-10)
        assert weighted.rss == pytest.approx(doubled.rss, rel=1e-10)


class TestInvalidInput:
    @pytest.mark.parametrize(
        ("x", "y", "p0", "weights", "match"),
        [
            ([1, 2], [1, 2], [0, 0], None, "too few points"),
            ([1, 2, 3], [1, np.nan, 2], [0, 0], None, "finite"),
            ([1, 2, np.inf], [1, 2, 3], [0, 0], None, "finite"),
            ([1, 2, 3], [1, 2], [0, 0], None, "pair up"),
            ([1, 2, 3], [1, 2, 3], [0, 0], [1, 0, 1], "positive"),
            ([1, 2, 3], [1, 2, 3], [0, 0], [1, 1], "weights must pair up"),
            ([1, 2, 3], [1, 2, 3], [], None, "at least one parameter"),
            ([[1, 2, 3]], [1, 2, 3], [0, 0], None, "shape"),
        ],
    )
    def test_rejected_with_a_message(self, x, y, p0, weights, match):
        with pytest.raises(CalculationError, match=match):
            fit_least_squares(line, line_jacobian, x, y, p0, weights=weights)

    def test_names_must_pair_up_with_start_values(self):
        with pytest.raises(CalculationError, match="parameter names"):
            fit_least_squares(line, line_jacobian, [1, 2, 3], [1, 2, 3], [0, 0], param_names=["a"])

    def test_unknown_solver_method(self):
        with pytest.raises(CalculationError, match="'lm' or 'trf'"):
            fit_least_squares(line, line_jacobian, [1, 2, 3], [1, 2, 3], [0, 0], method="simplex")

    def test_model_not_finite_at_the_start(self):
        with pytest.raises(CalculationError, match="start values"):
            fit_least_squares(
                mgh09, mgh09_jacobian, [0.0, 1, 2, 3, 4], [0, 1, 2, 3, 4], [1, 1, 1, 0]
            )

    def test_parameters_the_data_cannot_separate(self):
        def two_slopes(x, p):
            return (p[0] + p[1]) * x

        def two_slopes_jacobian(x, p):
            return np.column_stack([x, x])

        with pytest.raises(CalculationError, match="cannot separate"):
            fit_least_squares(two_slopes, two_slopes_jacobian, [1, 2, 3], [1, 2, 3], [0.1, 0.2])

    def test_model_of_the_wrong_shape(self):
        with pytest.raises(CalculationError, match="shape"):
            fit_least_squares(lambda x, p: p, line_jacobian, [1, 2, 3], [1, 2, 3], [0, 0])
