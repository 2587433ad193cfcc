"""Characteristic-curve linking constants against a direct scipy minimisation of the same criteria.

The criteria are written out here item by item and category by category with plain logistic curves
(no code of ours), on the same grid and weights, and minimised by scipy's Nelder-Mead over (A, B);
the constants' delta-method SEs are checked against re-minimising with each estimate moved
(a different route to the same Jacobian).
"""

from __future__ import annotations

import math

import numpy as np
import pytest
from scipy import optimize, stats

from calibration.irt.models import ItemParameters, category_probabilities
from calibration.linking import LINK_GRID, characteristic_curve_constants, rescale

# Published (old-scale) parameters of five common items, invented: three right/wrong, two graded.
OLD = ItemParameters.from_thresholds(
    [1.2, 0.8, 1.6, 1.1, 1.4],
    [[-1.0, np.nan, np.nan], [0.3, np.nan, np.nan], [1.1, np.nan, np.nan], [-0.8, 0.2, 1.0], [-1.5, -0.2, np.nan]],
)
TRUE_SLOPE, TRUE_SHIFT = 1.25, 0.4  # theta_old = A theta_new + B


def _new_scale_parameters(noise: float, seed: int) -> ItemParameters:
    """The same items estimated on a new scale (slope A a, thresholds (b - B) / A), with estimation noise."""
    rng = np.random.default_rng(seed)
    b = OLD.thresholds()
    a = OLD.slopes * TRUE_SLOPE * np.exp(rng.normal(0, noise, OLD.n_items))
    thresholds = (b - TRUE_SHIFT) / TRUE_SLOPE + rng.normal(0, noise, b.shape)
    thresholds = np.sort(thresholds, axis=1)  # NaN padding sorts last
    return ItemParameters.from_thresholds(a, thresholds)


def _curves(slopes: list[float], thresholds: list[list[float]], theta: float) -> list[list[float]]:
    """Category probabilities of each item at theta, written out: P*_k = 1/(1+exp(-a(theta-b_k)))."""
    out = []
    for a, bs in zip(slopes, thresholds, strict=True):
        stars = [1.0] + [1.0 / (1.0 + math.exp(-a * (theta - b))) for b in bs] + [0.0]
        out.append([stars[k] - stars[k + 1] for k in range(len(bs) + 1)])
    return out


def _written_out(method: str, old: ItemParameters, new: ItemParameters):  # noqa: ANN202 - test helper
    points = LINK_GRID.points
    weights = stats.norm.pdf(points)
    weights = weights / weights.sum()
    old_b = [[b for b in row if not np.isnan(b)] for row in old.thresholds()]
    new_b = [[b for b in row if not np.isnan(b)] for row in new.thresholds()]
    targets = [_curves(list(old.slopes), old_b, t) for t in points]

    def criterion(constants: np.ndarray) -> float:
        big_a, big_b = constants
        if big_a <= 0:
            return math.inf
        slopes = [a / big_a for a in new.slopes]  # on the old scale: a / A, b' = A b + B
        thresholds = [[big_a * b + big_b for b in row] for row in new_b]
        total = 0.0
        for w, t, target in zip(weights, points, targets, strict=True):
            moved = _curves(slopes, thresholds, t)
            if method == "haebara":
                pairs = zip(moved, target, strict=True)
                total += w * sum((p - q) ** 2 for item, ref in pairs for p, q in zip(item, ref, strict=True))
            else:
                score = sum(sum(k * p for k, p in enumerate(item)) for item in moved)
                ref_score = sum(sum(k * p for k, p in enumerate(item)) for item in target)
                total += w * (score - ref_score) ** 2
        return total

    return criterion


@pytest.mark.parametrize("method", ["stocking-lord", "haebara"])
def test_constants_equal_a_direct_minimisation_of_the_criterion(method: str) -> None:
    new = _new_scale_parameters(noise=0.08, seed=3)
    ours = characteristic_curve_constants(OLD, new, method=method)
    criterion = _written_out(method, OLD, new)
    theirs = optimize.minimize(
        criterion, np.array([1.0, 0.0]), method="Nelder-Mead", options={"xatol": 1e-10, "fatol": 1e-14}
    )
    # Both minimise the same smooth function: the minima agree to the optimisers' tolerance (1e-6).
    assert ours.slope == pytest.approx(theirs.x[0], abs=1e-6)
    assert ours.intercept == pytest.approx(theirs.x[1], abs=1e-6)
    assert criterion(np.array([ours.slope, ours.intercept])) <= theirs.fun + 1e-12


@pytest.mark.parametrize("method", ["stocking-lord", "haebara"])
def test_error_free_estimates_give_the_true_constants(method: str) -> None:
    # With no estimation noise the new curves are the old ones exactly: the constants are the ones simulated.
    ours = characteristic_curve_constants(OLD, _new_scale_parameters(noise=0.0, seed=1), method=method)
    assert ours.slope == pytest.approx(TRUE_SLOPE, abs=1e-7)
    assert ours.intercept == pytest.approx(TRUE_SHIFT, abs=1e-7)


def test_rescaled_curves_are_the_same_curves_on_the_other_scale() -> None:
    new = _new_scale_parameters(noise=0.05, seed=2)
    theta_new = np.linspace(-3, 3, 13)
    moved = rescale(new, TRUE_SLOPE, TRUE_SHIFT)
    np.testing.assert_allclose(
        category_probabilities(moved, TRUE_SLOPE * theta_new + TRUE_SHIFT),
        category_probabilities(new, theta_new),
        atol=1e-13,
    )


@pytest.mark.parametrize("method", ["stocking-lord", "haebara"])
def test_delta_method_se_equals_the_jacobian_by_reminimising(method: str) -> None:
    # Another route to d(A, B)/dp: minimise again with each new estimate moved by +-h (the implicit-function
    # route in the code differences the criterion's gradient instead). SEs agree to 1e-3 relative (two
    # numerical Jacobians of a smooth minimum, each with O(h^2) error).
    new = _new_scale_parameters(noise=0.08, seed=5)
    slots = [(j, s) for j in range(new.n_items) for s in range(int(new.n_categories[j]))]
    rng = np.random.default_rng(9)
    factor = rng.normal(size=(len(slots), len(slots))) * 0.02
    covariance = factor @ factor.T + np.eye(len(slots)) * 0.003
    ours = characteristic_curve_constants(OLD, new, method=method, covariance=covariance)

    def constants_with(j: int, s: int, step: float) -> np.ndarray:
        slopes, intercepts = new.slopes.copy(), new.intercepts.copy()
        if s == 0:
            slopes[j] += step
        else:
            intercepts[j, s - 1] += step
        moved = ItemParameters(slopes=slopes, intercepts=intercepts, n_categories=new.n_categories)
        found = characteristic_curve_constants(OLD, moved, method=method)
        return np.array([found.slope, found.intercept])

    h = 1e-4
    jacobian = np.column_stack([(constants_with(j, s, h) - constants_with(j, s, -h)) / (2 * h) for j, s in slots])
    expected = np.sqrt(np.diag(jacobian @ covariance @ jacobian.T))
    np.testing.assert_allclose([ours.slope_se, ours.intercept_se], expected, rtol=1e-3)
