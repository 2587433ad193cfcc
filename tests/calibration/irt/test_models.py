"""Model math against a computed check value, finite differences and the negative Hessian."""

from __future__ import annotations

import numpy as np
import pytest

from calibration.irt.models import (
    ItemParameters,
    category_probabilities,
    category_probability_derivatives,
    item_information,
    log_category_probabilities,
)
from tests.helpers import load_reference


@pytest.fixture
def mixed_items() -> ItemParameters:
    # Two 2PL items, a 3-category and a 5-category graded item (a test may mix them).
    return ItemParameters.from_thresholds(
        [1.2, 0.6, 1.5, 2.1],
        [
            [0.3, np.nan, np.nan, np.nan],
            [-1.0, np.nan, np.nan, np.nan],
            [-0.5, 0.8, np.nan, np.nan],
            [-1.5, -0.2, 0.4, 1.9],
        ],
    )


def test_graded_check_value() -> None:
    # Source: REFERENCES.md [computed] GRM check value; printed to 6 decimals, so 1e-6.
    ref = load_reference("grm_check.json")
    params = ItemParameters.from_thresholds([ref["slope"]], [ref["thresholds"]])
    theta = np.array([ref["theta"]])
    np.testing.assert_allclose(category_probabilities(params, theta)[0, :, 0], ref["category_probabilities"], atol=1e-6)
    np.testing.assert_allclose(item_information(params, theta)[0, 0], ref["item_information"], atol=1e-6)


def test_probabilities_sum_to_one_and_logs_agree(mixed_items: ItemParameters) -> None:
    theta = np.linspace(-5, 5, 41)
    prob = category_probabilities(mixed_items, theta)
    np.testing.assert_allclose(prob.sum(axis=1), 1.0, atol=1e-12)
    log_p = log_category_probabilities(mixed_items, theta)
    exists = np.isfinite(log_p)
    # The direct difference loses digits to cancellation in the tails (absolute error ~1e-16),
    # the log form does not; compare with an absolute floor.
    np.testing.assert_allclose(np.exp(log_p[exists]), prob[exists], rtol=1e-10, atol=1e-13)
    # Categories an item lacks are -inf in log space and 0 in probability space.
    assert np.all(prob[~exists] == 0.0)


def test_log_probabilities_stay_finite_in_far_tails() -> None:
    # Direct evaluation of sigma(u) - sigma(v) underflows to 0 here; the log form must not.
    params = ItemParameters.from_thresholds([3.0], [[-2.0, 2.0]])
    log_p = log_category_probabilities(params, np.array([-60.0, 60.0]))
    assert np.all(np.isfinite(log_p))
    # By hand at theta = 60: P(X=0) = 1 - sigma(3 * (60 + 2)) = 1 / (1 + exp(186)),
    # so log P(X=0) = -186 - log(1 + exp(-186)) = -186 to double precision.
    assert log_p[0, 0, 1] == pytest.approx(-186.0, abs=1e-9)


def test_theta_derivative_against_finite_differences(mixed_items: ItemParameters) -> None:
    theta = np.linspace(-3, 3, 13)
    h = 1e-6
    numeric = (category_probabilities(mixed_items, theta + h) - category_probabilities(mixed_items, theta - h)) / (
        2 * h
    )
    # Central differences are accurate to O(h^2) ~ 1e-12 plus rounding ~ 1e-10.
    np.testing.assert_allclose(category_probability_derivatives(mixed_items, theta), numeric, atol=1e-8)


def test_information_equals_expected_negative_hessian(mixed_items: ItemParameters) -> None:
    # I(theta) = -E[d^2/dtheta^2 log P(X|theta)]: second differences of log P, weighted by P.
    theta = np.linspace(-3, 3, 7)
    h = 1e-4
    log_p = log_category_probabilities(mixed_items, theta)
    with np.errstate(invalid="ignore"):  # -inf - (-inf) for categories an item lacks
        second = (
            log_category_probabilities(mixed_items, theta + h)
            - 2 * log_p
            + log_category_probabilities(mixed_items, theta - h)
        ) / h**2
    prob = category_probabilities(mixed_items, theta)
    expected = -np.sum(np.where(prob > 0, prob * np.nan_to_num(second, neginf=0.0, posinf=0.0), 0.0), axis=1)
    # Second differences with h = 1e-4 carry rounding error ~ eps / h^2 ~ 1e-8 per term.
    np.testing.assert_allclose(item_information(mixed_items, theta), expected, atol=2e-6)


def test_two_pl_information_is_a_squared_pq() -> None:
    # Textbook closed form for the 2PL (Birnbaum 1968): I = a^2 P (1 - P).
    params = ItemParameters.from_thresholds([1.7], [0.4])
    theta = np.linspace(-2, 2, 9)
    p = 1 / (1 + np.exp(-1.7 * (theta - 0.4)))
    np.testing.assert_allclose(item_information(params, theta)[0], 1.7**2 * p * (1 - p), rtol=1e-12)


def test_threshold_intercept_conversion_round_trips(mixed_items: ItemParameters) -> None:
    back = ItemParameters.from_thresholds(mixed_items.slopes, mixed_items.thresholds())
    np.testing.assert_allclose(back.intercepts, mixed_items.intercepts, equal_nan=True)
    np.testing.assert_array_equal(back.n_categories, mixed_items.n_categories)
