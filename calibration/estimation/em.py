"""Marginal maximum likelihood for 2PL / 1PL / graded items by Bock-Aitkin EM.

E-step (Bock & Aitkin 1981): posterior weights of every respondent over a fixed
quadrature grid, summed into expected counts ``r[j, k, q]`` (expected number of
respondents at point q answering item j in category k). Both sums are matrix
products over indicator matrices (see :mod:`calibration.irt.likelihood`).

M-step: for every item, Fisher scoring on ``sum_kq r[j,k,q] log P_jk(theta_q)``
(plus an optional log-normal slope prior), vectorised across items; a slope shared
by several items (the 1PL variant) couples them and is solved jointly.

Acceleration: SQUAREM (Varadhan & Roland 2008, Scand. J. Stat. 35:335) over the
EM map, with a fall-back to the plain EM step whenever the extrapolated point is
invalid or lowers the likelihood, so every accepted iterate raises it.

Standard errors: observed information, obtained as the central finite-difference
Jacobian of the analytic marginal score (Fisher's identity: the score of the
marginal likelihood is the posterior expectation of the complete-data score);
this is the numerical form of Oakes' (1999, JRSS-B 61:479) identity.
"""

from __future__ import annotations

import math
import warnings
from collections.abc import Callable
from dataclasses import dataclass, field
from typing import Any

import numpy as np

from calibration.irt.likelihood import (
    DEFAULT_CHUNK,
    QuadratureGrid,
    ResponseDesign,
    build_design,
    log_likelihood_grid,
    normal_log_weights,
    run_blocks,
    split_log_table,
)
from calibration.irt.models import (
    MODEL_1PL,
    FloatArray,
    IntArray,
    ItemParameters,
    cumulative_probabilities,
)


class ConvergenceWarning(UserWarning):
    """EM stopped at ``max_iter`` before the convergence criterion was met."""


@dataclass(frozen=True)
class SlopePrior:
    """Log-normal prior on slopes: ``log a ~ N(mean, sd^2)`` (a mild one keeps slopes finite)."""

    mean: float = 0.0
    sd: float = 1.0

    def log_density(self, a: FloatArray) -> FloatArray:
        safe = np.maximum(a, 1e-8)
        z = (np.log(safe) - self.mean) / self.sd
        return -np.log(safe) - 0.5 * z * z

    def gradient(self, a: FloatArray) -> FloatArray:
        safe = np.maximum(a, 1e-8)
        return -1.0 / safe - (np.log(safe) - self.mean) / (self.sd**2 * safe)

    def curvature(self, a: FloatArray) -> FloatArray:
        """A positive stand-in for minus the second derivative (used in Fisher scoring)."""
        safe = np.maximum(a, 1e-8)
        return 1.0 / (self.sd**2 * safe * safe)


@dataclass(frozen=True)
class EMSettings:
    """Settings of the EM calibration.

    ``tolerance`` is the largest absolute change of any item parameter between
    iterations that counts as converged. No slope prior by default (pure marginal
    ML); ``SlopePrior(0, 1)`` is a mild choice for small samples.
    """

    max_iter: int = 1000
    tolerance: float = 1e-5
    quadrature: QuadratureGrid = field(default_factory=lambda: QuadratureGrid(49, -6.0, 6.0))
    slope_prior: SlopePrior | None = None
    m_step_iter: int = 4
    accelerate: bool = True
    standard_errors: bool = True
    compress_patterns: bool = True


