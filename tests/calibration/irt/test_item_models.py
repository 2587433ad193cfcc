"""3PL and (generalized) partial credit items against their formulas written out, finite differences,
adaptive quadrature (scipy) and brute-force enumeration."""

from __future__ import annotations

import itertools
import math

import numpy as np
import pytest
from scipy import integrate, optimize, special

from calibration.estimation.layout import params_from_table, slot_table
from calibration.irt.likelihood import QuadratureGrid, marginal_log_likelihood
from calibration.irt.models import (
    ItemParameters,
    adjacent_moments,
    category_parameter_derivatives,
    category_probabilities,
    category_theta_derivatives,
    item_information,
    log_category_probabilities,
)
from calibration.irt.scoring import NormalPrior, map_scores, ml_scores
from calibration.irt.summed_scores import summed_score_likelihoods

THETA = np.linspace(-3.0, 3.0, 13)


@pytest.fixture
def mixed() -> ItemParameters:
    # A 3PL item, a GPCM item with reversed steps, a PCM item, a graded item and a 2PL item in one test.
    return ItemParameters(
        slopes=np.array([1.4, 0.9, 1.0, 1.3, 0.7]),
        intercepts=np.array(
            [
                [-0.5, np.nan, np.nan],
                [0.8, -0.6, 0.4],  # GPCM steps need not be ordered
                [1.0, -0.2, np.nan],
                [1.5, 0.1, -1.2],
                [0.3, np.nan, np.nan],
            ]
        ),
        n_categories=np.array([2, 4, 3, 4, 2]),
        models=("3pl", "gpcm", "pcm", "grm", "2pl"),
        guessing=np.array([0.22, 0.0, 0.0, 0.0, 0.0]),
    )


def written_out(params: ItemParameters, theta: float) -> list[list[float]]:
    """Each item's category probabilities by the models' defining formulas, one theta at a time."""
    out = []
    for j, model in enumerate(params.models):
        a, k = params.slopes[j], int(params.n_categories[j])
        c = params.intercepts[j, : k - 1]
        if model == "3pl":
            g = params.guessing[j]
            right = g + (1 - g) / (1 + math.exp(-(a * theta + c[0])))
            out.append([1 - right, right])
        elif model in ("gpcm", "pcm"):  # Muraki (1992): exp(sum_{v<=k} (a theta + c_v)) normalised
            numerators = [math.exp(sum(a * theta + c[v] for v in range(m))) for m in range(k)]
            out.append([n / sum(numerators) for n in numerators])
        else:  # Samejima (1969) boundaries
            star = [1.0] + [1 / (1 + math.exp(-(a * theta + cm))) for cm in c] + [0.0]
            out.append([star[m] - star[m + 1] for m in range(k)])
    return out


def test_probabilities_and_logs_match_the_formulas(mixed: ItemParameters) -> None:
    prob = category_probabilities(mixed, THETA)
    log_prob = log_category_probabilities(mixed, THETA)
    for q, t in enumerate(THETA):
        for j, row in enumerate(written_out(mixed, float(t))):
            np.testing.assert_allclose(prob[j, : len(row), q], row, rtol=1e-12, atol=1e-15)
            np.testing.assert_allclose(log_prob[j, : len(row), q], np.log(row), rtol=1e-11)
            assert np.all(prob[j, len(row) :, q] == 0.0)


def test_slot_derivatives_match_finite_differences(mixed: ItemParameters) -> None:
    # First and second derivatives in every slot (slope, intercepts, a 3PL item's logit(g)) against
    # central differences of the probabilities.
    table = slot_table(mixed)
    prob, jac, hess = category_parameter_derivatives(mixed, THETA, second=True)
    assert hess is not None
    h = 1e-5
    for j in range(mixed.n_items):
        for s in range(int(mixed.n_slots[j])):
            up, down = table.copy(), table.copy()
            up[j, s] += h
            down[j, s] -= h
            p_up = category_probabilities(params_from_table(up, mixed), THETA)
            p_down = category_probabilities(params_from_table(down, mixed), THETA)
            np.testing.assert_allclose(jac[j, :, :, s], (p_up[j] - p_down[j]) / (2 * h), atol=1e-8)
            _, jac_up, _ = category_parameter_derivatives(params_from_table(up, mixed), THETA)
            _, jac_down, _ = category_parameter_derivatives(params_from_table(down, mixed), THETA)
            np.testing.assert_allclose(hess[j, :, :, :, s], (jac_up[j] - jac_down[j]) / (2 * h), atol=1e-7)
        assert np.all(jac[j, :, :, int(mixed.n_slots[j]) :] == 0.0)


