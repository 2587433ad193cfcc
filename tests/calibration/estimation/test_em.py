"""Marginal ML calibration against LSAT-6, girth, direct integration and seeded recovery."""

from __future__ import annotations

import warnings

import girth
import numpy as np
import pytest
from scipy import integrate, stats

from calibration.estimation import (
    ConvergenceWarning,
    EMSettings,
    SlopePrior,
    calibrate_single_group,
    marginal_log_likelihood,
)
from calibration.irt.likelihood import QuadratureGrid
from calibration.irt.models import ItemParameters, log_category_probabilities
from tests.helpers import simulate_responses

TWO = np.full(5, 2)


def test_lsat6_two_pl_matches_published_estimates(lsat6: dict) -> None:
    # Source: tests/data/lsat6.json (2PL values as commonly reported for LSAT-6; from memory).
    # Tolerance 0.01 per the spine issue: the likelihood is flat in the slopes.
    fit = calibrate_single_group(lsat6["responses"], TWO)
    ref = lsat6["two_pl"]
    assert fit.converged
    np.testing.assert_allclose(fit.params.slopes, ref["slopes"], atol=0.01)
    np.testing.assert_allclose(fit.params.thresholds()[:, 0], ref["thresholds"], atol=0.01)
    np.testing.assert_allclose(fit.params.intercepts[:, 0], ref["intercepts"], atol=0.01)
    assert fit.log_likelihood == pytest.approx(ref["log_likelihood"], abs=0.05)
    assert fit.n_parameters == 10
    assert fit.aic == pytest.approx(-2 * fit.log_likelihood + 20)


def test_lsat6_common_slope_matches_published_estimates(lsat6: dict) -> None:
    # Source: Thissen (1982) values in tests/data/lsat6.json (from memory); tolerance 0.01.
    fit = calibrate_single_group(lsat6["responses"], TWO, models=("1pl",) * 5)
    ref = lsat6["common_slope"]
    np.testing.assert_allclose(fit.params.slopes, ref["slope"], atol=0.01)
    np.testing.assert_allclose(fit.params.thresholds()[:, 0], ref["thresholds"], atol=0.01)
    assert fit.log_likelihood == pytest.approx(ref["log_likelihood"], abs=0.05)
    assert fit.n_parameters == 6
    # One shared slope: one SE, repeated for every item.
    assert np.allclose(fit.slope_se, fit.slope_se[0])


def test_lsat6_log_likelihood_equals_adaptive_integration(lsat6: dict) -> None:
    # Independent route: scipy.integrate.quad of each pattern's marginal probability.
    fit = calibrate_single_group(lsat6["responses"], TWO, settings=EMSettings(standard_errors=False))
    params = fit.params
    total = 0.0
    for pattern, count in enumerate(lsat6["pattern_frequencies"]):
        if count == 0:
            continue
        bits = [(pattern >> (4 - i)) & 1 for i in range(5)]

        def density(t: float, bits: list[int] = bits) -> float:
            log_p = log_category_probabilities(params, np.array([t]))[:, :, 0]
            return float(np.exp(sum(log_p[j, b] for j, b in enumerate(bits))) * stats.norm.pdf(t))

        total += count * np.log(integrate.quad(density, -10, 10, epsabs=1e-13, epsrel=1e-11)[0])
    # 49 rectangular points on +-6 versus adaptive quadrature: agreement to 1e-3 in the total.
    assert fit.log_likelihood == pytest.approx(total, abs=1e-3)


def test_lsat6_standard_errors_match_numerical_hessian(lsat6: dict) -> None:
    # Independent route: second differences of the marginal log-likelihood itself (not of its
    # gradient, as the estimator does), inverted. 3% covers the finite-difference noise.
    x = lsat6["responses"]
    fit = calibrate_single_group(x, TWO)
    base = np.concatenate([fit.params.slopes, fit.params.intercepts[:, 0]])

    def loglik(vec: np.ndarray) -> float:
        p = ItemParameters(slopes=vec[:5], intercepts=vec[5:, None], n_categories=TWO)
        return marginal_log_likelihood(p, x)

    n, h = base.size, 1e-3
    hess = np.empty((n, n))
    for i in range(n):
        for j in range(i, n):
            e_i, e_j = np.eye(n)[i] * h, np.eye(n)[j] * h
            hess[i, j] = hess[j, i] = (
                loglik(base + e_i + e_j)
                - loglik(base + e_i - e_j)
                - loglik(base - e_i + e_j)
                + loglik(base - e_i - e_j)
            ) / (4 * h * h)
    se = np.sqrt(np.diag(np.linalg.inv(-hess)))
    np.testing.assert_allclose(fit.slope_se, se[:5], rtol=0.03)
    np.testing.assert_allclose(fit.intercept_se[:, 0], se[5:], rtol=0.03)