@dataclass(frozen=True)
class ParameterLayout:
    """Which item parameters are free and where they sit in the parameter vector.

    ``index[j, s]`` is the position of slot ``s`` of item ``j`` (slot 0 = slope,
    slots 1.. = intercepts) in the free-parameter vector, or -1 when the slot does
    not exist or is fixed. Items that share a slope share its index.
    """

    index: IntArray
    n_free: int
    shared: bool

    @classmethod
    def build(cls, params: ItemParameters, fixed: np.ndarray | None = None) -> ParameterLayout:
        n_items, k_max = params.n_items, params.max_categories
        exists = np.arange(k_max)[None, :] < params.n_categories[:, None]
        free = exists.copy() if fixed is None else exists & ~np.asarray(fixed, dtype=bool)
        index = np.full((n_items, k_max), -1, dtype=np.int64)
        position = 0
        common_slope = -1
        for j in range(n_items):
            for s in range(k_max):
                if not free[j, s]:
                    continue
                if s == 0 and params.models[j] == MODEL_1PL:
                    if common_slope < 0:
                        common_slope = position
                        position += 1
                    index[j, 0] = common_slope
                    continue
                index[j, s] = position
                position += 1
        n_common = int(np.sum(index[:, 0] == common_slope)) if common_slope >= 0 else 0
        return cls(index=index, n_free=position, shared=n_common > 1)

    def to_vector(self, params: ItemParameters) -> FloatArray:
        table = _slot_table(params)
        vec = np.zeros(self.n_free)
        mask = self.index >= 0
        vec[self.index[mask]] = table[mask]
        return vec

    def from_vector(self, vec: FloatArray, template: ItemParameters) -> ItemParameters:
        table = _slot_table(template)
        mask = self.index >= 0
        table[mask] = vec[self.index[mask]]
        return _params_from_slots(table, template)

    def gather(self, blocks: FloatArray) -> FloatArray:
        """Sum per-item slot values of shape (n_items, k_max) into the free vector."""
        vec = np.zeros(self.n_free)
        mask = self.index >= 0
        np.add.at(vec, self.index[mask], blocks[mask])
        return vec


def _slot_table(params: ItemParameters) -> FloatArray:
    table = np.full((params.n_items, params.max_categories), np.nan)
    table[:, 0] = params.slopes
    table[:, 1:] = params.intercepts[:, : params.max_categories - 1]
    return table


def _params_from_slots(table: FloatArray, template: ItemParameters) -> ItemParameters:
    return ItemParameters(
        slopes=table[:, 0].copy(),
        intercepts=table[:, 1:].copy(),
        n_categories=template.n_categories,
        models=template.models,
    )


@dataclass(frozen=True)
class ExpectedCounts:
    """E-step output: ``counts[j, k, q]`` and the marginal log-likelihood."""

    counts: FloatArray
    log_likelihood: float


def expected_counts(
    params: ItemParameters,
    design: ResponseDesign,
    points: FloatArray,
    log_prior: FloatArray,
    weights: FloatArray,
) -> ExpectedCounts:
    """E-step: expected category counts per item and quadrature point.

    Parameters
    ----------
    log_prior : array of shape (n_points,) or (n_persons, n_points)
    weights : array of shape (n_persons,)
        Frequency weight of each row (pattern counts after compression).
    """
    base, contrast = split_log_table(params, points, design)
    row = log_prior + (base.sum(axis=0) if design.administered is None else 0.0)

    def block(rows: slice) -> tuple[FloatArray, FloatArray, float]:
        # Posterior of the rows in this block, folded straight into partial sums.
        joint = design.indicators[rows] @ contrast
        if design.administered is not None:
            joint += design.administered[rows] @ base
        joint += row
        peak = joint.max(axis=1)
        joint -= peak[:, None]
        np.exp(joint, out=joint)
        total = joint.sum(axis=1)
        w = weights[rows]
        joint *= (w / total)[:, None]
        log_lik = float(w @ (np.log(total) + peak))
        by_category = design.indicators[rows].T @ joint
        if design.administered is None:
            answered = np.broadcast_to(joint.sum(axis=0), (params.n_items, points.shape[0]))
        else:
            answered = design.administered[rows].T @ joint
        return by_category, answered, log_lik

    parts = run_blocks(block, design.n_persons, DEFAULT_CHUNK, workers=None)
    k_max = params.max_categories
    counts = np.zeros((params.n_items, k_max, points.shape[0]))
    counts[design.column_item, design.column_category, :] = sum(p[0] for p in parts)
    counts[:, 0, :] = sum(p[1] for p in parts) - counts[:, 1:, :].sum(axis=1)
    np.maximum(counts, 0.0, out=counts)  # rounding can leave -1e-13 in category 0
    return ExpectedCounts(counts=counts, log_likelihood=float(sum(p[2] for p in parts)))