def test_theta_derivatives_and_information(mixed: ItemParameters) -> None:
    prob, first, second = category_theta_derivatives(mixed, THETA)
    assert second is not None
    h = 1e-5
    np.testing.assert_allclose(
        first,
        (category_probabilities(mixed, THETA + h) - category_probabilities(mixed, THETA - h)) / (2 * h),
        atol=1e-8,
    )
    _, first_up, _ = category_theta_derivatives(mixed, THETA + h, second=False)
    _, first_down, _ = category_theta_derivatives(mixed, THETA - h, second=False)
    np.testing.assert_allclose(second, (first_up - first_down) / (2 * h), atol=1e-7)
    # Information = minus the expected second derivative of log P (finite differences of log P).
    step = 2e-4  # second differences: a wider step keeps rounding (eps / step^2) below 1e-8
    exists = prob > 0
    log_p = [np.where(exists, log_category_probabilities(mixed, THETA + d), 0.0) for d in (-step, 0.0, step)]
    d2 = (log_p[0] - 2 * log_p[1] + log_p[2]) / step**2
    expected = -np.sum(np.where(exists, prob * d2, 0.0), axis=1)
    np.testing.assert_allclose(item_information(mixed, THETA), expected, rtol=1e-4, atol=1e-7)
    # The 3PL item's information written out (Birnbaum 1968): a^2 (P - g)^2 (1 - P) / ((1 - g)^2 P).
    a, g = mixed.slopes[0], mixed.guessing[0]
    p = prob[0, 1]
    np.testing.assert_allclose(item_information(mixed, THETA)[0], a * a * (p - g) ** 2 * (1 - p) / ((1 - g) ** 2 * p))


def test_marginal_log_likelihood_against_adaptive_quadrature(mixed: ItemParameters) -> None:
    # Source: scipy.integrate.quad (adaptive Gauss-Kronrod) of prod_j P(x_j | theta) N(theta; 0.3, 1.2^2).
    patterns = np.array([[1, 3, 2, 3, 1], [0, 0, 0, 1, 0], [1, 1, 2, 0, np.nan], [0, 2, 1, 2, 1]])
    grid = QuadratureGrid(161, -8.0, 8.0)
    ours = marginal_log_likelihood(mixed, patterns, grid=grid, mean=0.3, sd=1.2)

    def density(t: float, row: np.ndarray) -> float:
        probs = written_out(mixed, t)
        value = math.exp(-0.5 * ((t - 0.3) / 1.2) ** 2) / (1.2 * math.sqrt(2 * math.pi))
        for j, x in enumerate(row):
            if not np.isnan(x):
                value *= probs[j][int(x)]
        return value

    reference = sum(math.log(integrate.quad(density, -12, 12, args=(row,), epsabs=1e-13)[0]) for row in patterns)
    assert ours == pytest.approx(reference, abs=1e-7)


def test_lord_wingersky_against_enumeration(mixed: ItemParameters) -> None:
    # Every response pattern enumerated: P(summed score = s | theta) is the sum of the patterns' products.
    dist = summed_score_likelihoods(mixed, THETA)
    prob = category_probabilities(mixed, THETA)
    brute = np.zeros_like(dist)
    for pattern in itertools.product(*(range(int(k)) for k in mixed.n_categories)):
        brute[sum(pattern)] += np.prod([prob[j, x] for j, x in enumerate(pattern)], axis=0)
    np.testing.assert_allclose(dist, brute, rtol=1e-12, atol=1e-16)


def test_two_category_gpcm_is_a_2pl_and_zero_asymptote_3pl_is_a_2pl() -> None:
    two = ItemParameters(np.array([1.3]), np.array([[0.4]]), np.array([2]), models=("2pl",))
    for model in ("gpcm", "3pl"):
        other = ItemParameters(np.array([1.3]), np.array([[0.4]]), np.array([2]), models=(model,))
        np.testing.assert_allclose(category_probabilities(other, THETA), category_probabilities(two, THETA))
        np.testing.assert_allclose(item_information(other, THETA), item_information(two, THETA))


