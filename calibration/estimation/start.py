"""Deterministic starting values from classical item statistics."""

from __future__ import annotations

import math
from dataclasses import dataclass

import numpy as np

from calibration.irt.models import (
    ADJACENT_MODELS,
    MODEL_2PL,
    MODEL_3PL,
    MODEL_GRM,
    FloatArray,
    IntArray,
    ItemParameters,
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
    counts = _category_counts(x, k)
    if n_items > 1 and x.shape[0] > 2 and not np.isnan(x).any():
        return _for_models(_complete_data_values(x, k, _cumulative(models)), counts, models)
    return _for_models(_incomplete_data_values(x, k, _cumulative(models)), counts, models)


def _category_counts(x: FloatArray, k: IntArray) -> FloatArray:
    """(n_items, max categories): how often each category was answered (only partial-credit starts need it)."""
    return np.array([[np.sum(x[:, j] == c) for c in range(int(k.max()))] for j in range(x.shape[1])], dtype=np.float64)


START_GUESSING = 0.2
"""A 3PL item's starting asymptote (the asymptote prior's mode)."""


def _cumulative(models: tuple[str, ...]) -> tuple[str, ...]:
    """The models with every item read as a cumulative one (the classical start is the same for all)."""
    return tuple(MODEL_2PL if m == MODEL_3PL else (MODEL_GRM if m in ADJACENT_MODELS else m) for m in models)


def _for_models(start: ItemParameters, category_counts: FloatArray, models: tuple[str, ...]) -> ItemParameters:
    """The cumulative start turned into each item's own model.

    A 3PL item starts at the asymptote 0.2 with the intercept of its proportion correct above
    chance, ``(p - 0.2) / 0.8``; a partial-credit item's steps start at the adjacent-category log
    odds of its answers, ``log(n_k / n_{k-1})`` (counts floored at 0.5), the slope as for a graded item.
    """
    if tuple(models) == start.models:
        return start
    intercepts = start.intercepts.copy()
    guessing = np.zeros(start.n_items)
    for j, model in enumerate(models):
        if model == MODEL_3PL:
            attenuation = math.sqrt(1 + (start.slopes[j] / 1.7) ** 2)
            p = 1.0 / (1.0 + math.exp(-start.intercepts[j, 0] / attenuation))
            above = min(max((p - START_GUESSING) / (1.0 - START_GUESSING), 0.02), 0.98)
            intercepts[j, 0] = math.log(above / (1.0 - above)) * attenuation
            guessing[j] = START_GUESSING
        elif model in ADJACENT_MODELS:
            k_j = int(start.n_categories[j])
            counts = np.maximum(category_counts[j, :k_j], 0.5)
            intercepts[j, : k_j - 1] = np.log(counts[1:] / counts[:-1])
    return ItemParameters(
        slopes=start.slopes, intercepts=intercepts, n_categories=start.n_categories, models=models, guessing=guessing
    )


def _incomplete_data_values(x: FloatArray, k: IntArray, models: tuple[str, ...]) -> ItemParameters:
    """Item by item: the same starting values for a table with missing answers."""
    n_items = x.shape[1]
    answered = ~np.isnan(x)
    row_total = np.zeros(x.shape[0])
    for j in range(n_items):  # column by column: no scaled copy of the whole table
        row_total += np.where(answered[:, j], x[:, j] / (k[j] - 1), 0.0)
    row_count = answered.sum(axis=1)
    slopes = np.empty(n_items)
    intercepts = np.full((n_items, int(k.max()) - 1), np.nan)
    for j in range(n_items):
        ok = answered[:, j] & (row_count > 1)
        item = x[ok, j] / (k[j] - 1)
        rest = (row_total[ok] - item) / (row_count[ok] - 1)
        r = 0.5
        if item.size > 2 and item.std() > 0 and rest.std() > 0:
            r = float(np.corrcoef(item, rest)[0, 1])
        r = min(max(r, 0.15), 0.9)
        slopes[j] = float(np.clip(1.7 * r / math.sqrt(1 - r * r), 0.3, 2.5))
        codes = x[answered[:, j], j]
        intercepts[j, : k[j] - 1] = _intercepts(np.array([(codes >= c).mean() for c in range(1, k[j])]), slopes[j])
    return ItemParameters(slopes=slopes, intercepts=intercepts, n_categories=k, models=models)


START_BLOCK_ROWS = 65_536
"""Rows per block when the complete-data statistics are summed (no full-size temporaries)."""


def _complete_data_values(x: FloatArray, k: IntArray, models: tuple[str, ...]) -> ItemParameters:
    """The same starting values for a table without missing answers, from one covariance matrix.

    With every item answered, the rest score of item j is ``(T - s_j) / (J - 1)`` for the total ``T``
    of the scaled items ``s = x / (K - 1)``, so every item-rest correlation follows from the
    covariance matrix ``S`` of the scaled items: ``cov(s_j, T - s_j) = sum_l S_jl - S_jj`` and
    ``var(T - s_j) = sum S - 2 sum_l S_jl + S_jj``. Summed in row blocks, centred on the means.
    """
    n_rows, n_items = x.shape
    scale = 1.0 / (k - 1)
    means = x.mean(axis=0) * scale
    covariance = np.zeros((n_items, n_items))
    k_max = int(k.max())
    at_least = np.zeros((k_max - 1, n_items))  # counts of x >= c, c = 1 .. K_max - 1
    for start in range(0, n_rows, START_BLOCK_ROWS):
        block = x[start : start + START_BLOCK_ROWS]
        centred = block * scale - means
        covariance += centred.T @ centred
        for c in range(1, k_max):
            at_least[c - 1] += (block >= c).sum(axis=0)
    r = np.clip(_rest_correlations(covariance), 0.15, 0.9)
    slopes = np.clip(1.7 * r / np.sqrt(1 - r * r), 0.3, 2.5)
    intercepts = np.full((n_items, k_max - 1), np.nan)
    for j in range(n_items):
        intercepts[j, : k[j] - 1] = _intercepts(at_least[: k[j] - 1, j] / n_rows, slopes[j])
    return ItemParameters(slopes=slopes, intercepts=intercepts, n_categories=k, models=models)


def _rest_correlations(covariance: FloatArray) -> FloatArray:
    """Each item's correlation with the sum of the others, from the (scaled) items' covariance (or its sums
    of centred products): ``cov(s_j, T - s_j) = sum_l S_jl - S_jj``, ``var(T - s_j) = sum S - 2 sum_l S_jl +
    S_jj``; 0.5 where a variance is 0."""
    with_item = covariance.sum(axis=1)
    item_var = np.diag(covariance)
    cov_rest = with_item - item_var
    rest_var = covariance.sum() - 2.0 * with_item + item_var
    defined = (item_var > 0) & (rest_var > 0)
    return np.where(defined, cov_rest / np.sqrt(np.where(defined, item_var * rest_var, 1.0)), 0.5)


def _intercepts(p: FloatArray, slope: float) -> FloatArray:
    """Intercepts from the cumulative proportions ``P(X >= k)``, strictly decreasing (sparse categories)."""
    p = np.clip(p, 0.005, 0.995)
    c_k = np.log(p / (1 - p)) * math.sqrt(1 + (slope / 1.7) ** 2)
    for m in range(1, c_k.size):
        c_k[m] = min(c_k[m], c_k[m - 1] - 0.05)
    return c_k


@dataclass(frozen=True)
class StartStatistics:
    """The sums behind the starting values, additive over blocks of rows (the partitions of a distributed job).

    Both of :func:`starting_values`' routes are sums over rows: the complete-data one needs the scaled
    items' sums and cross-products, the one for tables with missing answers each item's sums of its
    score and rest score (and their squares and product) over the rows where it and another item were
    answered; both need the counts of each category. :meth:`values` applies the same formulas to the
    merged sums (the cross-products uncentred, so the start may differ from the in-process one by
    rounding).
    """

    n_rows: int
    any_missing: bool
    total: FloatArray  # (J,) sum of x / (K - 1)
    cross: FloatArray  # (J, J) sum of their products
    counts: FloatArray  # (J, K max) answers per category
    pairs: FloatArray  # (6, J): n, sum item, sum rest, sum item^2, sum rest^2, sum item * rest

    @classmethod
    def of(cls, responses: FloatArray, n_categories: IntArray) -> StartStatistics:
        """The sums of one block of rows."""
        x = np.asarray(responses, dtype=np.float64)
        k = np.asarray(n_categories, dtype=np.int64)
        answered = ~np.isnan(x)
        scaled = np.where(answered, x, 0.0) / (k - 1)
        row_total = scaled.sum(axis=1)
        row_count = answered.sum(axis=1)
        ok = answered & (row_count > 1)[:, None]
        rest = np.where(ok, (row_total[:, None] - scaled) / np.maximum(row_count - 1, 1)[:, None], 0.0)
        item = np.where(ok, scaled, 0.0)
        pairs = np.stack(
            [ok.sum(axis=0), item.sum(0), rest.sum(0), (item * item).sum(0), (rest * rest).sum(0), (item * rest).sum(0)]
        ).astype(np.float64)
        return cls(x.shape[0], bool((~answered).any()), scaled.sum(0), scaled.T @ scaled, _category_counts(x, k), pairs)

    def merge(self, other: StartStatistics) -> StartStatistics:
        """The sums of both blocks."""
        return StartStatistics(
            self.n_rows + other.n_rows,
            self.any_missing or other.any_missing,
            self.total + other.total,
            self.cross + other.cross,
            self.counts + other.counts,
            self.pairs + other.pairs,
        )

    def values(self, n_categories: IntArray, models: tuple[str, ...]) -> ItemParameters:
        """The starting values of :func:`starting_values`, from the sums."""
        k = np.asarray(n_categories, dtype=np.int64)
        n_items = k.size
        if n_items > 1 and self.n_rows > 2 and not self.any_missing:
            means = self.total / self.n_rows
            r = _rest_correlations(self.cross - self.n_rows * np.outer(means, means))
            answered = np.full(n_items, float(self.n_rows))
        else:
            n, s_i, s_r, s_ii, s_rr, s_ir = self.pairs
            var_i, var_r = n * s_ii - s_i**2, n * s_rr - s_r**2
            defined = (n > 2) & (var_i > 1e-12 * n * n) & (var_r > 1e-12 * n * n)
            r = np.where(defined, (n * s_ir - s_i * s_r) / np.sqrt(np.where(defined, var_i * var_r, 1.0)), 0.5)
            answered = self.counts.sum(axis=1)
        r = np.clip(r, 0.15, 0.9)
        slopes = np.clip(1.7 * r / np.sqrt(1 - r * r), 0.3, 2.5)
        intercepts = np.full((n_items, int(k.max()) - 1), np.nan)
        for j in range(n_items):
            at_least = self.counts[j, ::-1].cumsum()[::-1][1 : k[j]]  # answers of category >= 1 .. K - 1
            intercepts[j, : k[j] - 1] = _intercepts(at_least / max(answered[j], 1.0), slopes[j])
        start = ItemParameters(slopes=slopes, intercepts=intercepts, n_categories=k, models=_cumulative(models))
        return _for_models(start, self.counts, models)
