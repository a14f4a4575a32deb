"""Profile-likelihood Km intervals (Bates & Watts 1988, 6.1): exactness of the ends, simulated coverage."""

from __future__ import annotations

import math

import numpy as np
import pytest
from scipy import stats

from pipeline.science.km_profile import km_profile_interval, profile_rss
from pipeline.science.michaelis_menten import fit_michaelis_menten, fit_michaelis_menten_batch


def test_the_ends_sit_on_the_f_threshold_and_bracket_the_estimate() -> None:
    # Treated puromycin (Treloar 1974, in Bates & Watts 1988, App. A1.3): Km 0.06412 mM on 10 dof.
    s = np.array([0.02, 0.02, 0.06, 0.06, 0.11, 0.11, 0.22, 0.22, 0.56, 0.56, 1.10, 1.10])
    v = np.array([76, 47, 97, 107, 123, 139, 159, 152, 191, 201, 207, 200], dtype=float)
    fit = fit_michaelis_menten(s, v)
    assert fit.km == pytest.approx(0.06412, rel=1e-3)
    low, high = km_profile_interval(s, v, fit.km)
    assert low < fit.km < high
    threshold = profile_rss(fit.km, s, v, np.ones_like(v)) * (1 + stats.f.ppf(0.95, 1, 10) / 10)
    for end in (low, high):
        assert profile_rss(end, s, v, np.ones_like(v)) == pytest.approx(threshold, rel=1e-8)
    # Close to the Wald interval here (Km is well determined), a little longer above than below.
    wald_low, wald_high = fit.km_ci95
    assert abs(low - wald_low) / fit.km < 0.1 and abs(high - wald_high) / fit.km < 0.1
    assert high - fit.km > fit.km - low


@pytest.mark.slow
def test_profile_interval_covers_where_km_is_above_the_tested_range() -> None:
    # Simulated (invented): Km 1 mM, substrate only up to 0.6 mM, constant noise SD 0.08, Vmax 10.
    s = np.repeat([0.05, 0.1, 0.2, 0.3, 0.4, 0.6], 2)
    rng = np.random.default_rng(1)
    rates = 10 * s / (1.0 + s) + rng.normal(0, 0.08, (2000, s.size))
    fit = fit_michaelis_menten_batch(s, rates)
    ends = [km_profile_interval(s, rates[i], fit.km[i]) for i in range(2000)]
    coverage = np.mean([low <= 1.0 <= high for low, high in ends])
    assert 0.93 <= coverage <= 0.97  # measured 94.5 % (the Wald interval: 94.1 %)
    assert np.mean([math.isinf(high) or high - k > k - low for (low, high), k in zip(ends, fit.km, strict=True)]) > 0.9
