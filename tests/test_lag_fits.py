"""The hysteretic lag fit on its own: exact curves give back their parameters, odd wells no error.

The curves are the hysteretic progress curve A = A0 + v·(t − τ·(1 − e^(−t/τ))) (Frieden 1970,
J. Biol. Chem. 245:5788, from memory), simulated without noise, so the fit must return v and τ to
round-off; the read schedule is the demo's (every 30 s for 10 min).
"""

from __future__ import annotations

import numpy as np
import pytest

from pipeline.science.lag_fits import fit_lags

TIME_MIN = np.arange(0, 601, 30) / 60.0


@pytest.mark.parametrize(("v", "tau"), [(0.05, 0.5), (0.02, 1.0), (0.2, 2.0), (0.01, 3.0)])
def test_an_exact_hysteretic_curve_gives_back_its_rate_and_time_constant(v: float, tau: float) -> None:
    y = v * (TIME_MIN - tau * (1 - np.exp(-TIME_MIN / tau)))
    fit = fit_lags(TIME_MIN, y[None, :], np.array([TIME_MIN.size]))
    np.testing.assert_allclose(fit.rate_au_per_min[0], v, rtol=1e-6)
    np.testing.assert_allclose(fit.tau_min[0], tau, rtol=1e-5)
    assert bool(fit.reached[0]) == (3 * tau <= TIME_MIN[-1])
    # The steady-state line A0 + v·(t − τ) crosses the first read's level at the lag time τ.
    np.testing.assert_allclose(fit.intercept_au[0], -v * tau, rtol=1e-5)


def test_the_window_ends_where_it_is_told_to() -> None:
    y = 0.05 * (TIME_MIN - 1.0 * (1 - np.exp(-TIME_MIN)))
    noisy_tail = y.copy()
    noisy_tail[15:] = 4.0  # reads beyond the window (saturated, say) are not used
    fit = fit_lags(TIME_MIN, noisy_tail[None, :], np.array([15]))
    np.testing.assert_allclose(fit.rate_au_per_min[0], 0.05, rtol=1e-6)
    assert fit.n[0] == 15 and fit.dof[0] == 11 and fit.window_min[0] == TIME_MIN[14]


def test_flat_and_straight_wells_give_no_error() -> None:
    rows = np.stack([np.zeros_like(TIME_MIN), 0.03 * TIME_MIN, np.full_like(TIME_MIN, 0.5)])
    fit = fit_lags(TIME_MIN, rows, np.full(3, TIME_MIN.size))
    assert fit.rate_au_per_min.shape == (3,)
    # A straight line is a lag of no length: its rate is the line's slope.
    np.testing.assert_allclose(fit.rate_au_per_min[1], 0.03, rtol=1e-3)
