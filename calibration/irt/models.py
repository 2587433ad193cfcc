"""Item response functions for the 2PL and the graded response model.

One representation serves both models. Every item is a graded item with ``K``
ordered categories ``0 .. K-1`` in slope-intercept form (logistic, D = 1):

    P*(X >= k | theta) = logistic(a * theta + c_k),    k = 1 .. K-1,
    P(X = k | theta)   = P*_k - P*_{k+1},               P*_0 = 1, P*_K = 0,

with intercepts ``c_1 > c_2 > ... > c_{K-1}`` (Samejima 1969). A 2PL item is the
case ``K = 2`` with a single intercept ``c``; the "1PL" variant is a 2PL whose
slope is shared by all items that use it (the sharing lives in the estimator,
not here).

Conversion to slope-threshold form: ``b_k = -c_k / a`` so that
``a * theta + c_k = a * (theta - b_k)``.

Arrays are padded to the largest category count in the test: intercepts of shape
(n_items, max_categories - 1) hold NaN beyond an item's last intercept.
"""

from __future__ import annotations

from dataclasses import dataclass, field

import numpy as np
from numpy.typing import NDArray

from calibration.vocabulary import ITEM_MODELS

FloatArray = NDArray[np.float64]
IntArray = NDArray[np.int64]

MODEL_2PL = "2pl"
MODEL_1PL = "1pl"
MODEL_GRM = "grm"
MODELS = ITEM_MODELS


@dataclass(frozen=True)
class ItemParameters:
    """Slope-intercept parameters of a test (frozen; arrays are not copied).

    Parameters
    ----------
    slopes : array of shape (n_items,)
        Discrimination ``a`` of each item.
    intercepts : array of shape (n_items, max_categories - 1)
        ``c_k`` for k = 1 .. K_j - 1, decreasing along the row; NaN padding after.
    n_categories : int array of shape (n_items,)
        ``K_j`` for each item (2 for a dichotomous item).
    models : tuple of str
        ``"2pl"``, ``"1pl"`` or ``"grm"`` per item (informative for scoring;
        the estimator uses it to share the 1PL slope).
    """

    slopes: FloatArray
    intercepts: FloatArray
    n_categories: IntArray
    models: tuple[str, ...] = field(default=())

    def __post_init__(self) -> None:
        slopes = np.asarray(self.slopes, dtype=np.float64)
        intercepts = np.atleast_2d(np.asarray(self.intercepts, dtype=np.float64))
        n_categories = np.asarray(self.n_categories, dtype=np.int64)
        if intercepts.shape[0] != slopes.shape[0] and intercepts.shape[1] == slopes.shape[0]:
            raise ValueError("intercepts must have shape (n_items, max_categories - 1)")
        if not (slopes.shape[0] == intercepts.shape[0] == n_categories.shape[0]):
            raise ValueError("slopes, intercepts and n_categories disagree on the number of items")
        if np.any(n_categories < 2):
            raise ValueError("every item needs at least two categories")
        if intercepts.shape[1] < int(n_categories.max()) - 1:
            raise ValueError("intercepts has fewer columns than the largest item needs")
        models = self.models or tuple(MODEL_2PL if k == 2 else MODEL_GRM for k in n_categories)
        if len(models) != slopes.shape[0]:
            raise ValueError("models must name one model per item")
        object.__setattr__(self, "slopes", slopes)
        object.__setattr__(self, "intercepts", intercepts)
        object.__setattr__(self, "n_categories", n_categories)
        object.__setattr__(self, "models", tuple(models))

    @property
    def n_items(self) -> int:
        """Number of items."""
        return int(self.slopes.shape[0])

    @property
    def max_categories(self) -> int:
        """Largest number of categories of any item."""
        return int(self.n_categories.max())

    def thresholds(self) -> FloatArray:
        """Slope-threshold locations ``b_k = -c_k / a``, shape (n_items, max_categories - 1)."""
        return -self.intercepts / self.slopes[:, None]

    def subset(self, items: IntArray | list[int]) -> ItemParameters:
        """The parameters of the listed items, in that order."""
        idx = np.asarray(items, dtype=np.int64)
        k_max = int(self.n_categories[idx].max()) if idx.size else 2
        return ItemParameters(
            slopes=self.slopes[idx],
            intercepts=self.intercepts[idx, : k_max - 1],
            n_categories=self.n_categories[idx],
            models=tuple(self.models[i] for i in idx),
        )

    @classmethod
    def from_thresholds(
        cls,
        slopes: FloatArray | list[float],
        thresholds: FloatArray | list[list[float]] | list[float],
        *,
        models: tuple[str, ...] = (),
    ) -> ItemParameters:
        """Build from slope-threshold form (``c_k = -a * b_k``); NaN pads shorter items."""
        a = np.asarray(slopes, dtype=np.float64)
        b = np.asarray(thresholds, dtype=np.float64)
        if b.ndim == 1:
            b = b[:, None]
        n_categories = np.sum(~np.isnan(b), axis=1) + 1
        return cls(slopes=a, intercepts=-a[:, None] * b, n_categories=n_categories, models=models)


