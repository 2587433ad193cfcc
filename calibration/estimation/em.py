"""Marginal maximum likelihood for 2PL / 1PL / graded items by Bock-Aitkin EM, one or many groups.

E-step (Bock & Aitkin 1981): posterior weights of every respondent over a fixed
quadrature grid, summed into expected counts ``r[j, k, q]`` (expected number of
respondents at point q answering item j in category k). Both sums are matrix
products over indicator matrices (see :mod:`calibration.irt.likelihood`).

M-step: Fisher scoring on ``sum_gjkq r[g,j,k,q] log P_gjk(theta_q)`` (plus an
optional log-normal slope prior) over the free parameters, whatever their sharing:
a slot shared by groups (an invariant item) or by items (the 1PL slope) has one
entry in the parameter vector. Groups other than the reference get a normal
latent density whose mean and SD are re-estimated from the posterior moments
(Bock & Zimowski 1997); the reference group stays N(0, 1).

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
    CALIBRATION_GRID,
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
    log_category_probabilities,
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
    quadrature: QuadratureGrid = field(default_factory=lambda: CALIBRATION_GRID)
    slope_prior: SlopePrior | None = None
    m_step_iter: int = 4
    accelerate: bool = True
    standard_errors: bool = True
    compress_patterns: bool = True


@dataclass(frozen=True)
class GroupLayout:
    """Which item parameters are free, per group, and where they sit in the parameter vector.

    ``index[g, j, s]`` is the position of slot ``s`` of item ``j`` in group ``g``
    (slot 0 = slope, slots 1.. = intercepts) in the free-item-parameter vector, or -1
    when the slot does not exist or is fixed. A slot a group shares with the
    reference group (group 0) has the reference group's index; "1pl" items share one
    slope. ``owner`` marks the first place each index appears (where a slope prior
    is counted once). ``coupled`` is True when one index spans several items.
    """

    index: IntArray
    owner: np.ndarray
    n_free: int
    coupled: bool

    @classmethod
    def build(
        cls,
        template: ItemParameters,
        n_groups: int = 1,
        *,
        group_free: np.ndarray | None = None,
        fixed: np.ndarray | None = None,
    ) -> GroupLayout:
        n_items, k_max = template.n_items, template.max_categories
        exists = np.arange(k_max)[None, :] < template.n_categories[:, None]
        shape = (n_groups, n_items, k_max)
        own = np.zeros(shape, dtype=bool) if group_free is None else np.asarray(group_free, dtype=bool)
        held = np.zeros(shape, dtype=bool) if fixed is None else np.asarray(fixed, dtype=bool)
        if held.shape == (n_items, k_max):
            held = np.broadcast_to(held, shape)
        index = np.full(shape, -1, dtype=np.int64)
        position = 0
        common_slope = -1
        for j in range(n_items):
            for s_ in range(k_max):
                if not exists[j, s_] or held[0, j, s_]:
                    continue
                if s_ == 0 and template.models[j] == MODEL_1PL:
                    if common_slope < 0:
                        common_slope, position = position, position + 1
                    index[0, j, 0] = common_slope
                else:
                    index[0, j, s_], position = position, position + 1
        for g in range(1, n_groups):
            for j in range(n_items):
                for s_ in range(k_max):
                    if not exists[j, s_]:
                        continue
                    if own[g, j, s_]:
                        if not held[g, j, s_]:
                            index[g, j, s_], position = position, position + 1
                    else:
                        index[g, j, s_] = index[0, j, s_]
        flat = index.reshape(-1)
        owner = np.zeros(flat.shape, dtype=bool)
        _, first = np.unique(flat, return_index=True)
        owner[first] = True
        owner &= flat >= 0
        items_of_index = {}
        for (_g, j, _s), i in np.ndenumerate(index):
            if i >= 0:
                items_of_index.setdefault(int(i), set()).add(j)
        coupled = any(len(v) > 1 for v in items_of_index.values())
        return cls(index=index, owner=owner.reshape(shape), n_free=position, coupled=coupled)

    def to_vector(self, tables: FloatArray) -> FloatArray:
        vec = np.zeros(self.n_free)
        mask = self.index >= 0
        vec[self.index[mask]] = tables[mask]
        return vec

    def from_vector(self, vec: FloatArray, tables: FloatArray) -> FloatArray:
        out = tables.copy()
        mask = self.index >= 0
        out[mask] = vec[self.index[mask]]
        return out

    def gather(self, per_slot: FloatArray) -> FloatArray:
        """Sum values of shape (n_groups, n_items, k_max) into the free vector."""
        vec = np.zeros(self.n_free)
        mask = self.index >= 0
        np.add.at(vec, self.index[mask], per_slot[mask])
        return vec


def slot_table(params: ItemParameters) -> FloatArray:
    """(n_items, k_max) table: slope in column 0, intercepts after (NaN padding)."""
    table = np.full((params.n_items, params.max_categories), np.nan)
    table[:, 0] = params.slopes
    table[:, 1:] = params.intercepts[:, : params.max_categories - 1]
    return table


def params_from_table(table: FloatArray, template: ItemParameters) -> ItemParameters:
    return ItemParameters(
        slopes=table[:, 0].copy(),
        intercepts=table[:, 1:].copy(),
        n_categories=template.n_categories,
        models=template.models,
    )


@dataclass(frozen=True)
class ExpectedCounts:
    """E-step output: ``counts[j, k, q]``, posterior mass per point and the log-likelihood."""

    counts: FloatArray
    point_mass: FloatArray
    log_likelihood: float


def expected_counts(
    params: ItemParameters,
    design: ResponseDesign,
    points: FloatArray,
    log_prior: FloatArray,
    weights: FloatArray,
    offset: FloatArray | None = None,
) -> ExpectedCounts:
    """E-step: expected category counts per item and quadrature point.

    Parameters
    ----------
    log_prior : array of shape (n_points,)
    weights : array of shape (n_persons,)
        Frequency weight of each row (pattern counts after compression).
    offset : array of shape (n_persons, n_points), optional
        Log-likelihood of items held outside this design (fixed items), added to every row.
    """
    base, contrast = split_log_table(params, points, design)
    row = log_prior + (base.sum(axis=0) if design.administered is None else 0.0)

    def block(rows: slice) -> tuple[FloatArray, FloatArray, FloatArray, float]:
        # Posterior of the rows in this block, folded straight into partial sums.
        joint = design.indicators[rows] @ contrast
        if design.administered is not None:
            joint += design.administered[rows] @ base
        joint += row
        if offset is not None:
            joint += offset[rows]
        peak = joint.max(axis=1)
        joint -= peak[:, None]
        np.exp(joint, out=joint)
        total = joint.sum(axis=1)
        w = weights[rows]
        joint *= (w / total)[:, None]
        log_lik = float(w @ (np.log(total) + peak))
        by_category = design.indicators[rows].T @ joint
        mass = joint.sum(axis=0)
        if design.administered is None:
            answered = np.broadcast_to(mass, (params.n_items, points.shape[0]))
        else:
            answered = design.administered[rows].T @ joint
        return by_category, answered, mass, log_lik

    parts = run_blocks(block, design.n_persons, DEFAULT_CHUNK, workers=None)
    k_max = params.max_categories
    counts = np.zeros((params.n_items, k_max, points.shape[0]))
    counts[design.column_item, design.column_category, :] = sum(p[0] for p in parts)
    counts[:, 0, :] = sum(p[1] for p in parts) - counts[:, 1:, :].sum(axis=1)
    np.maximum(counts, 0.0, out=counts)  # rounding can leave -1e-13 in category 0
    return ExpectedCounts(
        counts=counts, point_mass=sum(p[2] for p in parts), log_likelihood=float(sum(p[3] for p in parts))
    )


def _item_blocks(
    params: ItemParameters, points: FloatArray, counts: FloatArray
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
    return objective, gradient, information


def _item_objective(params: ItemParameters, points: FloatArray, counts: FloatArray) -> FloatArray:
    """``sum_kq r_jkq log P_jk(theta_q)`` per item (the M-step objective without derivatives)."""
    log_p = log_category_probabilities(params, points)
    return np.sum(np.where(counts > 0, counts * np.where(np.isfinite(log_p), log_p, -1e300), 0.0), axis=(1, 2))


def _valid_tables(tables: FloatArray, n_categories: IntArray) -> np.ndarray:
    """(n_groups, n_items): finite slots and strictly decreasing intercepts."""
    k_max = tables.shape[-1]
    exists = np.arange(k_max)[None, :] < n_categories[:, None]
    finite = np.where(exists[None], np.isfinite(tables), True).all(axis=-1)
    c = tables[..., 1:]
    both = exists[:, 2:]  # intercept pairs (m, m+1) that both exist
    if both.shape[1] == 0:
        return finite
    steps = c[..., 1:] - c[..., :-1]
    ordered = np.where(both[None], steps < 0, True).all(axis=-1)
    return finite & ordered


def _prior_terms(
    tables: FloatArray, layout: GroupLayout, prior: SlopePrior | None
) -> tuple[FloatArray, FloatArray, FloatArray]:
    """Slope-prior objective (per group and item), gradient and curvature (per slot), counted once per index."""
    shape = tables.shape
    objective = np.zeros(shape[:2])
    gradient = np.zeros(shape)
    curvature = np.zeros(shape)
    if prior is None:
        return objective, gradient, curvature
    slopes = tables[..., 0]
    counted = layout.owner[..., 0]
    safe = np.where(counted, slopes, 1.0)
    objective = np.where(counted, prior.log_density(safe), 0.0)
    gradient[..., 0] = np.where(counted, prior.gradient(safe), 0.0)
    curvature[..., 0] = np.where(counted, prior.curvature(safe), 0.0)
    return objective, gradient, curvature


def m_step(
    tables: FloatArray,
    template: ItemParameters,
    counts: FloatArray,
    points: FloatArray,
    layout: GroupLayout,
    *,
    prior: SlopePrior | None,
    n_iter: int,
) -> FloatArray:
    """A few Fisher-scoring steps on the expected complete-data log-likelihood.

    ``tables`` and the result have shape (n_groups, n_items, k_max); ``counts`` has
    shape (n_groups, n_items, k_max, n_points).
    """
    n_groups = tables.shape[0]
    free = layout.index >= 0
    idx = layout.index
    if layout.n_free == 0:
        return tables

    def evaluate(tabs: FloatArray, derivatives: bool) -> tuple[FloatArray, FloatArray | None, FloatArray | None]:
        prior_obj, prior_grad, prior_curv = _prior_terms(tabs, layout, prior)
        objective = prior_obj.copy()
        if not derivatives:
            for g in range(n_groups):
                objective[g] += _item_objective(params_from_table(tabs[g], template), points, counts[g])
            return objective, None, None
        gradient = prior_grad.copy()
        information = np.zeros(tabs.shape + (tabs.shape[-1],))
        for g in range(n_groups):
            obj_g, grad_g, info_g = _item_blocks(params_from_table(tabs[g], template), points, counts[g])
            objective[g] += obj_g
            gradient[g] += grad_g
            information[g] = info_g
        diag = np.einsum("gjpp->gjp", information)
        diag += prior_curv
        return objective, gradient, information

    for _ in range(n_iter):
        objective, gradient, information = evaluate(tables, True)
        assert gradient is not None and information is not None
        grad_vec = layout.gather(gradient)
        hessian = np.zeros((layout.n_free, layout.n_free))
        pair = free[..., :, None] & free[..., None, :]
        rows = np.broadcast_to(idx[..., :, None], pair.shape)[pair]
        cols = np.broadcast_to(idx[..., None, :], pair.shape)[pair]
        np.add.at(hessian, (rows, cols), information[pair])
        hessian[np.diag_indices(layout.n_free)] += 1e-10
        step_vec = np.linalg.solve(hessian, grad_vec)
        step = np.where(free, step_vec[np.maximum(idx, 0)], 0.0)
        item_objective = objective.sum(axis=0)
        n_items = tables.shape[1]
        scale = np.ones(n_items)
        accepted = np.zeros(n_items, dtype=bool)
        for _halving in range(12):
            trial = np.where(free, tables + scale[None, :, None] * step, tables)
            valid = _valid_tables(trial, template.n_categories).all(axis=0)
            trial_obj = np.full(n_items, -np.inf)
            if valid.any():
                safe_trial = np.where(valid[None, :, None], trial, tables)
                trial_obj = np.where(valid, evaluate(safe_trial, False)[0].sum(axis=0), -np.inf)
            good = valid & (trial_obj >= item_objective - 1e-10)
            if layout.coupled:
                # A parameter shared across items: judge the step by the total objective.
                if valid.all() and trial_obj.sum() >= item_objective.sum() - 1e-10:
                    accepted[:] = True
                    break
                scale *= 0.5
            else:
                accepted |= good
                if accepted.all():
                    break
                scale = np.where(accepted, scale, scale * 0.5)
        scale = np.where(accepted, scale, 0.0)  # no improving step: the item stays where it is
        tables = np.where(free, tables + scale[None, :, None] * step, tables)
        if np.max(np.abs(scale[None, :, None] * step)) < 1e-10:
            break
    return tables


def item_gradient(
    tables: FloatArray,
    template: ItemParameters,
    counts: FloatArray,
    points: FloatArray,
    layout: GroupLayout,
    *,
    prior: SlopePrior | None = None,
) -> FloatArray:
    """Gradient over the layout's free slots of the expected complete-data log-likelihood.

    With ``counts`` from the E-step at ``tables`` this is the marginal score (Fisher's identity),
    the quantity the observed information is differenced from.
    """
    gradient = _prior_terms(tables, layout, prior)[1]
    for g in range(tables.shape[0]):
        gradient[g] += _item_blocks(params_from_table(tables[g], template), points, counts[g])[1]
    return layout.gather(gradient)


@dataclass(frozen=True)
class LatentSpec:
    """Latent N(mean, sd) per group and which of them are estimated (group 0 is the reference)."""

    mean: FloatArray
    sd: FloatArray
    free_mean: np.ndarray
    free_sd: np.ndarray

    @classmethod
    def reference_fixed(cls, n_groups: int, *, free_mean: bool = True, free_sd: bool = True) -> LatentSpec:
        others = np.arange(n_groups) > 0
        return cls(
            mean=np.zeros(n_groups),
            sd=np.ones(n_groups),
            free_mean=others & free_mean,
            free_sd=others & free_sd,
        )

    @property
    def n_free(self) -> int:
        return int(self.free_mean.sum() + self.free_sd.sum())


def latent_update(
    mass: FloatArray, points: FloatArray, mean: float, sd: float, free_mean: bool, free_sd: bool
) -> tuple[float, float]:
    """Normal latent density from the posterior mass on the grid (Bock & Zimowski 1997 moments)."""
    total = mass.sum()
    if total <= 0:
        return mean, sd
    if free_mean:
        mean = float(mass @ points / total)
    if free_sd:
        sd = float(math.sqrt(max(mass @ (points - mean) ** 2 / total, 1e-4)))
    return mean, sd


def latent_score(mass: FloatArray, points: FloatArray, mean: float, sd: float) -> tuple[float, float]:
    """d/d mean and d/d sd of ``sum_q mass_q log w_q`` for the grid-normalised normal weights."""
    w = np.exp(normal_log_weights(points, mean, sd))
    total = mass.sum()
    z = points - mean
    d_mean = float((mass @ z - total * (w @ z)) / sd**2)
    d_sd = float((mass @ z**2 - total * (w @ z**2)) / sd**3)
    return d_mean, d_sd


@dataclass(frozen=True)
class GroupData:
    """One group's rows prepared for the E-step."""

    design: ResponseDesign
    weights: FloatArray
    offset: FloatArray | None
    n_persons: int


def prepare_groups(
    responses: FloatArray,
    n_categories: IntArray,
    group_index: IntArray,
    n_groups: int,
    *,
    offsets: list[FloatArray | None] | None = None,
    compress: bool = True,
) -> list[GroupData]:
    """Split rows by group (original order within a group); compress patterns where it pays."""
    out = []
    for g in range(n_groups):
        rows = responses[group_index == g]
        offset = None if offsets is None else offsets[g]
        compressed = compress_patterns(rows) if (compress and offset is None and rows.shape[0] > 0) else None
        if compressed is not None:
            unique, weights, _ = compressed
            out.append(GroupData(build_design(unique, n_categories), weights, None, rows.shape[0]))
        else:
            out.append(GroupData(build_design(rows, n_categories), np.ones(rows.shape[0]), offset, rows.shape[0]))
    return out


@dataclass(frozen=True)
class MultiGroupFit:
    """Result of a multiple-group marginal ML calibration.

    ``tables[g]`` holds group g's (slope, intercepts...) per item; ``slot_se`` the SEs
    (NaN for fixed slots). Latent arrays have shape (n_groups,); SEs are NaN where fixed.
    """

    template: ItemParameters
    tables: FloatArray
    slot_se: FloatArray
    latent_mean: FloatArray
    latent_sd: FloatArray
    latent_mean_se: FloatArray
    latent_sd_se: FloatArray
    log_likelihood: float
    group_log_likelihood: FloatArray
    n_parameters: int
    n_persons: int
    converged: bool
    n_iter: int
    covariance: FloatArray | None
    layout: GroupLayout
    latent: LatentSpec
    settings: EMSettings
    history: tuple[float, ...] = ()

    def group_params(self, g: int) -> ItemParameters:
        return params_from_table(self.tables[g], self.template)

    @property
    def aic(self) -> float:
        return -2.0 * self.log_likelihood + 2.0 * self.n_parameters

    @property
    def bic(self) -> float:
        return -2.0 * self.log_likelihood + self.n_parameters * math.log(max(self.n_persons, 1))


def run_em(
    vec: FloatArray,
    em_map: Callable[[FloatArray], tuple[FloatArray, float]],
    settings: EMSettings,
    *,
    progress: Callable[[int, float], None] | None = None,
    warn: bool = True,
) -> tuple[FloatArray, bool, int, tuple[float, ...]]:
    """Iterate an EM map (SQUAREM-accelerated) to the convergence criterion.

    ``em_map(vec)`` returns the updated vector and the log-likelihood at ``vec``.
    Warns with :class:`ConvergenceWarning` when ``max_iter`` is reached, unless ``warn`` is
    False (callers that report non-convergence themselves, e.g. in a bundle's warnings).
    """
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
    if not converged and warn:
        warnings.warn(
            f"EM did not converge in {settings.max_iter} iterations "
            f"(last largest parameter change above {settings.tolerance:g}); "
            "estimates may be unstable: check for items with near-zero variance or raise max_iter",
            ConvergenceWarning,
            stacklevel=3,
        )
    return vec, converged, n_iter, tuple(history)


def calibrate_groups(
    responses: FloatArray,
    n_categories: IntArray,
    group_index: IntArray,
    n_groups: int,
    *,
    models: tuple[str, ...] = (),
    settings: EMSettings | None = None,
    group_free: np.ndarray | None = None,
    fixed: np.ndarray | None = None,
    start: FloatArray | None = None,
    latent: LatentSpec | None = None,
    offsets: list[FloatArray | None] | None = None,
    progress: Callable[[int, float], None] | None = None,
    warn: bool = True,
) -> MultiGroupFit:
    """Multiple-group marginal ML (Bock & Zimowski 1997) by EM over a fixed quadrature grid.

    Parameters
    ----------
    responses : array of shape (n_persons, n_items); codes or NaN (validated input)
    group_index : int array of shape (n_persons,), 0 .. n_groups - 1; group 0 is the reference
    group_free : bool array (n_groups, n_items, k_max); True gives group g its own value of a slot
        (default: every slot shared with the reference group)
    fixed : bool array (n_groups, n_items, k_max) or (n_items, k_max); True holds a slot at ``start``
    start : slot tables (n_groups, n_items, k_max); default from classical statistics
    latent : latent means/SDs and which are estimated (default: reference N(0,1), others free)
    offsets : per group, an (n_rows_g, n_points) log-likelihood of items outside this fit
    warn : False leaves non-convergence to the caller (``converged`` in the result) instead of warning
    """
    settings = settings or EMSettings()
    x = np.asarray(responses, dtype=np.float64)
    k = np.asarray(n_categories, dtype=np.int64)
    gi = np.asarray(group_index, dtype=np.int64)
    models = models or tuple("2pl" if kk == 2 else "grm" for kk in k)
    template = starting_values(x, k, models)
    if start is None:
        tables = np.broadcast_to(slot_table(template), (n_groups,) + slot_table(template).shape).copy()
    else:
        tables = np.array(start, dtype=np.float64)
        template = params_from_table(tables[0], template)
    latent = latent or LatentSpec.reference_fixed(n_groups)
    layout = GroupLayout.build(template, n_groups, group_free=group_free, fixed=fixed)
    groups = prepare_groups(x, k, gi, n_groups, offsets=offsets, compress=settings.compress_patterns)
    points = settings.quadrature.points
    prior = settings.slope_prior
    n_item_free = layout.n_free

    def pack(tabs: FloatArray, mean: FloatArray, sd: FloatArray) -> FloatArray:
        return np.concatenate([layout.to_vector(tabs), mean[latent.free_mean], sd[latent.free_sd]])

    def unpack(vec: FloatArray) -> tuple[FloatArray, FloatArray, FloatArray]:
        tabs = layout.from_vector(vec[:n_item_free], tables)
        mean, sd = latent.mean.copy(), latent.sd.copy()
        n_mean = int(latent.free_mean.sum())
        mean[latent.free_mean] = vec[n_item_free : n_item_free + n_mean]
        sd[latent.free_sd] = vec[n_item_free + n_mean :]
        return tabs, mean, sd

    def e_step(vec: FloatArray) -> tuple[FloatArray, FloatArray, FloatArray, FloatArray, list[ExpectedCounts]]:
        tabs, mean, sd = unpack(vec)
        if not _valid_tables(tabs, k).all() or np.any(sd <= 0) or not np.all(np.isfinite(mean)):
            raise ValueError("invalid parameters")
        results = [
            expected_counts(
                params_from_table(tabs[g], template),
                data.design,
                points,
                normal_log_weights(points, mean[g], sd[g]),
                data.weights,
                data.offset,
            )
            for g, data in enumerate(groups)
        ]
        return tabs, mean, sd, np.stack([r.counts for r in results]), results

    def em_map(vec: FloatArray) -> tuple[FloatArray, float]:
        tabs, mean, sd, counts, results = e_step(vec)
        tabs = m_step(tabs, template, counts, points, layout, prior=prior, n_iter=settings.m_step_iter)
        for g, r in enumerate(results):
            mean[g], sd[g] = latent_update(
                r.point_mass, points, mean[g], sd[g], bool(latent.free_mean[g]), bool(latent.free_sd[g])
            )
        return pack(tabs, mean, sd), float(sum(r.log_likelihood for r in results))

    vec, converged, n_iter, history = run_em(
        pack(tables, latent.mean, latent.sd), em_map, settings, progress=progress, warn=warn
    )
    tabs, mean, sd, _, results = e_step(vec)
    group_ll = np.array([r.log_likelihood for r in results])

    def score(v: FloatArray) -> FloatArray:
        t, m, s_, counts, res = e_step(v)
        latent_grad = [latent_score(r.point_mass, points, m[g], s_[g]) for g, r in enumerate(res)]
        d_mean = np.array([d[0] for d in latent_grad])[latent.free_mean]
        d_sd = np.array([d[1] for d in latent_grad])[latent.free_sd]
        return np.concatenate([item_gradient(t, template, counts, points, layout, prior=prior), d_mean, d_sd])

    covariance = None
    slot_se = np.full(tabs.shape, np.nan)
    mean_se = np.full(n_groups, np.nan)
    sd_se = np.full(n_groups, np.nan)
    if settings.standard_errors and vec.size > 0:
        covariance = observed_covariance(vec, score)
        if covariance is not None:
            se = np.sqrt(np.clip(np.diag(covariance), 0.0, None))
            mask = layout.index >= 0
            slot_se[mask] = se[layout.index[mask]]
            n_mean = int(latent.free_mean.sum())
            mean_se[latent.free_mean] = se[n_item_free : n_item_free + n_mean]
            sd_se[latent.free_sd] = se[n_item_free + n_mean :]
    return MultiGroupFit(
        template=template,
        tables=tabs,
        slot_se=slot_se,
        latent_mean=mean,
        latent_sd=sd,
        latent_mean_se=mean_se,
        latent_sd_se=sd_se,
        log_likelihood=float(group_ll.sum()),
        group_log_likelihood=group_ll,
        n_parameters=int(vec.size),
        n_persons=int(sum(d.n_persons for d in groups)),
        converged=converged,
        n_iter=n_iter,
        covariance=covariance,
        layout=layout,
        latent=latent,
        settings=settings,
        history=history,
    )


def observed_covariance(vec: FloatArray, score: Callable[[FloatArray], FloatArray]) -> FloatArray | None:
    """Inverse of the observed information: central differences of the analytic marginal score.

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
        hessian[:, p] = (score(up) - score(down)) / (2 * h)
    information = -0.5 * (hessian + hessian.T)
    try:
        chol = np.linalg.cholesky(information)
    except np.linalg.LinAlgError:
        return None
    inv_chol = np.linalg.inv(chol)
    return inv_chol.T @ inv_chol


@dataclass(frozen=True)
class CalibrationFit:
    """Result of a single-group marginal ML calibration (latent density N(0, 1)).

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
    layout: GroupLayout
    history: tuple[float, ...] = ()

    @property
    def aic(self) -> float:
        return -2.0 * self.log_likelihood + 2.0 * self.n_parameters

    @property
    def bic(self) -> float:
        return -2.0 * self.log_likelihood + self.n_parameters * math.log(self.n_persons)

    def threshold_se(self) -> FloatArray:
        """Delta-method SEs of ``b_k = -c_k / a`` (NaN where the covariance is unknown)."""
        return threshold_se(self.params, self.layout.index[0], self.covariance)

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


def threshold_se(params: ItemParameters, index: IntArray, covariance: FloatArray | None) -> FloatArray:
    """Delta-method SEs of ``b_k = -c_k / a`` from a covariance over the free parameters.

    ``index`` is (n_items, k_max): each slot's position in the covariance, -1 if fixed.
    """
    out = np.full_like(params.intercepts, np.nan)
    if covariance is None:
        return out
    a = params.slopes
    for j in range(params.n_items):
        ia = index[j, 0]
        for m in range(params.n_categories[j] - 1):
            ic = index[j, m + 1]
            c = params.intercepts[j, m]
            # b = -c/a: db/dc = -1/a, db/da = c/a^2; a fixed slot contributes no variance.
            g_c, g_a = -1.0 / a[j], c / a[j] ** 2
            var = 0.0
            if ic >= 0:
                var += g_c**2 * covariance[ic, ic]
            if ia >= 0:
                var += g_a**2 * covariance[ia, ia]
            if ia >= 0 and ic >= 0:
                var += 2 * g_a * g_c * covariance[ia, ic]
            out[j, m] = math.sqrt(var) if var > 0 else np.nan
    return out


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

    The one-group case of :func:`calibrate_groups`.

    Parameters
    ----------
    responses : array of shape (n_persons, n_items)
        Category codes 0 .. K_j - 1, NaN for not administered (validated input).
    n_categories : int array of shape (n_items,)
    models : per-item model names; "1pl" items share one slope.
    start : starting parameters (default: classical starting values).
    fixed : bool array of shape (n_items, max_categories); True holds a slot at ``start``.
    progress : called as ``progress(iteration, log_likelihood)``.
    """
    x = np.asarray(responses, dtype=np.float64)
    k = np.asarray(n_categories, dtype=np.int64)
    if start is not None and not models:
        models = start.models
    fit = calibrate_groups(
        x,
        k,
        np.zeros(x.shape[0], dtype=np.int64),
        1,
        models=models,
        settings=settings,
        fixed=None if fixed is None else np.asarray(fixed, dtype=bool)[None],
        start=None if start is None else slot_table(start)[None],
        latent=LatentSpec.reference_fixed(1),
        progress=progress,
    )
    params = fit.group_params(0)
    return CalibrationFit(
        params=params,
        slope_se=fit.slot_se[0, :, 0],
        intercept_se=fit.slot_se[0, :, 1:],
        log_likelihood=fit.log_likelihood,
        n_parameters=fit.n_parameters,
        n_persons=fit.n_persons,
        converged=fit.converged,
        n_iter=fit.n_iter,
        covariance=fit.covariance,
        settings=fit.settings,
        layout=fit.layout,
        history=fit.history,
    )


def starting_values(responses: FloatArray, n_categories: IntArray, models: tuple[str, ...]) -> ItemParameters:
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
