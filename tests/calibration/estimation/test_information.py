"""Analytic observed information (Louis 1982) against an independent numerical route.

The numerical route is the finite-difference Jacobian of the marginal score, the score itself
from Fisher's identity (the E-step's expected complete-data score) — how equitheta computed
item SEs before the analytic form, kept here as the check. Agreement required: SEs to 1e-4
relative (the speed issue's rule), over 2PL, graded, 1PL, several groups with free latent
means and SDs, group-specific slots, missing answers, a slope prior and the held-item fits of
the DIF tests.
"""

from __future__ import annotations

from collections.abc import Callable

import numpy as np
import pytest
from scipy import optimize, stats

from calibration.estimation import (
    EMSettings,
    HeldLikelihood,
    LatentSpec,
    SlopePrior,
    calibrate_groups,
    fit_item_given_offsets,
)
from calibration.estimation.estep import expected_counts, prepare_groups
from calibration.estimation.information import pair_sums
from calibration.estimation.latent import latent_score
from calibration.estimation.layout import params_from_table, slot_table
from calibration.estimation.mstep import item_gradient
from calibration.irt.likelihood import build_design, log_likelihood_grid, normal_log_weights
from calibration.irt.models import ItemParameters, category_probabilities
from tests.helpers import simulate_responses


def numerical_information(vec: np.ndarray, score: Callable[[np.ndarray], np.ndarray]) -> np.ndarray:
    """Minus the symmetrised central-difference Jacobian of ``score`` at ``vec``."""
    n = vec.size
    jac = np.empty((n, n))
    for p in range(n):
        h = 1e-4 * max(1.0, abs(vec[p]))
        up, down = vec.copy(), vec.copy()
        up[p] += h
        down[p] -= h
        jac[:, p] = (score(up) - score(down)) / (2 * h)
    return -0.5 * (jac + jac.T)


def fisher_score(fit, responses, group_index, prior):  # noqa: ANN001, ANN201 - test helper
    """The fit's parameter vector and its marginal score by Fisher's identity."""
    points = fit.settings.quadrature.points
    layout, latent, template = fit.layout, fit.latent, fit.template
    n_groups = fit.tables.shape[0]
    groups = prepare_groups(responses, template.n_categories, group_index, n_groups)
    n_free, free_mean, free_sd = layout.n_free, latent.free_mean, latent.free_sd

    def unpack(vec: np.ndarray) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
        tables = layout.from_vector(vec[:n_free], fit.tables)
        mean, sd = fit.latent_mean.copy(), fit.latent_sd.copy()
        n_mean = int(free_mean.sum())
        mean[free_mean] = vec[n_free : n_free + n_mean]
        sd[free_sd] = vec[n_free + n_mean :]
        return tables, mean, sd

    def score(vec: np.ndarray) -> np.ndarray:
        tables, mean, sd = unpack(vec)
        results = [
            expected_counts(
                params_from_table(tables[g], template),
                d.design,
                points,
                normal_log_weights(points, mean[g], sd[g]),
                d.weights,
            )
            for g, d in enumerate(groups)
        ]
        counts = np.stack([r.counts for r in results])
        moments = np.array([latent_score(r.point_mass, points, mean[g], sd[g]) for g, r in enumerate(results)])
        item_part = item_gradient(tables, template, counts, points, layout, prior=prior)
        return np.concatenate([item_part, moments[:, 0][free_mean], moments[:, 1][free_sd]])

    vec = np.concatenate([layout.to_vector(fit.tables), fit.latent_mean[free_mean], fit.latent_sd[free_sd]])
    return vec, score


def simulated(seed: int, n: int, n_items: int, n_categories: int, n_groups: int, missing: float):  # noqa: ANN201
    rng = np.random.default_rng(seed)
    a = rng.uniform(0.7, 2.0, n_items)
    b = np.sort(rng.normal(0.0, 1.0, (n_items, n_categories - 1)), axis=1)
    group_index = rng.integers(0, n_groups, n)
    x = simulate_responses(a, b, rng.normal(size=n) + 0.3 * group_index, rng).astype(float)
    x[rng.random(x.shape) < missing] = np.nan
    return x, group_index


CASES = {
    # name: (seed, N, items, categories, groups, share missing, slope prior, models, focal-own item)
    "2PL": (1, 800, 6, 2, 1, 0.0, None, (), None),
    "2PL, missing answers, slope prior": (2, 800, 6, 2, 1, 0.1, SlopePrior(0.0, 1.0), (), None),
    "graded, 4 categories": (3, 700, 5, 4, 1, 0.0, None, (), None),
    "graded, 2 groups, one item free in the focal group, missing": (4, 900, 5, 3, 2, 0.05, None, (), 0),
    "1PL, 3 groups": (5, 900, 5, 2, 3, 0.0, None, ("1pl",) * 5, None),
}