def _item_blocks(
    params: ItemParameters, points: FloatArray, counts: FloatArray, prior: SlopePrior | None
) -> tuple[FloatArray, FloatArray, FloatArray]:
    """Per-item objective, gradient and expected information of the M-step.

    Returns ``objective`` (n_items,), ``gradient`` (n_items, k_max) and
    ``information`` (n_items, k_max, k_max) over slots (slope, intercepts...).
    """
    star = cumulative_probabilities(params, points)
    prob = star[:, :-1, :] - star[:, 1:, :]
    w = star * (1.0 - star)
    n_items, k_max, n_points = prob.shape
    jac = np.zeros((n_items, k_max, n_points, k_max))
    jac[..., 0] = points[None, None, :] * (w[:, :-1, :] - w[:, 1:, :])
    for m in range(1, k_max):
        jac[:, m, :, m] = w[:, m, :]
        jac[:, m - 1, :, m] = -w[:, m, :]
    positive = prob > 1e-300
    safe = np.where(positive, prob, 1.0)
    ratio = np.where(positive, counts / safe, 0.0)
    objective = np.sum(np.where(counts > 0, counts * np.log(safe), 0.0), axis=(1, 2))
    gradient = np.einsum("jkq,jkqp->jp", ratio, jac)
    at_point = counts.sum(axis=1, keepdims=True)
    info_weight = np.where(positive, at_point / safe, 0.0)
    information = np.einsum("jkq,jkqp,jkqr->jpr", info_weight, jac, jac)
    if prior is not None:
        objective = objective + prior.log_density(params.slopes)
        gradient[:, 0] += prior.gradient(params.slopes)
        information[:, 0, 0] += prior.curvature(params.slopes)
    return objective, gradient, information


def _valid(params: ItemParameters) -> np.ndarray:
    """Per item: finite parameters and strictly decreasing intercepts."""
    c = params.intercepts
    k = params.n_categories
    finite = np.isfinite(params.slopes)
    ok = finite.copy()
    for j in np.flatnonzero(finite):
        cj = c[j, : k[j] - 1]
        ok[j] = bool(np.all(np.isfinite(cj)) and np.all(np.diff(cj) < 0))
    return ok


def m_step(
    params: ItemParameters,
    counts: FloatArray,
    points: FloatArray,
    layout: ParameterLayout,
    *,
    prior: SlopePrior | None,
    n_iter: int,
) -> ItemParameters:
    """A few Fisher-scoring steps on the expected complete-data log-likelihood."""
    free = layout.index >= 0
    for _ in range(n_iter):
        objective, gradient, information = _item_blocks(params, points, counts, prior)
        if layout.shared:
            step_vec = _dense_direction(gradient, information, layout)
            step = np.where(free, step_vec[np.maximum(layout.index, 0)], 0.0)
        else:
            step = _block_direction(gradient, information, free)
        table = _slot_table(params)
        scale = np.ones(params.n_items)
        for _halving in range(12):
            trial = _params_from_slots(np.where(free, table + scale[:, None] * step, table), params)
            valid = _valid(trial)
            trial_obj = np.full(params.n_items, -np.inf)
            if valid.any():
                trial_obj_all, _, _ = _item_blocks(trial, points, counts, prior)
                trial_obj = np.where(valid, trial_obj_all, -np.inf)
            if layout.shared:
                if valid.all() and trial_obj.sum() >= objective.sum() - 1e-10:
                    break
                scale *= 0.5
            else:
                bad = trial_obj < objective - 1e-10
                if not bad.any():
                    break
                scale = np.where(bad, scale * 0.5, scale)
        else:
            # No improving step for some items: keep them where they are.
            keep = ~(_valid(trial)) | (trial_obj < objective - 1e-10)
            scale = np.where(keep, 0.0, scale)
        params = _params_from_slots(np.where(free, table + scale[:, None] * step, table), params)
        if np.max(np.abs(scale[:, None] * step)) < 1e-10:
            break
    return params


def _block_direction(gradient: FloatArray, information: FloatArray, free: np.ndarray) -> FloatArray:
    """Solve each item's (free-slot) Fisher system; fixed or absent slots get a zero step."""
    info = information.copy()
    grad = np.where(free, gradient, 0.0)
    fixed = ~free
    # Decouple fixed slots: zero their rows/columns and put 1 on the diagonal.
    info[fixed[:, :, None] | fixed[:, None, :]] = 0.0
    diag = np.einsum("jpp->jp", info)
    diag[fixed] = 1.0
    # A tiny ridge keeps near-singular blocks (e.g. a nearly flat item) solvable.
    diag += 1e-10
    return np.linalg.solve(info, grad[:, :, None])[:, :, 0]


def _dense_direction(gradient: FloatArray, information: FloatArray, layout: ParameterLayout) -> FloatArray:
    n = layout.n_free
    full = np.zeros((n, n))
    grad = layout.gather(gradient)
    for j in range(layout.index.shape[0]):
        idx = layout.index[j]
        ok = idx >= 0
        sel = idx[ok]
        full[np.ix_(sel, sel)] += information[j][np.ix_(ok, ok)]
    full[np.diag_indices(n)] += 1e-10
    return np.linalg.solve(full, grad)