def test_invalid_parameters_are_refused() -> None:
    with pytest.raises(ValueError, match="only 3PL items"):
        ItemParameters(np.array([1.0]), np.array([[0.0]]), np.array([2]), models=("2pl",), guessing=np.array([0.2]))
    with pytest.raises(ValueError, match="two categories"):
        ItemParameters(np.array([1.0]), np.array([[0.0, -1.0]]), np.array([3]), models=("3pl",))
    with pytest.raises(ValueError, match=r"\[0, 1\)"):
        ItemParameters(np.array([1.0]), np.array([[0.0]]), np.array([2]), models=("3pl",), guessing=np.array([1.0]))


def _written_out_log_likelihood(params: ItemParameters, pattern: np.ndarray, theta: float) -> float:
    probs = written_out(params, theta)
    return sum(math.log(probs[j][int(x)]) for j, x in enumerate(pattern) if not np.isnan(x))


def test_map_and_ml_of_mixed_models_equal_scipy_on_the_written_out_likelihood(mixed: ItemParameters) -> None:
    # Independent route: scipy.optimize.minimize_scalar (bounded, xatol 1e-10) on the log likelihood (ML) or
    # log posterior (MAP, normal prior) written out from the models' formulas; SEs from the expected
    # information written out as sum_k P_k (d log P_k / d theta)^2 by central differences (1e-5).
    patterns = np.array(
        [[1, 3, 2, 3, 1], [0, 0, 0, 1, 0], [1, 1, 2, 0, np.nan], [0, 2, 1, 2, 1], [1, 0, 1, 3, 0], [0, 3, 2, 3, 1]]
    )
    prior = NormalPrior(0.3, 1.2)
    map_ = map_scores(mixed, patterns, prior=prior)
    ml = ml_scores(mixed, patterns, bound=4.0)
    for i, pattern in enumerate(patterns):
        posterior = optimize.minimize_scalar(
            lambda t, p=pattern: -_written_out_log_likelihood(mixed, p, t) + 0.5 * ((t - 0.3) / 1.2) ** 2,
            bounds=(-8.0, 8.0),
            method="bounded",
            options={"xatol": 1e-10},
        )
        assert map_.theta[i] == pytest.approx(posterior.x, abs=1e-7)
        likelihood = optimize.minimize_scalar(
            lambda t, p=pattern: -_written_out_log_likelihood(mixed, p, t),
            bounds=(-4.0, 4.0),
            method="bounded",
            options={"xatol": 1e-10},
        )
        if i == 0:  # every item in its top category: no ML estimate, the bound by the documented rule
            assert ml.theta[i] == 4.0 and ml.extreme[i]
        else:
            assert ml.theta[i] == pytest.approx(likelihood.x, abs=1e-7)
        for scores, extra in ((map_, 1 / 1.2**2), (ml, 0.0)):
            t, h = scores.theta[i], 1e-5
            info = 0.0
            for j, x in enumerate(pattern):
                if np.isnan(x):
                    continue
                up, mid, down = written_out(mixed, t + h)[j], written_out(mixed, t)[j], written_out(mixed, t - h)[j]
                info += sum(
                    m * ((math.log(u) - math.log(d)) / (2 * h)) ** 2 for u, m, d in zip(up, mid, down, strict=True)
                )
            assert scores.se[i] == pytest.approx((info + extra) ** -0.5, rel=1e-7)


def test_partial_credit_moments_far_out_equal_a_softmax() -> None:
    # Source: scipy.special.softmax of eta_k = k a theta + c_1 + ... + c_k (Muraki 1992). Slopes of 20 and
    # steps of 150 take |eta| past 600 within |theta| <= 60, where the moments come from a second route.
    steep = ItemParameters(
        slopes=np.array([20.0, 15.0, 1.0, 3.0]),
        intercepts=np.array([[1.0, 2.0, -1.0], [0.0, 5.0, 3.0], [-150.0, 100.0, 40.0], [0.5, np.nan, np.nan]]),
        n_categories=np.array([4, 4, 4, 2]),
        models=("gpcm",) * 4,
    )
    theta = np.linspace(-60.0, 60.0, 2001)
    mean, var = adjacent_moments(steep, theta)
    for j in range(steep.n_items):
        k = np.arange(steep.n_categories[j])
        offsets = np.concatenate([[0.0], np.cumsum(steep.intercepts[j, : k.size - 1])])
        prob = special.softmax(k[None, :] * steep.slopes[j] * theta[:, None] + offsets[None, :], axis=1)
        np.testing.assert_allclose(mean[:, j], prob @ k, atol=1e-12)
        np.testing.assert_allclose(var[:, j], prob @ (k * k) - (prob @ k) ** 2, atol=1e-12)
