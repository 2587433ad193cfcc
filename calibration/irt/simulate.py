"""The one data generator: responses drawn from the item models, for simulations and the demo.

Checks against an independent route keep their own formulas on purpose; everything that only needs
data from the model (the demo, recovery and DIF simulations, benchmarks, API examples) draws it here.
"""

from __future__ import annotations

import numpy as np

from calibration.irt.models import FloatArray, ItemParameters, category_probabilities


def simulate_responses(
    slopes: FloatArray,
    thresholds: FloatArray,
    theta: FloatArray,
    rng: np.random.Generator,
) -> FloatArray:
    """Category codes drawn from ``P(X >= k) = logistic(a (theta - b_k))`` (Samejima 1969).

    Parameters
    ----------
    slopes : array of shape (n_items,) or (n_persons, n_items)
        A per-person slope lets an item work differently for some respondents (non-uniform DIF).
    thresholds : array of shape (n_items,), (n_items, K - 1) or (n_persons, n_items, K - 1)
        Increasing thresholds per item, NaN-padded for items with fewer categories; one
        threshold is a 2PL item.
    theta : array of shape (n_persons,)
    rng : numpy Generator (one uniform per person and item is drawn from it)

    Returns
    -------
    float array of shape (n_persons, n_items) with codes 0 .. K - 1.
    """
    slopes = np.asarray(slopes, dtype=np.float64)
    thresholds = np.asarray(thresholds, dtype=np.float64)
    theta = np.asarray(theta, dtype=np.float64)
    n_items = slopes.shape[-1]
    if thresholds.ndim == 1:
        thresholds = thresholds[:, None]
    elif thresholds.ndim == 2 and thresholds.shape[0] != n_items:
        thresholds = thresholds.T
    z = slopes[..., None] * (theta[:, None, None] - thresholds)
    star = np.where(np.isnan(z), 0.0, 1.0 / (1.0 + np.exp(-np.nan_to_num(z))))
    uniform = rng.random((theta.shape[0], n_items, 1))
    return np.sum(uniform < star, axis=2).astype(np.float64)


def simulate_items(params: ItemParameters, theta: FloatArray, rng: np.random.Generator) -> FloatArray:
    """Category codes drawn from any items' category probabilities (3PL, partial credit, graded, 2PL).

    One uniform per person and item: the code is the number of cumulative category probabilities
    below it. Returns a float array of shape (n_persons, n_items).
    """
    theta = np.asarray(theta, dtype=np.float64)
    prob = category_probabilities(params, theta)  # (J, K, n)
    below = np.cumsum(prob, axis=1)[:, :-1, :]  # P(X <= k), k = 0 .. K - 2
    uniform = rng.random((params.n_items, 1, theta.shape[0]))
    codes = np.sum(uniform >= below, axis=1)  # (J, n)
    return np.minimum(codes, params.n_categories[:, None] - 1).T.astype(np.float64)