def test_two_pl_likelihood_at_least_girth() -> None:
    # Reference library: girth.twopl_mml (girth 0.8) on seeded simulated data; both parameter
    # sets judged by the same marginal likelihood on a fine grid. Ours must be at least as high.
    rng = np.random.default_rng(2024)
    a = rng.uniform(0.6, 2.0, 12)
    b = rng.normal(0, 1, 12)
    x = simulate_responses(a, b[:, None], rng.normal(size=1500), rng)
    ours = calibrate_single_group(x, np.full(12, 2), settings=EMSettings(standard_errors=False))
    ref = girth.twopl_mml(x.T.astype(int))
    theirs = ItemParameters.from_thresholds(ref["Discrimination"], ref["Difficulty"])
    grid = QuadratureGrid(121, -8, 8)
    ll_ours = marginal_log_likelihood(ours.params, x, grid=grid)
    ll_theirs = marginal_log_likelihood(theirs, x, grid=grid)
    assert ll_ours >= ll_theirs - 1e-6
    # Parameters close: girth's own quadrature (41 points on +-4.5) shifts them a little.
    np.testing.assert_allclose(ours.params.slopes, theirs.slopes, atol=0.05)
    np.testing.assert_allclose(ours.params.thresholds()[:, 0], theirs.thresholds()[:, 0], atol=0.05)


def test_graded_likelihood_at_least_girth() -> None:
    # Reference library: girth.grm_mml (girth 0.8), codes shifted to 1..K as girth expects.
    rng = np.random.default_rng(7)
    a = rng.uniform(0.8, 2.0, 8)
    b = np.sort(rng.normal(0, 1, (8, 3)), axis=1)
    x = simulate_responses(a, b, rng.normal(size=1500), rng)
    ours = calibrate_single_group(x, np.full(8, 4), settings=EMSettings(standard_errors=False))
    ref = girth.grm_mml((x.T + 1).astype(int))
    theirs = ItemParameters.from_thresholds(ref["Discrimination"], ref["Difficulty"])
    grid = QuadratureGrid(121, -8, 8)
    ll_ours = marginal_log_likelihood(ours.params, x, grid=grid)
    ll_theirs = marginal_log_likelihood(theirs, x, grid=grid)
    assert ll_ours >= ll_theirs - 1e-6
    np.testing.assert_allclose(ours.params.slopes, theirs.slopes, atol=0.08)
    np.testing.assert_allclose(ours.params.thresholds(), theirs.thresholds(), atol=0.08)


def test_recovery_mixed_test_with_missing_answers() -> None:
    # Seeded simulation (invented parameters): 2PL and graded items, 25% not administered.
    rng = np.random.default_rng(99)
    n_items = 16
    a = rng.uniform(0.7, 2.0, n_items)
    b = np.full((n_items, 3), np.nan)
    b[:8, 0] = rng.normal(0, 1, 8)
    b[8:, :] = np.sort(rng.normal(0, 1, (8, 3)), axis=1)
    x = simulate_responses(a, b, rng.normal(size=4000), rng)
    x[rng.random(x.shape) < 0.25] = np.nan
    k = np.where(np.arange(n_items) < 8, 2, 4)
    fit = calibrate_single_group(x, k)
    assert fit.converged
    # Recovery tolerances: about 3-4 SEs at this N (common practice for recovery checks).
    assert np.sqrt(np.mean((fit.params.slopes - a) ** 2)) < 0.12
    err = fit.params.thresholds() - b
    assert np.sqrt(np.nanmean(err**2)) < 0.12
    # Reported SEs are of the size of the actual errors (ratio of RMS error to RMS SE near 1).
    ratio = np.sqrt(np.mean((fit.params.slopes - a) ** 2)) / np.sqrt(np.mean(fit.slope_se**2))
    assert 0.5 < ratio < 1.8