def marginal_score(
    vec: FloatArray,
    layout: ParameterLayout,
    template: ItemParameters,
    design: ResponseDesign,
    points: FloatArray,
    log_prior: FloatArray,
    weights: FloatArray,
    prior: SlopePrior | None,
) -> FloatArray:
    """Gradient of the marginal log-likelihood (plus slope prior) in the free parameters.

    By Fisher's identity it equals the complete-data score evaluated at the
    expected counts of an E-step taken at ``vec``.
    """
    params = layout.from_vector(vec, template)
    counts = expected_counts(params, design, points, log_prior, weights).counts
    _, gradient, _ = _item_blocks(params, points, counts, prior)
    return layout.gather(gradient)


@dataclass(frozen=True)
class CalibrationFit:
    """Result of a single-group marginal ML calibration.

    ``slope_se`` and ``intercept_se`` hold NaN for fixed parameters (and for all
    parameters when SEs were not requested or the information was singular).
    """

    params: ItemParameters
    slope_se: FloatArray
    intercept_se: FloatArray
    log_likelihood: float
    n_parameters: int
    n_persons: int
    converged: bool
    n_iter: int
    covariance: FloatArray | None
    settings: EMSettings
    history: tuple[float, ...] = ()

    @property
    def aic(self) -> float:
        return -2.0 * self.log_likelihood + 2.0 * self.n_parameters

    @property
    def bic(self) -> float:
        return -2.0 * self.log_likelihood + self.n_parameters * math.log(self.n_persons)

    def threshold_se(self) -> FloatArray:
        """Delta-method SEs of ``b_k = -c_k / a`` (NaN where the covariance is unknown)."""
        return _threshold_se(self)

    def to_dict(self) -> dict[str, Any]:
        return {
            "log_likelihood": self.log_likelihood,
            "n_parameters": self.n_parameters,
            "n_persons": self.n_persons,
            "aic": self.aic,
            "bic": self.bic,
            "converged": self.converged,
            "n_iter": self.n_iter,
        }


def _threshold_se(fit: CalibrationFit) -> FloatArray:
    params = fit.params
    out = np.full_like(params.intercepts, np.nan)
    if fit.covariance is None:
        return out
    layout = ParameterLayout.build(params)
    a = params.slopes
    for j in range(params.n_items):
        ia = layout.index[j, 0]
        for k in range(params.n_categories[j] - 1):
            ic = layout.index[j, k + 1]
            c = params.intercepts[j, k]
            # b = -c/a: db/dc = -1/a, db/da = c/a^2
            g_c, g_a = -1.0 / a[j], c / a[j] ** 2
            var = g_c**2 * fit.covariance[ic, ic] + g_a**2 * fit.covariance[ia, ia]
            var += 2 * g_a * g_c * fit.covariance[ia, ic]
            out[j, k] = math.sqrt(var) if var > 0 else np.nan
    return out


def starting_values(
    responses: FloatArray, n_categories: IntArray, models: tuple[str, ...]
) -> ItemParameters:
    """Deterministic starting values from classical item statistics.

    Slope from the item-rest correlation r (normal-ogive approximation,
    ``a = 1.7 r / sqrt(1 - r^2)``, clipped to [0.3, 2.5]); intercepts from the
    cumulative proportions ``p_k = P(X >= k)`` as ``logit(p_k) * sqrt(1 + (a/1.7)^2)``,
    which undoes the attenuation of a logistic curve averaged over N(0, 1).
    """
    x = np.asarray(responses, dtype=np.float64)
    n_items = x.shape[1]
    k = np.asarray(n_categories, dtype=np.int64)
    scaled = x / (k - 1)[None, :]
    answered = ~np.isnan(scaled)
    row_total = np.nansum(scaled, axis=1)
    row_count = answered.sum(axis=1)
    slopes = np.empty(n_items)
    intercepts = np.full((n_items, int(k.max()) - 1), np.nan)
    for j in range(n_items):
        ok = answered[:, j] & (row_count > 1)
        item = scaled[ok, j]
        rest = (row_total[ok] - item) / (row_count[ok] - 1)
        r = 0.5
        if item.size > 2 and item.std() > 0 and rest.std() > 0:
            r = float(np.corrcoef(item, rest)[0, 1])
        r = min(max(r, 0.15), 0.9)
        slopes[j] = float(np.clip(1.7 * r / math.sqrt(1 - r * r), 0.3, 2.5))
        codes = x[answered[:, j], j]
        p = np.array([(codes >= c).mean() for c in range(1, k[j])])
        p = np.clip(p, 0.005, 0.995)
        c_k = np.log(p / (1 - p)) * math.sqrt(1 + (slopes[j] / 1.7) ** 2)
        # Enforce strict ordering even where categories are sparse.
        for m in range(1, c_k.size):
            c_k[m] = min(c_k[m], c_k[m - 1] - 0.05)
        intercepts[j, : k[j] - 1] = c_k
    return ItemParameters(slopes=slopes, intercepts=intercepts, n_categories=k, models=models)