@pytest.mark.parametrize("case", list(CASES))
def test_analytic_standard_errors_equal_numerical_hessian(case: str) -> None:
    seed, n, n_items, n_categories, n_groups, missing, prior, models, own = CASES[case]
    x, group_index = simulated(seed, n, n_items, n_categories, n_groups, missing)
    k = np.full(n_items, n_categories)
    group_free = None
    if own is not None:
        group_free = np.zeros((n_groups, n_items, n_categories), dtype=bool)
        group_free[1:, own, :] = True
    fit = calibrate_groups(
        x, k, group_index, n_groups, models=models, settings=EMSettings(slope_prior=prior), group_free=group_free
    )
    assert fit.covariance is not None
    vec, score = fisher_score(fit, x, group_index, prior)
    numerical_se = np.sqrt(np.diag(np.linalg.inv(numerical_information(vec, score))))
    np.testing.assert_allclose(np.sqrt(np.diag(fit.covariance)), numerical_se, rtol=1e-4)
    # The whole matrix, not only its diagonal.
    np.testing.assert_allclose(fit.covariance, np.linalg.inv(numerical_information(vec, score)), rtol=1e-4, atol=1e-9)


@pytest.mark.parametrize("n_categories", [2, 4])
def test_held_item_information_equals_numerical_hessian(n_categories: int) -> None:
    # The DIF tests' one-item fits (every other item held) with a free focal item and latent density.
    x, group_index = simulated(11 + n_categories, 1200, 6, n_categories, 2, 0.05)
    k = np.full(6, n_categories)
    settings = EMSettings(standard_errors=False)
    base = calibrate_groups(x, k, group_index, 2, settings=settings)
    points = settings.quadrature.points
    j = 2
    held = []
    for g in range(2):
        rows = x[group_index == g]
        params = base.group_params(g)
        full = log_likelihood_grid(params, points, build_design(rows, k))
        one = params.subset([j])
        own = log_likelihood_grid(one, points, build_design(rows[:, j : j + 1], one.n_categories))
        held.append(HeldLikelihood.from_offset(full - own, rows[:, j], n_categories))
    template = ItemParameters(
        slopes=base.tables[0, j : j + 1, 0],
        intercepts=base.tables[0, j : j + 1, 1:],
        n_categories=k[j : j + 1],
    )
    start = np.stack([slot_table(template), slot_table(template)])
    focal_only = np.array([False, True])
    latent = LatentSpec(
        np.array([0.0, base.latent_mean[1]]), np.array([1.0, base.latent_sd[1]]), focal_only, focal_only
    )
    group_free = np.ones((2, 1, n_categories), dtype=bool)
    group_free[0] = False
    fit = fit_item_given_offsets(held, template, start, latent, group_free, settings)
    covariance = fit.covariance()
    assert covariance is not None
    numerical = np.linalg.inv(numerical_information(fit.vector, fit.score))
    np.testing.assert_allclose(np.sqrt(np.diag(covariance)), np.sqrt(np.diag(numerical)), rtol=1e-4)

    # The Newton maximum against scipy.optimize on the same likelihood written out here:
    # sum over rows of log sum_q E_iq P_k(theta_q) w(theta_q), the held items' part E_iq fixed.
    def log_likelihood(vec: np.ndarray) -> float:
        total = 0.0
        for h, group_rows in enumerate(held):
            tables = fit.group_params(h, vec)
            mean, sd = (0.0, 1.0) if h == 0 else (vec[-2], vec[-1])
            if sd <= 0 or not np.all(np.diff(tables.intercepts[0]) < 0):
                return -np.inf
            w = stats.norm.pdf(points, mean, sd)
            w /= w.sum()
            prob = category_probabilities(tables, points)[0]
            for k, e in enumerate(group_rows.by_category):
                total += np.log(e @ (prob[k] * w)).sum()
            total += np.log(group_rows.missing @ w).sum() + group_rows.constant
        return total

    best = optimize.minimize(
        lambda v: -log_likelihood(v),
        fit.vector + 0.05,
        method="Nelder-Mead",
        options={"xatol": 1e-9, "fatol": 1e-10, "maxiter": 20_000, "maxfev": 40_000},
    )
    assert fit.log_likelihood == pytest.approx(log_likelihood(fit.vector), abs=1e-8)
    assert fit.log_likelihood >= -best.fun - 1e-7
    np.testing.assert_allclose(fit.vector, best.x, atol=2e-4)


def test_pair_sums_equal_the_dense_gram_tables() -> None:
    # The sparse pair sums of the Gram pass against the dense route they replace: for every pair of 0/1
    # columns, sum_i w_iq z_ia z_ib by einsum over the whole matrix. Rows with no 1 and all-zero columns
    # included. Both sum the same products in another order: 1e-12.
    rng = np.random.default_rng(8)
    z = (rng.random((300, 9)) < 0.35).astype(np.float64)
    z[:20] = 0.0
    z[:, 4] = 0.0
    weights = rng.random((300, 7))
    dense = np.einsum("ia,ib,iq->abq", z, z, weights)
    sums = pair_sums(z, weights)
    upper = np.triu_indices(9)
    np.testing.assert_allclose(sums[:9, :9][upper], dense[upper], rtol=1e-12, atol=1e-12)
    assert sums.shape == (10, 10, 7)
    np.testing.assert_array_equal(pair_sums(np.zeros((5, 3)), weights[:5]), np.zeros((4, 4, 7)))
