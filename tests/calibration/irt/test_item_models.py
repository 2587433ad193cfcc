"""3PL and (generalized) partial credit items against their formulas written out, finite differences,
adaptive quadrature (scipy) and brute-force enumeration."""

from __future__ import annotations

import itertools
import math

import numpy as np
import pytest
from scipy import integrate

from calibration.estimation.layout import params_from_table, slot_table
from calibration.irt.likelihood import QuadratureGrid, marginal_log_likelihood
from calibration.irt.models import (
    ItemParameters,
    category_parameter_derivatives,
    category_probabilities,
    category_theta_derivatives,
    item_information,
    log_category_probabilities,
)
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