def compress_patterns(responses: FloatArray) -> tuple[FloatArray, FloatArray, IntArray] | None:
    """Unique response rows, their frequencies and the map back (NaN kept as missing).

    Returns None when compression would save less than 20% of the rows; a cheap
    1-D key (a fixed random projection of each row) decides that before the exact,
    costlier row-wise ``np.unique``.
    """
    coded = np.where(np.isnan(responses), -1.0, responses)
    keys = coded @ np.random.default_rng(0).random(coded.shape[1])
    if np.unique(keys).size > 0.8 * coded.shape[0]:
        return None
    unique, inverse, counts = np.unique(coded, axis=0, return_inverse=True, return_counts=True)
    unique = np.where(unique < 0, np.nan, unique)
    return unique, counts.astype(np.float64), inverse.reshape(-1)


def _squarem_step(
    vec: FloatArray,
    em_map: Callable[[FloatArray], tuple[FloatArray, float]],
    current_ll: float,
) -> tuple[FloatArray, float, int]:
    """One SQUAREM cycle (scheme S3); returns the new vector, its log-likelihood and EM calls."""
    v1, _ = em_map(vec)
    v2, ll2 = em_map(v1)
    r = v1 - vec
    v = (v2 - v1) - r
    norm_v = float(np.linalg.norm(v))
    if norm_v == 0.0:
        return v2, ll2, 2
    alpha = -float(np.linalg.norm(r)) / norm_v
    alpha = min(alpha, -1.0)
    candidate = vec - 2 * alpha * r + alpha * alpha * v
    try:
        v3, ll3 = em_map(candidate)
    except (np.linalg.LinAlgError, FloatingPointError, ValueError):
        return v2, ll2, 3
    if np.all(np.isfinite(v3)) and ll3 >= ll2 - 1e-9:
        return v3, ll3, 3
    return v2, ll2, 3


