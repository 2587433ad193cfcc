"""Analytic observed information of the marginal log-likelihood (Louis 1982).

For respondent i with posterior ``p_iq`` over the grid and complete-data score ``s_iq`` (the
derivative of ``log P(x_i | theta_q) + log w_q`` in the parameters), the Hessian of the
marginal log-likelihood is

    H = sum_i n_i ( E_i[d2 log f] + E_i[s s^T] - E_i[s] E_i[s]^T ),

the complete-data Hessian's posterior mean plus the score's posterior covariance. Each part is
built from tables over the grid:

* ``E[d2 log f]`` item by item from the expected category counts (the item's second
  derivatives ``d2 P / P - (dP / P)(dP / P)^T``) and, for a group's latent mean and SD, from
  the posterior mass;
* ``E[s s^T]`` from the respondents' answer indicators ``Z`` (a constant column, one
  "administered" column per item with missing answers, one column per category >= 1): at each
  grid point the score is ``E_q^T Z_i`` for a loading table ``E_q``, so the sum is
  ``sum_q E_q^T (Z^T diag(n p_q) Z) E_q``, one pass over the rows for the Gram tables;
* ``E[s]`` per respondent from the posterior and the same loadings.

Every part is exact at the fitted quadrature (the finite-difference Hessian in the tests agrees
to rounding); a pass over the data costs about one E-step plus the Gram tables.
"""

from __future__ import annotations

from collections.abc import Sequence
from dataclasses import dataclass

import numpy as np
from scipy import sparse

from calibration.estimation.estep import GroupData, HeldLikelihood
from calibration.estimation.latent import LatentSpec, latent_derivatives
from calibration.estimation.layout import GroupLayout, params_from_table
from calibration.estimation.settings import GUESSING_PRIOR, SlopePrior
from calibration.irt.likelihood import (
    exp_by_rows,
    log_likelihood_grid,
    normal_log_weights,
    normal_weights,
    run_blocks,
    split_log_table,
)
from calibration.irt.models import (
    GUESSING_SLOT,
    PROBABILITY_FLOOR,
    FloatArray,
    IntArray,
    ItemParameters,
    category_parameter_derivatives,
)

POSTERIOR_FLOOR = 1e-15
"""Grid points where no respondent of a block has posterior weight above this are left out of its Gram
tables (their share of any entry is below 1e-15 of a respondent's weight)."""
GRAM_SPANS = 8
"""Spans of rows the Gram pass hands to the threads (each sums its blocks as it goes)."""
GRAM_BLOCK_ROWS = 2_048
"""Rows per block of the Gram pass: few enough that a block's posteriors share a narrow band of the grid."""


@dataclass(frozen=True)
class _ItemTables:
    """Per item, category, point and slot: ``d log P`` and the complete-data Hessian ``d2 log P``."""

    score: FloatArray  # (J, K, Q, S)
    hessian: FloatArray  # (J, K, Q, S, S)

    @classmethod
    def build(cls, params: ItemParameters, points: FloatArray) -> _ItemTables:
        prob, jac, second = category_parameter_derivatives(params, points, second=True)
        assert second is not None
        positive = prob > PROBABILITY_FLOOR
        inverse = np.where(positive, 1.0 / np.where(positive, prob, 1.0), 0.0)
        score = jac * inverse[..., None]
        hessian = second * inverse[..., None, None] - score[..., :, None] * score[..., None, :]
        return cls(score, hessian)


def information_to_covariance(information: FloatArray) -> FloatArray | None:
    """Inverse of a symmetric information matrix; None when it is not positive definite.

    A singular or indefinite information marks an unidentified or boundary solution; callers then
    report NaN SEs.
    """
    symmetric = 0.5 * (information + information.T)
    try:
        chol = np.linalg.cholesky(symmetric)
    except np.linalg.LinAlgError:
        return None
    inv_chol = np.linalg.inv(chol)
    return inv_chol.T @ inv_chol


