"""Enzyme units and the Beer–Lambert conversion of absorbance slopes to activity."""

from __future__ import annotations

import numpy as np
import pytest
from hypothesis import given
from hypothesis import strategies as st

from pipeline.errors import CalculationError
from pipeline.science.units import (
    NKAT_PER_U,
    activity_u_per_ml,
    nkat_to_u,
    rate_mm_per_min,
    u_to_nkat,
)

# NADH ε340 = 6.22 mM⁻¹·cm⁻¹ (Horecker & Kornberg, J. Biol. Chem. 1948).
NADH_EPSILON_340 = 6.22


def test_one_unit_is_16_67_nanokatal() -> None:
    # 1 U = 1 µmol/min = 1/60 µkat = 16.67 nkat (IUBMB/IUPAC recommendation, 1978).
    assert NKAT_PER_U == pytest.approx(16.6667, rel=1e-5)
    assert u_to_nkat(1.0) == pytest.approx(16.67, abs=0.005)
    assert u_to_nkat(60.0) == pytest.approx(1000.0)
    assert nkat_to_u(1000.0) == pytest.approx(60.0)
    np.testing.assert_allclose(nkat_to_u(u_to_nkat(np.array([0.5, 2.0]))), [0.5, 2.0])


def test_nadh_rate_in_mm_per_min() -> None:
    # ΔA340/min 0.0622 / (6.22 mM⁻¹cm⁻¹ · 1 cm) = 0.01 mM/min = 0.01 µmol·mL⁻¹·min⁻¹,
    # i.e. 0.01 U per mL of reaction mixture.
    assert rate_mm_per_min(0.0622, NADH_EPSILON_340, 1.0) == pytest.approx(0.01)


def test_nadh_activity_of_the_sample() -> None:
    # 0.01 U/mL of reaction (above) · V_rxn / V_sample = 0.01 · 0.2 mL / 0.02 mL = 0.1 U/mL of
    # the diluted sample; · DF 10 = 1.0 U/mL of the undiluted lot.
    activity = activity_u_per_ml(0.0622, NADH_EPSILON_340, 1.0, 0.2, 0.02, 10.0)
    assert activity == pytest.approx(1.0)
    assert isinstance(activity, float)


def test_microplate_path_length_is_a_parameter() -> None:
    # Same well read with a 0.55 cm light path (200 µL in a 96-well plate, common practice):
    # 0.0622 / (6.22 · 0.55) · 10 · 10 = 1.818 U/mL.
    assert activity_u_per_ml(0.0622, NADH_EPSILON_340, 0.55, 0.2, 0.02, 10.0) == pytest.approx(
        1.0 / 0.55
    )


def test_arrays_and_flagged_wells() -> None:
    rates = np.array([0.0622, 0.1244, np.nan])
    activity = activity_u_per_ml(rates, NADH_EPSILON_340, 1.0, 0.2, 0.02, 10.0)
    assert isinstance(activity, np.ndarray)
    np.testing.assert_allclose(activity[:2], [1.0, 2.0])
    assert np.isnan(activity[2])
    per_well_df = activity_u_per_ml(rates[:2], NADH_EPSILON_340, 1.0, 0.2, 0.02, [10.0, 5.0])
    np.testing.assert_allclose(per_well_df, [1.0, 1.0])


_positive = st.floats(min_value=1e-3, max_value=1e3, allow_nan=False)


@given(rate=st.floats(-5.0, 5.0), k=_positive, eps=_positive, path=_positive, df=_positive)
def test_scaling_absorbance_scales_activity(
    rate: float, k: float, eps: float, path: float, df: float
) -> None:
    base = activity_u_per_ml(rate, eps, path, 0.2, 0.02, df)
    scaled = activity_u_per_ml(k * rate, eps, path, 0.2, 0.02, df)
    assert scaled == pytest.approx(k * base, rel=1e-12, abs=1e-300)


@given(rate=st.floats(-5.0, 5.0), df=_positive, factor=_positive)
def test_dilution_factor_multiplies_through(rate: float, df: float, factor: float) -> None:
    base = activity_u_per_ml(rate, 18.0, 0.6, 0.25, 0.05, df)
    more = activity_u_per_ml(rate, 18.0, 0.6, 0.25, 0.05, df * factor)
    assert more == pytest.approx(base * factor, rel=1e-12, abs=1e-300)


@given(rate=st.floats(-5.0, 5.0), v_rxn=_positive, v_sample=_positive)
def test_volume_ratio(rate: float, v_rxn: float, v_sample: float) -> None:
    expected = rate_mm_per_min(rate, 8.8, 1.0) * v_rxn / v_sample
    assert activity_u_per_ml(rate, 8.8, 1.0, v_rxn, v_sample, 1.0) == pytest.approx(
        expected, rel=1e-12, abs=1e-300
    )


@pytest.mark.parametrize(
    ("args", "match"),
    [
        (
            (0.1, 0.0, 1.0, 0.2, 0.02, 1.0),
            r"extinction coefficient ε must be a positive, finite number \(per mM per cm\); received 0.0",
        ),
        ((0.1, 6.22, -0.5, 0.2, 0.02, 1.0), r"path length .*received -0.5"),
        ((0.1, 6.22, 1.0, float("nan"), 0.02, 1.0), "reaction volume .*received nan"),
        ((0.1, 6.22, 1.0, 0.2, float("inf"), 1.0), "sample volume .*received inf"),
        ((0.1, 6.22, 1.0, 0.2, 0.02, 0.0), "dilution factor .*received 0.0"),
        ((0.1, 6.22, 1.0, 0.2, 0.02, [10.0, -1.0]), "dilution factor .*received -1.0"),
        ((0.1, "six", 1.0, 0.2, 0.02, 1.0), "extinction coefficient ε must be a positive number"),
    ],
)
def test_invalid_method_parameters(args: tuple, match: str) -> None:
    with pytest.raises(CalculationError, match=match):
        activity_u_per_ml(*args)
