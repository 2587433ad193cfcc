"""E-step: posterior weights over the quadrature grid, summed into expected category counts.

Two forms. :func:`expected_counts` serves a whole calibration (every item, a design of
indicator matrices, Bock & Aitkin 1981). :func:`held_item_counts` serves one studied item
while every other item is held at fixed values: their likelihood is exponentiated once,
so each EM iteration costs two matrix-vector products per category.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

from calibration.irt.likelihood import (
    DEFAULT_CHUNK,
    ResponseDesign,
    build_design,
    exp_by_rows,
    log_likelihood_grid,
    normal_weights,
    run_blocks,
    split_log_table,
)
from calibration.irt.models import FloatArray, IntArray, ItemParameters, category_probabilities


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
) -> ExpectedCounts:
    """E-step: expected category counts per item and quadrature point.

    Parameters
    ----------
    log_prior : array of shape (n_points,)
    weights : array of shape (n_persons,)
        Frequency weight of each row (pattern counts after compression).
    """
    tables = split_log_table(params, points, design)

    def block(rows: slice) -> tuple[FloatArray, FloatArray, FloatArray, float]:
        # Posterior of the rows in this block, folded straight into partial sums.
        part = design.rows(rows)
        joint, peak = exp_by_rows(log_likelihood_grid(params, points, part, tables=tables, log_prior=log_prior))
        total = joint.sum(axis=1)
        w = weights[rows]
        joint *= (w / total)[:, None]
        log_lik = float(w @ (np.log(total) + peak))
        by_category = part.indicators.T @ joint
        mass = joint.sum(axis=0)
        if part.administered is None:
            answered = np.broadcast_to(mass, (params.n_items, points.shape[0]))
        else:
            answered = part.administered.T @ joint
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


@dataclass(frozen=True)
class GroupData:
    """One group's rows prepared for the E-step."""

    design: ResponseDesign
    weights: FloatArray
    n_persons: int


def prepare_groups(
    responses: FloatArray,
    n_categories: IntArray,
    group_index: IntArray,
    n_groups: int,
    *,
    compress: bool = True,
) -> list[GroupData]:
    """Split rows by group (original order within a group); compress patterns where it pays."""
    out = []
    for g in range(n_groups):
        rows = responses if n_groups == 1 else responses[group_index == g]  # one group: no copy
        compressed = compress_patterns(rows) if (compress and rows.shape[0] > 0) else None
        if compressed is not None:
            unique, weights = compressed
            out.append(GroupData(build_design(unique, n_categories), weights, rows.shape[0]))
        else:
            out.append(GroupData(build_design(rows, n_categories), np.ones(rows.shape[0]), rows.shape[0]))
    return out


def compress_patterns(responses: FloatArray) -> tuple[FloatArray, FloatArray] | None:
    """Unique response rows and their frequencies (NaN kept as missing).

    Returns None when compression would save less than 20% of the rows; a cheap
    1-D key (a fixed random projection of each row) decides that before the exact,
    costlier row-wise ``np.unique``.
    """
    projection = np.random.default_rng(0).random(responses.shape[1])
    keys = np.concatenate(
        [
            np.where(np.isnan(block), -1.0, block) @ projection
            for block in np.array_split(responses, max(1, responses.shape[0] // 65_536))
        ]
    )  # block by block: no full copy of the table just to decide
    if np.unique(keys).size > 0.8 * responses.shape[0]:
        return None
    coded = np.where(np.isnan(responses), -1.0, responses)
    unique, counts = np.unique(coded, axis=0, return_counts=True)
    unique = np.where(unique < 0, np.nan, unique)
    return unique, counts.astype(np.float64)


@dataclass(frozen=True)
class HeldLikelihood:
    """One group's rows for a studied item, with every other item held at fixed values.

    ``by_category[k]`` holds ``exp(offset - row max)`` of the rows that answered the studied
    item in category k, ``missing`` those of the rows that did not answer it, and ``constant``
    the sum of the row maxima taken out before the exponential.
    """

    by_category: list[FloatArray]
    missing: FloatArray
    constant: float

    @classmethod
    def from_offset(cls, offset: FloatArray, answers: FloatArray, n_categories: int) -> HeldLikelihood:
        """From the held items' log-likelihood (n_rows, n_points) and the studied item's answers (NaN: none)."""
        scaled, peak = exp_by_rows(offset.copy())
        codes = np.where(np.isnan(answers), -1, answers).astype(np.int64)
        return cls([scaled[codes == k] for k in range(n_categories)], scaled[codes < 0], float(peak.sum()))

    @classmethod
    def without_rows(cls, n_categories: int, n_points: int) -> HeldLikelihood:
        """A group with no respondents (an earlier cycle whose item parameters are held at known values)."""
        empty = np.zeros((0, n_points))
        return cls([empty] * n_categories, empty, 0.0)


def held_item_counts(
    rows: list[HeldLikelihood],
    params: list[ItemParameters],
    mean: FloatArray,
    sd: FloatArray,
    points: FloatArray,
) -> tuple[FloatArray, FloatArray, float]:
    """E-step of one studied item with every other item held (their likelihood in ``rows``).

    A respondent's posterior is ``E_i(q) P_k(q) w(q) / sum_q'(...)`` with E_i fixed, so the
    expected counts of category k are ``v_k * (E_k^T (1 / (E_k v_k)))`` with ``v_k = P_k w``.
    Returns counts (n_groups, 1, k_max, n_points), posterior mass (n_groups, n_points) and the
    log-likelihood.
    """
    n_groups, k_max = len(rows), params[0].max_categories
    counts = np.zeros((n_groups, 1, k_max, points.size))
    mass = np.zeros((n_groups, points.size))
    log_lik = 0.0
    for h, group_rows in enumerate(rows):
        w = normal_weights(points, float(mean[h]), float(sd[h]))
        prob = category_probabilities(params[h], points)[0]
        blocks = [(k, e, prob[k] * w) for k, e in enumerate(group_rows.by_category)]
        blocks.append((-1, group_rows.missing, w))
        for k, e, v in blocks:
            if e.shape[0] == 0:
                continue
            denominator = e @ v
            r = v * (e.T @ (1.0 / denominator))
            if k >= 0:
                counts[h, 0, k] = r
            mass[h] += r
            log_lik += float(np.log(denominator).sum())
        log_lik += group_rows.constant
    return counts, mass, log_lik
