"""Item response functions: 2PL/1PL, graded response, 3PL and (generalized) partial credit.

One representation serves every model. Every item has ``K`` ordered categories
``0 .. K-1``, a slope ``a`` and ``K - 1`` intercepts ``c_k`` (logistic, D = 1). The
cumulative models (2PL, 1PL, graded) read them as boundary curves:

    P*(X >= k | theta) = logistic(a * theta + c_k),    k = 1 .. K-1,
    P(X = k | theta)   = P*_k - P*_{k+1},               P*_0 = 1, P*_K = 0,

with intercepts ``c_1 > c_2 > ... > c_{K-1}`` (Samejima 1969). A 2PL item is the
case ``K = 2`` with a single intercept ``c``; the "1PL" variant is a 2PL whose
slope is shared by all items that use it (the sharing lives in the estimator,
not here).

A 3PL item (Birnbaum 1968) is a 2PL item with a lower asymptote ``g``:
``P(X = 1) = g + (1 - g) logistic(a theta + c)``. The estimator works with
``gamma = logit(g)``, the item's third slot.

The generalized partial credit model (Muraki 1992) reads the intercepts as steps
between adjacent categories: ``P(X = k) ∝ exp(k a theta + c_1 + ... + c_k)``
(the empty sum for k = 0); its steps need not be ordered. The partial credit model
(Masters 1982) is the case where every such item shares one slope (with the 1PL items:
the Rasch family).

Conversion to slope-threshold form: ``b_k = -c_k / a`` so that
``a * theta + c_k = a * (theta - b_k)``.

Arrays are padded to the largest category count in the test: intercepts of shape
(n_items, max_categories - 1) hold NaN beyond an item's last intercept.
"""

from __future__ import annotations

import functools
from collections.abc import Mapping, Sequence
from dataclasses import dataclass, field

import numpy as np
from numpy.typing import NDArray

from calibration.vocabulary import ITEM_MODELS

FloatArray = NDArray[np.float64]
IntArray = NDArray[np.int64]