def _scatter(target: FloatArray, local: FloatArray, index: IntArray) -> None:
    """Add ``local`` (T, T) into ``target`` at ``index`` (T,), skipping entries whose index is -1."""
    keep = np.flatnonzero(index >= 0)
    if keep.size == 0:
        return
    rows = index[keep]
    np.add.at(target, (rows[:, None], rows[None, :]), local[np.ix_(keep, keep)])


def pair_sums(z: FloatArray, weights: FloatArray) -> FloatArray:
    """``sum_i weights[i, q] z[i, a] z[i, b]`` for every pair of columns ``a <= b`` of a 0/1 matrix.

    Parameters
    ----------
    z : array of shape (n_rows, c), every entry 0 or 1
    weights : array of shape (n_rows, n_weights)

    Returns
    -------
    array of shape (c + 1, c + 1, n_weights)
        Entry ``[a, b]`` for ``a <= b < c``; the rest (``a > b``, and the last row and column, which
        collect the padding) are left for the caller to ignore.

    Only the pairs of columns that are both 1 in a row are visited: each row's nonzero columns,
    padded to the widest row with the extra column ``c``, give one code ``a * (c + 1) + b`` per
    pair, and one sparse product sums the weights by code. With answer indicators (one nonzero
    column per answered item) this is ``n_rows x items^2 / 2`` additions per weight, not the
    ``n_rows x c^2 / 2`` of a dense Gram product.
    """
    n_rows, c = z.shape
    out_size = (c + 1) * (c + 1)
    rows, cols = np.nonzero(z)  # row-major: each row's columns in increasing order
    per_row = np.bincount(rows, minlength=n_rows)
    width = int(per_row.max(initial=0))
    if width == 0:
        return np.zeros((c + 1, c + 1, weights.shape[1]))
    index_type = np.int32 if out_size < np.iinfo(np.int32).max else np.int64
    padded = np.full((n_rows, width), c, dtype=index_type)
    padded[rows, np.arange(rows.size) - np.repeat(np.cumsum(per_row) - per_row, per_row)] = cols
    first, second = np.triu_indices(width)
    codes = padded[:, first] * index_type(c + 1) + padded[:, second]
    row_start = np.arange(0, codes.size + 1, first.size, dtype=index_type)
    indicator = sparse.csr_array((np.ones(codes.size), codes.reshape(-1), row_start), shape=(n_rows, out_size))
    return np.asarray(indicator.T @ weights).reshape(c + 1, c + 1, -1)