def calibrate_single_group(
    responses: FloatArray,
    n_categories: IntArray,
    *,
    models: tuple[str, ...] = (),
    settings: EMSettings | None = None,
    start: ItemParameters | None = None,
    fixed: np.ndarray | None = None,
    progress: Callable[[int, float], None] | None = None,
) -> CalibrationFit:
    """Marginal ML item parameters with the latent distribution fixed at N(0, 1).

    Parameters
    ----------
    responses : array of shape (n_persons, n_items)
        Category codes 0 .. K_j - 1, NaN for not administered (validated input).
    n_categories : int array of shape (n_items,)
    models : per-item model names; "1pl" items share one slope.
    start : starting parameters (default: :func:`starting_values`).
    fixed : bool array of shape (n_items, max_categories); True holds a slot at ``start``.
    progress : called as ``progress(iteration, log_likelihood)``.
    """
    settings = settings or EMSettings()
    x = np.asarray(responses, dtype=np.float64)
    n_persons = x.shape[0]
    k = np.asarray(n_categories, dtype=np.int64)
    models = models or tuple("2pl" if kk == 2 else "grm" for kk in k)
    if start is None:
        start = starting_values(x, k, models)
    compressed = compress_patterns(x) if settings.compress_patterns else None
    if compressed is not None:
        rows, weights, _ = compressed
    else:
        rows, weights = x, np.ones(n_persons)
    design = build_design(rows, k)
    points = settings.quadrature.points
    log_prior = normal_log_weights(points)
    layout = ParameterLayout.build(start, fixed)
    prior = settings.slope_prior

    def em_map(vec: FloatArray) -> tuple[FloatArray, float]:
        params = layout.from_vector(vec, start)
        if not _valid(params).all():
            raise ValueError("invalid parameters")
        e = expected_counts(params, design, points, log_prior, weights)
        updated = m_step(params, e.counts, points, layout, prior=prior, n_iter=settings.m_step_iter)
        return layout.to_vector(updated), e.log_likelihood

    vec = layout.to_vector(start)
    history: list[float] = []
    converged = False
    n_iter = 0
    log_lik = -np.inf
    while n_iter < settings.max_iter:
        if settings.accelerate and n_iter >= 2:
            new_vec, new_ll, calls = _squarem_step(vec, em_map, log_lik)
        else:
            new_vec, new_ll = em_map(vec)
            calls = 1
        n_iter += calls
        change = float(np.max(np.abs(new_vec - vec))) if vec.size else 0.0
        vec, log_lik = new_vec, new_ll
        history.append(log_lik)
        if progress is not None:
            progress(n_iter, log_lik)
        if change < settings.tolerance:
            converged = True
            break
    params = layout.from_vector(vec, start)
    final = expected_counts(params, design, points, log_prior, weights)
    # The reported log-likelihood is the marginal likelihood alone (no slope prior term).
    log_lik = final.log_likelihood
    if not converged:
        warnings.warn(
            f"EM did not converge in {settings.max_iter} iterations "
            f"(last largest parameter change above {settings.tolerance:g}); "
            "estimates may be unstable: check for items with near-zero variance or raise max_iter",
            ConvergenceWarning,
            stacklevel=2,
        )

    covariance: FloatArray | None = None
    slope_se = np.full(params.n_items, np.nan)
    intercept_se = np.full_like(params.intercepts, np.nan)
    if settings.standard_errors and layout.n_free > 0:
        covariance = observed_covariance(vec, layout, start, design, points, log_prior, weights, prior)
        if covariance is not None:
            se = np.sqrt(np.clip(np.diag(covariance), 0.0, None))
            se_table = np.full((params.n_items, params.max_categories), np.nan)
            mask = layout.index >= 0
            se_table[mask] = se[layout.index[mask]]
            slope_se = se_table[:, 0]
            intercept_se = se_table[:, 1:]
    return CalibrationFit(
        params=params,
        slope_se=slope_se,
        intercept_se=intercept_se,
        log_likelihood=log_lik,
        n_parameters=layout.n_free,
        n_persons=n_persons,
        converged=converged,
        n_iter=n_iter,
        covariance=covariance,
        settings=settings,
        history=tuple(history),
    )


def observed_covariance(
    vec: FloatArray,
    layout: ParameterLayout,
    template: ItemParameters,
    design: ResponseDesign,
    points: FloatArray,
    log_prior: FloatArray,
    weights: FloatArray,
    prior: SlopePrior | None,
) -> FloatArray | None:
    """Inverse of the observed information (central differences of the marginal score).

    Returns None when the information matrix is not positive definite (an
    unidentified or boundary solution); callers then report NaN SEs.
    """
    n = vec.size
    hessian = np.empty((n, n))
    for p in range(n):
        h = 1e-4 * max(1.0, abs(vec[p]))
        up, down = vec.copy(), vec.copy()
        up[p] += h
        down[p] -= h
        g_up = marginal_score(up, layout, template, design, points, log_prior, weights, prior)
        g_down = marginal_score(down, layout, template, design, points, log_prior, weights, prior)
        hessian[:, p] = (g_up - g_down) / (2 * h)
    information = -0.5 * (hessian + hessian.T)
    try:
        chol = np.linalg.cholesky(information)
    except np.linalg.LinAlgError:
        return None
    inv_chol = np.linalg.inv(chol)
    return inv_chol.T @ inv_chol


def marginal_log_likelihood(
    params: ItemParameters,
    responses: FloatArray,
    *,
    grid: QuadratureGrid | None = None,
    mean: float = 0.0,
    sd: float = 1.0,
) -> float:
    """``sum_i log integral P(x_i | theta) N(theta; mean, sd) dtheta`` on a quadrature grid.

    Lets any parameter set (ours, or another estimator's) be judged on one footing.
    """
    grid = grid or EMSettings().quadrature
    points = grid.points
    design = build_design(np.asarray(responses, dtype=np.float64), params.n_categories)
    loglik = log_likelihood_grid(params, points, design, log_prior=normal_log_weights(points, mean, sd))
    peak = loglik.max(axis=1)
    return float(np.sum(peak + np.log(np.exp(loglik - peak[:, None]).sum(axis=1))))