MODEL_2PL = "2pl"
MODEL_1PL = "1pl"
MODEL_GRM = "grm"
MODEL_3PL = "3pl"
MODEL_GPCM = "gpcm"
MODEL_PCM = "pcm"
MODELS = ITEM_MODELS
CUMULATIVE_MODELS = (MODEL_2PL, MODEL_1PL, MODEL_GRM)
"""Models read as boundary curves (the fast scoring paths serve tests of these only)."""
ADJACENT_MODELS = (MODEL_GPCM, MODEL_PCM)
"""Models read as adjacent-category steps."""
SHARED_SLOPE_MODELS = (MODEL_1PL, MODEL_PCM)
"""Models whose items share one slope (the Rasch family)."""
RIGHT_WRONG_MODELS = (MODEL_2PL, MODEL_1PL, MODEL_3PL)
"""Models that need exactly two categories."""
GUESSING_SLOT = 2
"""The slot of a 3PL item's ``logit(g)`` (slot 0 is the slope, slot 1 the intercept)."""


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
        One of :data:`MODELS` per item (default: ``"2pl"`` for two categories, ``"grm"`` for more).
    guessing : array of shape (n_items,), optional
        The 3PL lower asymptote ``g`` (0 for every other model; default all 0).
    """

    slopes: FloatArray
    intercepts: FloatArray
    n_categories: IntArray
    models: tuple[str, ...] = field(default=())
    guessing: FloatArray | None = None

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
        unknown = sorted({m for m in models if m not in MODELS})
        if unknown:
            raise ValueError(f"unknown item model(s) {', '.join(unknown)}; known: {', '.join(MODELS)}")
        two = np.array([m in RIGHT_WRONG_MODELS for m in models], dtype=bool)
        if np.any(two & (n_categories != 2)):
            raise ValueError("2PL, 1PL and 3PL items need exactly two categories")
        guessing = np.zeros(slopes.shape[0]) if self.guessing is None else np.asarray(self.guessing, dtype=np.float64)
        if guessing.shape != slopes.shape:
            raise ValueError("guessing must hold one value per item")
        is_3pl = np.array([m == MODEL_3PL for m in models], dtype=bool)
        if np.any(guessing[~is_3pl] != 0.0):
            raise ValueError("only 3PL items have a lower asymptote")
        if np.any(~((guessing >= 0.0) & (guessing < 1.0))):
            raise ValueError("a lower asymptote must lie in [0, 1)")
        object.__setattr__(self, "guessing", guessing)
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

    @functools.cached_property
    def n_slots(self) -> IntArray:
        """Parameters (slots) per item: slope and intercepts, and a 3PL item's ``logit(g)``."""
        return np.where(self.has_guessing, 3, self.n_categories)

    @property
    def max_slots(self) -> int:
        """Width of a slot table: the largest number of slots of any item."""
        return int(self.n_slots.max())

    @functools.cached_property
    def has_guessing(self) -> np.ndarray:
        """Boolean (n_items,): the 3PL items."""
        return np.array([m == MODEL_3PL for m in self.models], dtype=bool)

    @functools.cached_property
    def adjacent(self) -> np.ndarray:
        """Boolean (n_items,): the (generalized) partial credit items."""
        return np.array([m in ADJACENT_MODELS for m in self.models], dtype=bool)

    @functools.cached_property
    def cumulative_only(self) -> bool:
        """Every item is a 2PL, 1PL or graded item (the fast scoring paths apply)."""
        return all(m in CUMULATIVE_MODELS for m in self.models)

    def thresholds(self) -> FloatArray:
        """Slope-threshold locations ``b_k = -c_k / a``, shape (n_items, max_categories - 1).

        For a partial-credit item these are its step difficulties; for a 3PL item the location of
        the logistic part (where ``P = g + (1 - g) / 2``).
        """
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
            guessing=self.guessing[idx],
        )

    @classmethod
    def stack(cls, rows: Sequence[tuple[float, Sequence[float], str, float | None]]) -> ItemParameters:
        """One test from per-item ``(slope, intercepts, model, asymptote or None)`` rows, intercepts NaN-padded."""
        width = max(len(row[1]) for row in rows)
        intercepts = np.full((len(rows), width), np.nan)
        for j, row in enumerate(rows):
            intercepts[j, : len(row[1])] = row[1]
        return cls(
            slopes=np.array([row[0] for row in rows], dtype=np.float64),
            intercepts=intercepts,
            n_categories=np.array([len(row[1]) + 1 for row in rows]),
            models=tuple(row[2] for row in rows),
            guessing=np.array([row[3] or 0.0 for row in rows], dtype=np.float64),
        )

    @classmethod
    def from_thresholds(
        cls,
        slopes: FloatArray | list[float],
        thresholds: FloatArray | list[list[float]] | list[float],
        *,
        models: tuple[str, ...] = (),
        guessing: FloatArray | list[float] | None = None,
    ) -> ItemParameters:
        """Build from slope-threshold form (``c_k = -a * b_k``); NaN pads shorter items."""
        a = np.asarray(slopes, dtype=np.float64)
        b = np.asarray(thresholds, dtype=np.float64)
        if b.ndim == 1:
            b = b[:, None]
        n_categories = np.sum(~np.isnan(b), axis=1) + 1
        g = None if guessing is None else np.asarray(guessing, dtype=np.float64)
        return cls(slopes=a, intercepts=-a[:, None] * b, n_categories=n_categories, models=models, guessing=g)


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

    An item's slots are its slope (slot 0), its intercepts ``c_1 .. c_{K-1}`` (slots 1..) and, for
    a 3PL item, ``gamma = logit(g)`` (slot 2). Returns ``prob`` (n_items, max_categories, n_theta),
    ``jac[j, k, q, s] = d P_jk / d slot_s`` (n_items, max_categories, n_theta, max_slots) and, with
    ``second``, the second derivatives ``d2 P_jk / d slot_s d slot_t`` (..., max_slots, max_slots).
    Padding slots and categories hold 0.

    Cumulative items: with ``eta = a theta + c_m`` at boundary m, ``dP*_m/d eta = W_m = P*_m (1 - P*_m)``
    and ``d2P*_m/d eta2 = W_m (1 - 2 P*_m)``; the slope's derivative carries ``theta``, an
    intercept's only its own boundary. 3PL items: the 2PL curve ``s`` scaled by ``1 - g`` plus ``g``,
    so its slope and intercept derivatives are ``(1 - g)`` times the 2PL's, ``dP_1/d gamma = (1 - s)
    g (1 - g)`` and the mixed terms carry ``d(1 - g)/d gamma = -g (1 - g)``. Partial-credit items:
    ``log P_k = eta_k - log sum exp(eta)`` is linear in the slots through ``D_ks = d eta_k / d slot_s``
    (``k theta`` for the slope, ``1[s <= k]`` for step s), so ``dP_k/d slot_s = P_k (D_ks - Dbar_s)`` and
    ``d2 P_k = P_k ((D_ks - Dbar_s)(D_kt - Dbar_t) - Cov_P(D_s, D_t))``.
    """
    n_items, k_max, n_slots = params.n_items, params.max_categories, params.max_slots
    prob, jac_c, hess_c = _cumulative_parameter_derivatives(params, theta, second=second)
    n_theta = prob.shape[2]
    jac = np.zeros((n_items, k_max, n_theta, n_slots))
    jac[..., :k_max] = jac_c
    hess = None
    if hess_c is not None:
        hess = np.zeros((n_items, k_max, n_theta, n_slots, n_slots))
        hess[..., :k_max, :k_max] = hess_c
    rows = np.flatnonzero(params.has_guessing)
    if rows.size:
        g = params.guessing[rows][:, None]
        s = prob[rows, 1]  # the 2PL curve
        dg = g * (1.0 - g)  # d g / d gamma
        prob[rows, 1] = g + (1.0 - g) * s
        prob[rows, 0] = 1.0 - prob[rows, 1]
        jac[rows, :, :, :2] *= (1.0 - g)[:, None, :, None]
        d_gamma = (1.0 - s) * dg
        jac[rows, 1, :, GUESSING_SLOT] = d_gamma
        jac[rows, 0, :, GUESSING_SLOT] = -d_gamma
        if hess is not None:
            hess[rows, :, :, :2, :2] *= (1.0 - g)[:, None, :, None, None]
            for slot in (0, 1):
                mixed = -dg * jac_c[rows, 1, :, slot]
                for k, sign in ((1, 1.0), (0, -1.0)):
                    hess[rows, k, :, slot, GUESSING_SLOT] = sign * mixed
                    hess[rows, k, :, GUESSING_SLOT, slot] = sign * mixed
            curve = d_gamma * (1.0 - 2.0 * g)
            hess[rows, 1, :, GUESSING_SLOT, GUESSING_SLOT] = curve
            hess[rows, 0, :, GUESSING_SLOT, GUESSING_SLOT] = -curve
    rows = np.flatnonzero(params.adjacent)
    if rows.size:
        p_adj = _adjacent_probabilities(params, rows, theta)
        design = _adjacent_design(params, rows, theta, n_slots)  # (J', K, Q, S)
        centred = design - np.einsum("jkq,jkqs->jqs", p_adj, design)[:, None]
        prob[rows] = p_adj
        jac[rows] = p_adj[..., None] * centred
        if hess is not None:
            outer = centred[..., :, None] * centred[..., None, :]
            covariance = np.einsum("jkq,jkqst->jqst", p_adj, outer)
            hess[rows] = p_adj[..., None, None] * (outer - covariance[:, None])
    return prob, jac, hess


def _cumulative_parameter_derivatives(
    params: ItemParameters, theta: FloatArray, *, second: bool
) -> tuple[FloatArray, FloatArray, FloatArray | None]:
    """:func:`category_parameter_derivatives` of every item read as a cumulative (2PL or graded) item,
    over the slots slope and intercepts (width max_categories)."""
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
    """Boundary curves ``P*_k`` with the fixed ends included, every item read as a cumulative item
    (a 3PL item's 2PL part; meaningless for partial-credit items, which the callers overwrite).

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
    prob = star[:, :-1, :] - star[:, 1:, :]
    rows = np.flatnonzero(params.has_guessing)
    if rows.size:
        g = params.guessing[rows][:, None]
        prob[rows, 1] = g + (1.0 - g) * prob[rows, 1]
        prob[rows, 0] = 1.0 - prob[rows, 1]
    rows = np.flatnonzero(params.adjacent)
    if rows.size:
        prob[rows] = _adjacent_probabilities(params, rows, theta)
    return prob


def log_category_probabilities(params: ItemParameters, theta: FloatArray) -> FloatArray:
    """``log P(X = k | theta)`` computed in log space, shape (n_items, max_categories, n_theta).

    Cumulative items through :func:`log_boundary_difference`; a 3PL item's right answer as
    ``log(g + (1 - g) s)`` by ``logaddexp``; partial-credit items as ``eta_k - log sum exp(eta)``.
    Categories an item lacks hold ``-inf``.
    """
    z = linear_predictors(params, theta)
    n_items, _, n_theta = z.shape
    k_max = params.max_categories
    # Pad the linear predictor with +inf (k = 0) and -inf (k = K_j and beyond).
    padded = np.full((n_items, k_max + 1, n_theta), -np.inf)
    padded[:, 0, :] = np.inf
    padded[:, 1:k_max, :] = np.where(np.isnan(z), -np.inf, z)
    out = log_boundary_difference(padded[:, :-1, :], padded[:, 1:, :])
    rows = np.flatnonzero(params.has_guessing)
    if rows.size:
        g = params.guessing[rows][:, None]
        with np.errstate(divide="ignore"):  # g = 0: log g = -inf, the 2PL curve
            out[rows, 1] = np.logaddexp(np.log(g), np.log1p(-g) + out[rows, 1])
        out[rows, 0] = np.log1p(-g) + out[rows, 0]
    rows = np.flatnonzero(params.adjacent)
    if rows.size:
        eta = _adjacent_predictors(params, rows, theta)
        with np.errstate(invalid="ignore"):
            out[rows] = eta - np.logaddexp.reduce(eta, axis=1, keepdims=True)
    exists = np.arange(k_max)[None, :] < params.n_categories[:, None]
    return np.where(exists[:, :, None], out, -np.inf)


def _adjacent_predictors(params: ItemParameters, rows: IntArray, theta: FloatArray) -> FloatArray:
    """``eta_k = k a theta + c_1 + ... + c_k`` of the listed partial-credit items, (rows, K, n_theta);
    ``-inf`` for categories an item lacks."""
    points = np.asarray(theta, dtype=np.float64)
    k_max = params.max_categories
    steps = np.nan_to_num(params.intercepts[rows, : k_max - 1], nan=0.0)
    offsets = np.concatenate([np.zeros((rows.size, 1)), np.cumsum(steps, axis=1)], axis=1)  # (rows, K)
    k = np.arange(k_max, dtype=np.float64)
    eta = k[None, :, None] * params.slopes[rows][:, None, None] * points[None, None, :] + offsets[:, :, None]
    exists = np.arange(k_max)[None, :] < params.n_categories[rows][:, None]
    return np.where(exists[:, :, None], eta, -np.inf)


def _adjacent_probabilities(params: ItemParameters, rows: IntArray, theta: FloatArray) -> FloatArray:
    """Category probabilities of the listed partial-credit items, (rows, K, n_theta)."""
    eta = _adjacent_predictors(params, rows, theta)
    eta -= eta.max(axis=1, keepdims=True)
    weights = np.exp(eta)
    return weights / weights.sum(axis=1, keepdims=True)


def recode_in_place(x: FloatArray, maps: Mapping[int, Sequence[int] | FloatArray]) -> None:
    """Apply answer code -> model category maps (column -> map indexed by the code) to ``x``; NaN stays NaN."""
    for j, mapping in maps.items():
        answered = ~np.isnan(x[:, j])
        x[answered, j] = np.asarray(mapping, dtype=np.float64)[x[answered, j].astype(np.int64)]


ADJACENT_RATIO_LIMIT = 600.0
"""Largest ``|eta_k - eta_0|`` (in log units) for which :func:`adjacent_moments` takes the product route:
``exp(+-600)`` is far inside double precision, so no weight overflows or vanishes."""


def adjacent_moments(params: ItemParameters, theta: FloatArray) -> tuple[FloatArray, FloatArray]:
    """Mean and variance of the category of every item at each theta, each (n_theta, n_items), for a test of
    partial-credit items only: then ``d log P_k / d theta = a (k - mean)`` and its derivative is ``-a^2 var``.

    Each category's weight relative to category 0 is the previous one's times ``exp(a theta + c_k)``
    (``exp(eta_k - eta_{k-1})``): one exponential per respondent and item, on (n, J) arrays. Where a
    weight could leave double precision (``|eta_k - eta_0|`` possibly above ADJACENT_RATIO_LIMIT) the
    row is computed from the category probabilities instead (each row's largest predictor subtracted).
    """
    if not params.adjacent.all():
        raise ValueError("adjacent_moments needs partial-credit items only")
    theta = np.asarray(theta, dtype=np.float64)
    a, k_max = params.slopes, params.max_categories
    steps = params.intercepts[:, : k_max - 1]
    factors = np.exp(np.where(np.isnan(steps), -np.inf, steps))  # 0 for a step an item lacks: no weight beyond
    reach = (k_max - 1) * np.max(np.abs(a)) * np.abs(theta) + np.nansum(np.abs(steps), axis=1).max(initial=0.0)
    safe = reach <= ADJACENT_RATIO_LIMIT
    at = theta if safe.all() else np.where(safe, theta, 0.0)
    ratio = np.exp(np.multiply(at[:, None], a))  # exp(a theta), (n, J)
    weight = np.ones_like(ratio)
    total, first, second = np.ones_like(ratio), np.zeros_like(ratio), np.zeros_like(ratio)
    scratch = np.empty_like(ratio)
    for k in range(1, k_max):
        weight *= ratio
        weight *= factors[:, k - 1]
        total += weight
        first += np.multiply(weight, float(k), out=scratch)
        second += np.multiply(weight, float(k * k), out=scratch)
    first /= total  # the mean
    second /= total
    second -= np.multiply(first, first, out=scratch)
    np.maximum(second, 0.0, out=second)
    rows = np.flatnonzero(~safe)
    if rows.size:
        prob = _adjacent_probabilities(params, np.arange(params.n_items), theta[rows])  # (J, K, rows)
        k = np.arange(k_max, dtype=np.float64)
        mean = np.einsum("jkn,k->nj", prob, k)
        first[rows] = mean
        second[rows] = np.maximum(np.einsum("jkn,k->nj", prob, k * k) - mean * mean, 0.0)
    return first, second


def _adjacent_design(params: ItemParameters, rows: IntArray, theta: FloatArray, n_slots: int) -> FloatArray:
    """``D[j, k, q, s] = d eta_k / d slot_s`` of the listed partial-credit items: ``k theta`` for the slope,
    1 for step ``s <= k`` (within the item's steps), 0 elsewhere."""
    points = np.asarray(theta, dtype=np.float64)
    k_max = params.max_categories
    design = np.zeros((rows.size, k_max, points.size, n_slots))
    k = np.arange(k_max, dtype=np.float64)
    design[..., 0] = k[None, :, None] * points[None, None, :]
    for step in range(1, k_max):
        has = (params.n_categories[rows] > step).astype(np.float64)  # (rows,)
        design[:, step:, :, step] = has[:, None, None]
    return design


def category_probability_derivatives(params: ItemParameters, theta: FloatArray) -> FloatArray:
    """``d P(X = k | theta) / d theta``, shape (n_items, max_categories, n_theta).

    See :func:`category_theta_derivatives`.
    """
    return category_theta_derivatives(params, theta, second=False)[1]


def category_theta_derivatives(
    params: ItemParameters, theta: FloatArray, *, second: bool = True
) -> tuple[FloatArray, FloatArray, FloatArray | None]:
    """Category probabilities and their first (and second) derivatives in theta, each (n_items, K, n_theta).

    Cumulative items, with ``W_k = P*_k (1 - P*_k)`` (``W_0 = W_K = 0``): ``dP_k/dtheta = a (W_k -
    W_{k+1})`` and ``d2P_k/dtheta2 = a^2 (W_k (1 - 2 P*_k) - W_{k+1} (1 - 2 P*_{k+1}))``; a 3PL item's are
    ``(1 - g)`` times its 2PL part's; partial-credit items: ``dP_k/dtheta = a P_k (k - kbar)`` and
    ``d2P_k/dtheta2 = a^2 P_k ((k - kbar)^2 - Var(k))`` with the mean and variance of the category.
    """
    star = cumulative_probabilities(params, theta)
    prob = star[:, :-1, :] - star[:, 1:, :]
    w = star * (1.0 - star)
    a = params.slopes[:, None, None]
    first = a * (w[:, :-1, :] - w[:, 1:, :])
    curve = None
    if second:
        bend = w * (1.0 - 2.0 * star)
        curve = a * a * (bend[:, :-1, :] - bend[:, 1:, :])
    rows = np.flatnonzero(params.has_guessing)
    if rows.size:
        g = params.guessing[rows][:, None]
        prob[rows, 1] = g + (1.0 - g) * prob[rows, 1]
        prob[rows, 0] = 1.0 - prob[rows, 1]
        first[rows] *= (1.0 - g)[:, None, :]
        if curve is not None:
            curve[rows] *= (1.0 - g)[:, None, :]
    rows = np.flatnonzero(params.adjacent)
    if rows.size:
        p_adj = _adjacent_probabilities(params, rows, theta)
        k = np.arange(params.max_categories, dtype=np.float64)[None, :, None]
        mean = np.sum(p_adj * k, axis=1, keepdims=True)
        slope = params.slopes[rows][:, None, None]
        prob[rows] = p_adj
        first[rows] = slope * p_adj * (k - mean)
        if curve is not None:
            variance = np.sum(p_adj * (k - mean) ** 2, axis=1, keepdims=True)
            curve[rows] = slope * slope * p_adj * ((k - mean) ** 2 - variance)
    return prob, first, curve


def item_information(params: ItemParameters, theta: FloatArray) -> FloatArray:
    """Fisher information of each item, shape (n_items, n_theta).

    ``I_j(theta) = sum_k (dP_jk/dtheta)^2 / P_jk`` (Samejima 1969); for a 2PL item this
    is ``a^2 P (1 - P)``, for a 3PL item ``a^2 (1 - g)^2 s^2 (1 - s)^2 / (P (1 - P))`` with its 2PL
    part ``s``.
    """
    prob, first, _ = category_theta_derivatives(params, theta, second=False)
    return information_from(prob, first)


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