def test_fixed_parameters_are_held() -> None:
    rng = np.random.default_rng(3)
    a, b = rng.uniform(0.8, 1.6, 6), rng.normal(0, 1, 6)
    x = simulate_responses(a, b[:, None], rng.normal(size=800), rng)
    start = ItemParameters.from_thresholds(a, b)
    fixed = np.zeros((6, 2), dtype=bool)
    fixed[0, :] = True
    fit = calibrate_single_group(x, np.full(6, 2), start=start, fixed=fixed)
    assert fit.params.slopes[0] == start.slopes[0]
    assert fit.params.intercepts[0, 0] == start.intercepts[0, 0]
    assert np.isnan(fit.slope_se[0]) and np.isfinite(fit.slope_se[1])
    assert fit.n_parameters == 10


def test_slope_prior_pulls_slopes_toward_its_centre() -> None:
    rng = np.random.default_rng(8)
    a, b = np.full(6, 2.5), rng.normal(0, 1, 6)
    x = simulate_responses(a, b[:, None], rng.normal(size=300), rng)
    plain = calibrate_single_group(x, np.full(6, 2), settings=EMSettings(standard_errors=False))
    shrunk = calibrate_single_group(
        x, np.full(6, 2), settings=EMSettings(standard_errors=False, slope_prior=SlopePrior(0.0, 0.5))
    )
    assert np.all(shrunk.params.slopes < plain.params.slopes)


def test_non_convergence_warns() -> None:
    rng = np.random.default_rng(4)
    x = simulate_responses(np.ones(5), np.zeros((5, 1)), rng.normal(size=200), rng)
    with pytest.warns(ConvergenceWarning, match="did not converge"):
        fit = calibrate_single_group(x, TWO, settings=EMSettings(max_iter=2, standard_errors=False))
    assert not fit.converged


def test_starting_values_are_deterministic(lsat6: dict) -> None:
    with warnings.catch_warnings():
        warnings.simplefilter("error")
        one = calibrate_single_group(lsat6["responses"], TWO)
        two = calibrate_single_group(lsat6["responses"], TWO)
    np.testing.assert_array_equal(one.params.slopes, two.params.slopes)


@pytest.mark.slow
def test_large_recovery_study() -> None:
    # Seeded simulation, large: the benchmark's recovery design; SD/SE near 1 means honest SEs.
    from benchmarks.bench_recovery import run

    r = run(replications=10, n=5000)
    assert abs(r["slope_bias"]) < 0.02 and abs(r["threshold_bias"]) < 0.02
    assert 0.8 < r["slope_sd_over_se"] < 1.25


@pytest.mark.filterwarnings("ignore:Mean of empty slice", "ignore:invalid value encountered")  # the unanswered item
def test_starting_values_from_one_covariance_equal_the_per_item_loop() -> None:
    # Two routes in the library: a table with no missing answer takes every item-rest correlation from
    # one covariance matrix, any other table a loop over items. An extra item nobody answered changes
    # no rest score, so appending one sends the same answers down the loop: both must agree.
    from calibration.estimation.start import starting_values

    rng = np.random.default_rng(31)
    a = rng.uniform(0.6, 2.0, 10)
    b = np.full((10, 3), np.nan)
    b[:6, 0] = rng.normal(0, 1, 6)
    b[6:] = np.sort(rng.normal(0, 1, (4, 3)), axis=1)
    x = simulate_responses(a, b, rng.normal(size=3000), rng).astype(float)
    k = np.array([2] * 6 + [4] * 4)
    fast = starting_values(x, k, ())
    padded = starting_values(np.column_stack([x, np.full(3000, np.nan)]), np.r_[k, 2], ())
    np.testing.assert_allclose(fast.slopes, padded.slopes[:10], rtol=1e-12)
    np.testing.assert_allclose(fast.intercepts, padded.intercepts[:10, :3], rtol=1e-12)


def test_a_category_nobody_chose_is_named_when_the_estimates_run_off() -> None:
    # Library callers get no reader's category check: a graded item whose middle category is empty makes its
    # two thresholds meet and the EM stop; the error names the item and the empty category instead of
    # only saying the parameters became invalid (the count is checked by np.bincount on the same table).
    rng = np.random.default_rng(2)
    b = np.sort(rng.normal(0, 1, (5, 2)), axis=1)
    x = simulate_responses(np.array([1.2, 1.0, 1.5, 0.9, 1.1]), b, rng.normal(size=2000), rng)
    x[x[:, 3] == 1, 3] = 2
    assert np.bincount(x[:, 3].astype(int), minlength=3)[1] == 0
    with warnings.catch_warnings(), pytest.raises(ValueError, match=r"no responses \(item 3: category 1\)"):
        warnings.simplefilter("ignore", RuntimeWarning)
        calibrate_single_group(x, np.full(5, 3))
