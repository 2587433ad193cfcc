"""M-step: Fisher scoring on the expected complete-data log-likelihood over the free slots.

``sum_gjkq r[g,j,k,q] log P_gjk(theta_q)`` (plus an optional log-normal slope prior and the
asymptote prior of the 3PL items),
whatever the slots' sharing: a slot shared by groups (an invariant item) or by items
(the 1PL slope) has one entry in the parameter vector.
"""

from __future__ import annotations

import numpy as np

from calibration.estimation.layout import GroupLayout, params_from_table, valid_tables
from calibration.estimation.settings import GUESSING_PRIOR, SlopePrior
from calibration.irt.models import (
    GUESSING_SLOT,
    PROBABILITY_FLOOR,
    FloatArray,
    ItemParameters,
    category_parameter_derivatives,
    log_category_probabilities,
)

STEP_HALVINGS = 12
"""Step-halvings tried before an item keeps its current values for this M-step."""
LOG_OF_ZERO = -1e300
"""Stands in for log 0 where a category with expected counts has probability 0 (an invalid trial step)."""
RIDGE = 1e-10
"""Added to the information's diagonal so a flat direction does not make the solve singular."""


def _item_blocks(
    params: ItemParameters, points: FloatArray, counts: FloatArray
) -> tuple[FloatArray, FloatArray, FloatArray]:
    """Per-item objective, gradient and expected information of the M-step.

    Returns ``objective`` (n_items,), ``gradient`` (n_items, k_max) and
    ``information`` (n_items, k_max, k_max) over slots (slope, intercepts...).
    """
    prob, jac, _ = category_parameter_derivatives(params, points)
    positive = prob > PROBABILITY_FLOOR
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
    return np.sum(np.where(counts > 0, counts * np.where(np.isfinite(log_p), log_p, LOG_OF_ZERO), 0.0), axis=(1, 2))


def _prior_terms(
    tables: FloatArray, layout: GroupLayout, prior: SlopePrior | None, template: ItemParameters
) -> tuple[FloatArray, FloatArray, FloatArray]:
    """Prior objective (per group and item), gradient and curvature (per slot), counted once per index:
    the optional slope prior, and the asymptote prior of every estimated 3PL asymptote."""
    shape = tables.shape
    objective = np.zeros(shape[:2])
    gradient = np.zeros(shape)
    curvature = np.zeros(shape)
    if prior is not None:
        slopes = tables[..., 0]
        counted = layout.owner[..., 0]
        safe = np.where(counted, slopes, 1.0)
        objective = np.where(counted, prior.log_density(safe), 0.0)
        gradient[..., 0] = np.where(counted, prior.gradient(safe), 0.0)
        curvature[..., 0] = np.where(counted, prior.curvature(safe), 0.0)
    if template.has_guessing.any():
        counted = layout.owner[..., GUESSING_SLOT] & template.has_guessing[None, :]
        gamma = np.where(counted, tables[..., GUESSING_SLOT], 0.0)
        objective = objective + np.where(counted, GUESSING_PRIOR.log_density(gamma), 0.0)
        gradient[..., GUESSING_SLOT] = np.where(counted, GUESSING_PRIOR.gradient(gamma), 0.0)
        curvature[..., GUESSING_SLOT] = np.where(counted, -GUESSING_PRIOR.second_derivative(gamma), 0.0)
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

    def evaluate(tabs: FloatArray, *, derivatives: bool) -> tuple[FloatArray, FloatArray | None, FloatArray | None]:
        prior_obj, prior_grad, prior_curv = _prior_terms(tabs, layout, prior, template)
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
        objective, gradient, information = evaluate(tables, derivatives=True)
        assert gradient is not None and information is not None
        grad_vec = layout.gather(gradient)
        hessian = np.zeros((layout.n_free, layout.n_free))
        pair = free[..., :, None] & free[..., None, :]
        rows = np.broadcast_to(idx[..., :, None], pair.shape)[pair]
        cols = np.broadcast_to(idx[..., None, :], pair.shape)[pair]
        np.add.at(hessian, (rows, cols), information[pair])
        hessian[np.diag_indices(layout.n_free)] += RIDGE
        step_vec = np.linalg.solve(hessian, grad_vec)
        step = np.where(free, step_vec[np.maximum(idx, 0)], 0.0)
        item_objective = objective.sum(axis=0)
        n_items = tables.shape[1]
        scale = np.ones(n_items)
        accepted = np.zeros(n_items, dtype=bool)
        for _halving in range(STEP_HALVINGS):
            trial = np.where(free, tables + scale[None, :, None] * step, tables)
            valid = valid_tables(trial, template).all(axis=0)
            trial_obj = np.full(n_items, -np.inf)
            if valid.any():
                safe_trial = np.where(valid[None, :, None], trial, tables)
                trial_obj = np.where(valid, evaluate(safe_trial, derivatives=False)[0].sum(axis=0), -np.inf)
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
    gradient = _prior_terms(tables, layout, prior, template)[1]
    for g in range(tables.shape[0]):
        gradient[g] += _item_blocks(params_from_table(tables[g], template), points, counts[g])[1]
    return layout.gather(gradient)