def _group_hessian(params: ItemParameters, data: GroupData, points: FloatArray, mean: float, sd: float) -> FloatArray:
    """Hessian of one group's marginal log-likelihood over every slot and its latent (mean, SD).

    Local order: item j's slots at ``j * S .. j * S + S - 1`` (S = max_slots), then the mean, then the SD.
    """
    design = data.design
    n_items, k_max, n_points = params.n_items, params.max_slots, points.size  # k_max: slots per item
    n_slots = n_items * k_max
    size = n_slots + 2
    items = _ItemTables.build(params, points)
    lat_score, lat_hessian = latent_derivatives(points, mean, sd)
    col_item, col_cat = design.column_item, design.column_category
    if design.administered is None:
        gappy = np.zeros(0, dtype=np.int64)
    else:
        gappy = np.flatnonzero((design.administered == 0).any(axis=0))
    whole = np.setdiff1d(np.arange(n_items), gappy)
    base_score = items.score[:, 0]  # (J, Q, S): score of category 0
    # Loadings: the score at point q is E[q]^T Z_i over the columns of Z = [1, A_gappy, X].
    n_cols = 1 + gappy.size + col_item.size
    loadings = np.zeros((n_points, n_cols, size))
    slot_of = np.arange(n_slots).reshape(n_items, k_max)
    loadings[:, 0, slot_of[whole]] = np.moveaxis(base_score[whole], 0, 1)
    loadings[:, 0, n_slots:] = lat_score
    loadings[:, 1 + np.arange(gappy.size)[:, None], slot_of[gappy]] = np.moveaxis(base_score[gappy], 0, 1)
    contrast = items.score[col_item, col_cat] - base_score[col_item]  # (C, Q, S)
    x_cols = 1 + gappy.size + np.arange(col_item.size)
    loadings[:, x_cols[:, None], slot_of[col_item]] = np.moveaxis(contrast, 0, 1)
    # Per respondent, E_i[s] is gathered item by item: the constant column's loading, the
    # administered columns' and the category columns', each only on its own item's slots.
    const_load = loadings[:, 0, :]  # (Q, size)
    gappy_load = np.moveaxis(base_score[gappy], 0, 1).reshape(n_points, -1)
    # Each respondent's answered category picks one column of the contrasts' loadings: column 0 is
    # zero (category 0 or no answer), item j's category k >= 1 is column first[j] + k.
    contrast_load = np.concatenate([np.zeros((n_points, 1, k_max)), np.moveaxis(contrast, 0, 1)], axis=1)
    contrast_load = contrast_load.reshape(n_points, -1)
    first = np.flatnonzero(np.r_[True, col_item[1:] != col_item[:-1]])  # every item has a column
    category_of = np.zeros((col_item.size, n_items))
    category_of[np.arange(col_item.size), col_item] = col_cat
    n_binary = n_cols - 1  # the 0/1 columns of Z after the constant
    log_prior = normal_log_weights(points, mean, sd)
    tables = split_log_table(params, points, design)

    # Rows in order of their proportion of the maximum score, so that a block's posteriors share
    # a narrow band of the grid and the Gram tables need only the points where they have mass.
    order = np.argsort(design.summed_score / np.maximum(design.max_score, 1.0), kind="stable")

    def block(rows: slice) -> tuple[FloatArray, FloatArray, FloatArray]:
        taken = order[rows]
        part = design.rows(taken)
        post, _ = exp_by_rows(log_likelihood_grid(params, points, part, tables=tables, log_prior=log_prior))
        post /= post.sum(axis=1, keepdims=True)
        n_i = data.weights[taken]
        weighted = post * n_i[:, None]
        indicators = part.indicators
        administered = None if part.administered is None else part.administered[:, gappy]
        z = indicators if administered is None else np.hstack([administered, indicators])
        band = np.flatnonzero(post.max(axis=0) > POSTERIOR_FLOOR)
        lo, hi = (int(band[0]), int(band[-1]) + 1) if band.size else (0, 0)
        pairs = np.zeros((n_binary + 1, n_binary + 1, n_points))
        pairs[:, :, lo:hi] = pair_sums(z, weighted[:, lo:hi])
        mean_score = post @ const_load
        by_item = mean_score[:, :n_slots].reshape(-1, n_items, k_max)  # a view or a copy: written back below
        if gappy.size:
            by_item[:, gappy] += administered[:, :, None] * (post @ gappy_load).reshape(-1, gappy.size, k_max)
        answered = (indicators @ category_of).astype(np.int64)  # (rows, J): the category, 0 for none
        picked = np.where(answered > 0, first + answered, 0)
        by_column = (post @ contrast_load).reshape(-1, col_item.size + 1, k_max)
        by_item += np.take_along_axis(by_column, picked[:, :, None], axis=1)
        mean_score[:, :n_slots] = by_item.reshape(-1, n_slots)
        cross = mean_score.T @ (mean_score * n_i[:, None])
        return pairs, cross, weighted.sum(axis=0)

    def span(rows: slice) -> tuple[FloatArray, ...]:
        # A few large spans per thread, each summing its small blocks as it goes: memory stays flat.
        sums: tuple[FloatArray, ...] = ()
        for start in range(rows.start, rows.stop, GRAM_BLOCK_ROWS):
            part = block(slice(start, min(start + GRAM_BLOCK_ROWS, rows.stop)))
            sums = part if not sums else tuple(a + b for a, b in zip(sums, part, strict=True))
        return sums

    span_rows = max(GRAM_BLOCK_ROWS, -(-design.n_persons // GRAM_SPANS))
    parts = [p for p in run_blocks(span, design.n_persons, span_rows, workers=None) if p]
    pairs = sum(p[0] for p in parts)[:n_binary, :n_binary]  # (c, c, Q): a <= b filled
    cross = sum(p[1] for p in parts)
    mass = sum(p[2] for p in parts)
    column_sums = np.einsum("aaq->aq", pairs)  # a 0/1 column times itself is the column
    gram = np.empty((n_points, n_cols, n_cols))
    gram[:, 1:, 1:] = np.moveaxis(pairs + pairs.transpose(1, 0, 2), 2, 0)
    gram[:, np.arange(1, n_cols), np.arange(1, n_cols)] = column_sums.T
    gram[:, 0, 1:] = column_sums.T
    gram[:, 1:, 0] = column_sums.T
    gram[:, 0, 0] = mass
    gappy_answered, category_counts = column_sums[: gappy.size], column_sums[gappy.size :]
    # Expected counts r[j, k, q], category 0 as answered minus the rest.
    counts = np.zeros((n_items, params.max_categories, n_points))
    counts[col_item, col_cat] = category_counts
    answered = np.broadcast_to(mass, (n_items, n_points)).copy()
    if gappy.size:
        answered[gappy] = gappy_answered
    counts[:, 0] = answered - counts[:, 1:].sum(axis=1)
    np.maximum(counts, 0.0, out=counts)
    hessian = np.zeros((size, size))
    item_part = np.einsum("jkq,jkqst->jst", counts, items.hessian)
    for j in range(n_items):
        sl = slice(j * k_max, (j + 1) * k_max)
        hessian[sl, sl] = item_part[j]
    hessian[n_slots:, n_slots:] = np.einsum("q,qst->st", mass, lat_hessian)
    spread = np.matmul(gram, loadings)  # (Q, n_cols, size)
    hessian += loadings.reshape(-1, size).T @ spread.reshape(-1, size)
    hessian -= cross
    return hessian


def _latent_index(latent: LatentSpec, n_item_free: int, g: int) -> IntArray:
    """Positions of group g's latent mean and SD in the parameter vector (-1: held)."""
    n_mean = int(latent.free_mean.sum())
    mean_at = n_item_free + int(latent.free_mean[:g].sum()) if latent.free_mean[g] else -1
    sd_at = n_item_free + n_mean + int(latent.free_sd[:g].sum()) if latent.free_sd[g] else -1
    return np.array([mean_at, sd_at], dtype=np.int64)


def add_prior_information(
    information: FloatArray, tables: FloatArray, layout: GroupLayout, prior: SlopePrior | None, template: ItemParameters
) -> None:
    """Subtract the priors' second derivatives (in place, on minus the Hessian): the slope prior's at each
    owned slope slot, the asymptote prior's at each owned 3PL ``logit(g)`` slot."""
    if prior is not None:
        owned = layout.owner[..., 0]
        at = layout.index[..., 0][owned]
        np.add.at(information, (at, at), -prior.second_derivative(tables[..., 0][owned]))
    if template.has_guessing.any():
        owned = layout.owner[..., GUESSING_SLOT] & template.has_guessing[None, :]
        at = layout.index[..., GUESSING_SLOT][owned]
        np.add.at(information, (at, at), -GUESSING_PRIOR.second_derivative(tables[..., GUESSING_SLOT][owned]))


def observed_information(  # noqa: PLR0913 - the fit, its data and keyword-only options
    tables: FloatArray,
    template: ItemParameters,
    groups: Sequence[GroupData],
    points: FloatArray,
    latent: LatentSpec,
    layout: GroupLayout,
    prior: SlopePrior | None,
    *,
    with_priors: bool = True,
) -> FloatArray:
    """Minus the Hessian of the (penalised) marginal log-likelihood over the calibration's free parameters.

    ``with_priors=False`` leaves out every prior (the slope prior and the 3PL asymptote prior): a sum
    over some of the respondents, to which the caller adds the priors once.

    The vector's order is that of the estimator: the layout's free item slots, then the free
    latent means, then the free latent SDs. ``latent`` holds the fitted means and SDs.
    """
    n_item_free = layout.n_free
    size = n_item_free + latent.n_free
    information = np.zeros((size, size))
    for g, data in enumerate(groups):
        if data.design.n_persons == 0:
            continue
        params = params_from_table(tables[g], template)
        local = _group_hessian(params, data, points, float(latent.mean[g]), float(latent.sd[g]))
        index = np.concatenate([layout.index[g].reshape(-1), _latent_index(latent, n_item_free, g)])
        _scatter(information, -local, index)
    if with_priors:
        add_prior_information(information, tables, layout, prior, template)
    return information


@dataclass(frozen=True)
class HeldTerms:
    """Log-likelihood, gradient and observed information of a held-item model at one parameter vector."""

    log_likelihood: float
    gradient: FloatArray
    information: FloatArray


def held_item_terms(
    rows: Sequence[HeldLikelihood],
    params: Sequence[ItemParameters],
    mean: FloatArray,
    sd: FloatArray,
    points: FloatArray,
    layout: GroupLayout,
) -> HeldTerms:
    """Marginal log-likelihood, its gradient and observed information for one studied item.

    Every other item is held (their likelihood in ``rows``, reference group 0 and focal group 1);
    the parameters are the layout's free slots of the studied item, then the focal mean and SD. A 3PL
    item's estimated asymptotes add the asymptote prior's log density (a penalized likelihood).
    Within a block of rows that gave the studied item the same answer the complete-data score at a
    point is the same for every row, so one product of the block with ``[v, v * score]`` gives each
    row's likelihood and posterior mean score, and ``E[s s^T]`` is the block's expected counts
    times the score's outer product. Two passes over each block, no (rows x points) temporary.
    """
    n_item = layout.n_free
    k_max = params[0].max_slots
    size = k_max + 2
    information = np.zeros((n_item + 2, n_item + 2))
    gradient = np.zeros(n_item + 2)
    log_lik = 0.0
    for h, group_rows in enumerate(rows):
        items = _ItemTables.build(params[h], points)
        lat_score, lat_hessian = latent_derivatives(points, float(mean[h]), float(sd[h]))
        w = normal_weights(points, float(mean[h]), float(sd[h]))
        prob = category_parameter_derivatives(params[h], points)[0][0]
        focal = h == 1
        local = np.zeros((size, size))
        local_gradient = np.zeros(size)
        blocks = [(k, e) for k, e in enumerate(group_rows.by_category)] + [(-1, group_rows.missing)]
        for k, e in blocks:
            if e.shape[0] == 0:
                continue
            v = w if k < 0 else prob[k] * w
            score = np.zeros((points.size, size))
            if k >= 0:
                score[:, :k_max] = items.score[0, k]
            if focal:
                score[:, k_max:] = lat_score
            products = e @ np.column_stack([v, v[:, None] * score])
            likelihood = products[:, 0]
            mean_score = products[:, 1:] / likelihood[:, None]
            counts = v * (e.T @ (1.0 / likelihood))
            log_lik += float(np.log(likelihood).sum())
            if k >= 0:
                local[:k_max, :k_max] += np.einsum("q,qst->st", counts, items.hessian[0, k])
            if focal:
                local[k_max:, k_max:] += np.einsum("q,qst->st", counts, lat_hessian)
            local += score.T @ (score * counts[:, None]) - mean_score.T @ mean_score
            local_gradient += counts @ score
        log_lik += group_rows.constant
        latent_at = np.array([n_item, n_item + 1] if focal else [-1, -1], dtype=np.int64)
        index = np.concatenate([layout.index[h].reshape(-1), latent_at])
        _scatter(information, -local, index)
        keep = np.flatnonzero(index >= 0)
        np.add.at(gradient, index[keep], local_gradient[keep])
    if params[0].has_guessing[0]:
        # The asymptote prior, once per estimated asymptote (shared: the reference group's).
        for h in range(len(rows)):
            at = int(layout.index[h, 0, GUESSING_SLOT])
            if at < 0 or not layout.owner[h, 0, GUESSING_SLOT]:
                continue
            g = float(params[h].guessing[0])
            gamma = np.log(g) - np.log1p(-g)
            log_lik += float(GUESSING_PRIOR.log_density(gamma))
            gradient[at] += float(GUESSING_PRIOR.gradient(gamma))
            information[at, at] -= float(GUESSING_PRIOR.second_derivative(gamma))
    return HeldTerms(log_lik, gradient, information)