PROBABILITY_FLOOR = 1e-300
"""Category probabilities at or below this count as zero (a category beyond double precision)."""


def log_sigmoid(z: FloatArray) -> FloatArray:
    """log(1 / (1 + exp(-z))) without overflow."""
    return -np.logaddexp(0.0, -z)


def log_boundary_difference(upper: FloatArray, lower: FloatArray) -> FloatArray:
    """``log(sigma(u) - sigma(v))`` for ``u >= v``, elementwise, in log space.

    The cumulative-logit (graded) category probability: ``u`` and ``v`` are the linear
    predictors of the category's two boundaries, ``+inf`` for the bottom category's upper
    boundary and ``-inf`` for the top category's lower one. Uses ``sigma(u) - sigma(v) =
    sigma(u) * sigma(-v) * (1 - exp(v - u))`` so far tails neither underflow to ``log 0``
    nor lose digits.
    """
    with np.errstate(invalid="ignore", over="ignore"):
        log_upper = np.where(np.isposinf(upper), 0.0, log_sigmoid(upper))
        log_not_lower = np.where(np.isneginf(lower), 0.0, log_sigmoid(-lower))
        gap = np.where(np.isposinf(upper) | np.isneginf(lower), -np.inf, lower - upper)
        return log_upper + log_not_lower + np.log(-np.expm1(gap))


def boundary_jacobian(w: FloatArray) -> tuple[FloatArray, FloatArray]:
    """Derivatives of the category probabilities of a cumulative logit, from ``W_k = P*_k (1 - P*_k)``.

    ``w`` has the boundaries on its last axis, ends included (``W_0 = W_K = 0``): shape (..., K + 1).
    Returns ``d P_k / d c_m`` of shape (..., K, K - 1), for the intercept ``c_m`` of boundary
    ``m = 1 .. K - 1`` (``W_m`` for k = m, ``-W_m`` for k = m - 1), and ``d P_k / d eta`` of shape
    (..., K), ``W_k - W_{k+1}``, for the linear predictor ``eta`` every boundary shares.
    """
    n_boundaries = w.shape[-1] - 2
    d_intercepts = np.zeros(w.shape[:-1] + (n_boundaries + 1, n_boundaries))
    for m in range(n_boundaries):
        d_intercepts[..., m + 1, m] = w[..., m + 1]
        d_intercepts[..., m, m] = -w[..., m + 1]
    return d_intercepts, w[..., :-1] - w[..., 1:]


def category_parameter_derivatives(
    params: ItemParameters, theta: FloatArray, *, second: bool = False
) -> tuple[FloatArray, FloatArray, FloatArray | None]:
    """Category probabilities and their derivatives with respect to each item's slots.

    An item's slots are its slope (slot 0) and its intercepts ``c_1 .. c_{K-1}`` (slots 1..).
    Returns ``prob`` (n_items, max_categories, n_theta), ``jac[j, k, q, s] = d P_jk / d slot_s``
    (n_items, max_categories, n_theta, max_categories) and, with ``second``, the second
    derivatives ``d2 P_jk / d slot_s d slot_t`` (..., max_categories, max_categories). With
    ``eta = a theta + c_m`` at boundary m: ``dP*_m/d eta = W_m = P*_m (1 - P*_m)`` and
    ``d2P*_m/d eta2 = W_m (1 - 2 P*_m)``; the slope's derivative carries ``theta``, an
    intercept's only its own boundary. Padding slots and categories hold 0.
    """
    star = cumulative_probabilities(params, theta)
    prob = star[:, :-1, :] - star[:, 1:, :]
    points = np.asarray(theta, dtype=np.float64)

    def slots(w: FloatArray) -> tuple[FloatArray, FloatArray]:
        d_intercepts, d_eta = boundary_jacobian(np.moveaxis(w, 1, 2))
        return np.moveaxis(d_intercepts, 2, 1), np.moveaxis(d_eta, 2, 1)  # (J, K, Q, K-1), (J, K, Q)

    w = star * (1.0 - star)
    d_intercepts, d_eta = slots(w)
    n_items, k_max, n_theta = prob.shape
    jac = np.empty((n_items, k_max, n_theta, k_max))
    jac[..., 0] = points * d_eta
    jac[..., 1:] = d_intercepts
    if not second:
        return prob, jac, None
    dd_intercepts, dd_eta = slots(w * (1.0 - 2.0 * star))
    hess = np.zeros((n_items, k_max, n_theta, k_max, k_max))
    hess[..., 0, 0] = points * points * dd_eta
    hess[..., 0, 1:] = points[:, None] * dd_intercepts
    hess[..., 1:, 0] = hess[..., 0, 1:]
    diagonal = np.arange(1, k_max)
    hess[..., diagonal, diagonal] = dd_intercepts
    return prob, jac, hess


def linear_predictors(params: ItemParameters, theta: FloatArray) -> FloatArray:
    """``a_j * theta + c_jk`` of shape (n_items, max_categories - 1, n_theta); NaN for padding."""
    theta = np.asarray(theta, dtype=np.float64)
    return params.slopes[:, None, None] * theta[None, None, :] + params.intercepts[:, :, None]


def cumulative_probabilities(params: ItemParameters, theta: FloatArray) -> FloatArray:
    """Boundary curves ``P*_k`` with the fixed ends included.

    Returns
    -------
    array of shape (n_items, max_categories + 1, n_theta)
        Column 0 is 1, column ``K_j`` is 0 and columns past ``K_j`` are 0.
    """
    z = linear_predictors(params, theta)
    with np.errstate(over="ignore"):  # exp(-z) overflows to inf far below a boundary: P* is then 0
        inner = np.where(np.isnan(z), 0.0, 1.0 / (1.0 + np.exp(-np.nan_to_num(z, nan=0.0))))
    n_items, _, n_theta = z.shape
    out = np.zeros((n_items, params.max_categories + 1, n_theta))
    out[:, 0, :] = 1.0
    out[:, 1 : params.max_categories, :] = inner[:, : params.max_categories - 1, :]
    return out


def category_probabilities(params: ItemParameters, theta: FloatArray) -> FloatArray:
    """``P(X = k | theta)``, shape (n_items, max_categories, n_theta); 0 for categories an item lacks."""
    star = cumulative_probabilities(params, theta)
    return star[:, :-1, :] - star[:, 1:, :]


def log_category_probabilities(params: ItemParameters, theta: FloatArray) -> FloatArray:
    """``log P(X = k | theta)`` computed in log space, shape (n_items, max_categories, n_theta).

    See :func:`log_boundary_difference`. Categories an item lacks hold ``-inf``.
    """
    z = linear_predictors(params, theta)
    n_items, _, n_theta = z.shape
    k_max = params.max_categories
    # Pad the linear predictor with +inf (k = 0) and -inf (k = K_j and beyond).
    padded = np.full((n_items, k_max + 1, n_theta), -np.inf)
    padded[:, 0, :] = np.inf
    padded[:, 1:k_max, :] = np.where(np.isnan(z), -np.inf, z)
    out = log_boundary_difference(padded[:, :-1, :], padded[:, 1:, :])
    exists = np.arange(k_max)[None, :] < params.n_categories[:, None]
    return np.where(exists[:, :, None], out, -np.inf)


def category_probability_derivatives(params: ItemParameters, theta: FloatArray) -> FloatArray:
    """``d P(X = k | theta) / d theta``, shape (n_items, max_categories, n_theta).

    With ``W_k = P*_k (1 - P*_k)`` (``W_0 = W_K = 0``): ``dP_k/dtheta = a (W_k - W_{k+1})``.
    """
    star = cumulative_probabilities(params, theta)
    w = star * (1.0 - star)
    return params.slopes[:, None, None] * (w[:, :-1, :] - w[:, 1:, :])


def item_information(params: ItemParameters, theta: FloatArray) -> FloatArray:
    """Fisher information of each item, shape (n_items, n_theta).

    ``I_j(theta) = sum_k (dP_jk/dtheta)^2 / P_jk`` (Samejima 1969); for a 2PL item this
    is ``a^2 P (1 - P)``.
    """
    return information_from(category_probabilities(params, theta), category_probability_derivatives(params, theta))


def information_from(prob: FloatArray, deriv: FloatArray) -> FloatArray:
    """``sum_k (dP_k/dtheta)^2 / P_k`` over axis 1 of (n_items, K, n_theta) probabilities and derivatives."""
    positive = prob > PROBABILITY_FLOOR
    return np.sum(np.where(positive, deriv**2 / np.where(positive, prob, 1.0), 0.0), axis=1)


def total_information(params: ItemParameters, theta: FloatArray) -> FloatArray:
    """Sum of item information over the test, shape (n_theta,)."""
    return item_information(params, theta).sum(axis=0)


def expected_item_scores(params: ItemParameters, theta: FloatArray) -> FloatArray:
    """``E[X_j | theta] = sum_k k P_jk(theta)``, shape (n_items, n_theta)."""
    return item_score_moments(params, theta)[0]


def item_score_moments(params: ItemParameters, theta: FloatArray) -> tuple[FloatArray, FloatArray]:
    """Model mean and variance of each item score at each theta, both of shape (n_items, n_theta)."""
    prob = category_probabilities(params, theta)
    k = np.arange(params.max_categories, dtype=np.float64)
    mean = np.einsum("jkq,k->jq", prob, k)
    return mean, np.einsum("jkq,k->jq", prob, k * k) - mean**2
