"""Classical test statistics: Cronbach's alpha, alpha if item deleted, item-rest correlations."""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

from calibration.irt.models import FloatArray

# Rules of thumb (common practice; Nunnally 1978 for the .70 / .90 levels, from memory).
ALPHA_GROUP_USE = 0.70
ALPHA_INDIVIDUAL_DECISIONS = 0.90
ITEM_REST_MINIMUM = 0.15
MIN_COMPLETE_ROWS_FOR_ALPHA = 10
"""Alpha and alpha if deleted need at least this many complete rows (else null)."""


@dataclass(frozen=True)
class ClassicalStatistics:
    """Classical statistics of a response table.

    ``alpha`` and ``alpha_if_deleted`` use the respondents who answered every item
    (NaN when fewer than 10 did); ``item_rest`` uses each item's answered rows with
    the rest score prorated over the other answered items.
    """

    n_complete: int
    alpha: float
    alpha_if_deleted: FloatArray
    item_rest: FloatArray
    mean_score: FloatArray
    n_responses: FloatArray


def cronbach_alpha(x: FloatArray) -> float:
    """``k/(k-1) * (1 - sum var(item) / var(total))`` (Cronbach 1951) on complete rows."""
    k = x.shape[1]
    if k < 2 or x.shape[0] < 2:
        return float("nan")
    total_var = float(np.var(x.sum(axis=1), ddof=1))
    if total_var <= 0:
        return float("nan")
    return k / (k - 1) * (1.0 - float(np.var(x, axis=0, ddof=1).sum()) / total_var)


BLOCK_ROWS = 65_536
"""Rows per block where a check sums over respondents (no full-size temporaries)."""


class BlockMoments:
    """Covariances and correlations of a table's columns from sums over row blocks (values shifted by the
    first block's means, so the sums are of nearly centred values)."""

    def __init__(self) -> None:
        self.n = 0
        self.shift: FloatArray | None = None
        self.total = np.zeros(0)
        self.cross = np.zeros((0, 0))

    def add(self, rows: FloatArray) -> None:
        """Add a block of rows (no NaN)."""
        if self.shift is None:
            self.shift = rows.mean(axis=0) if rows.shape[0] else np.zeros(rows.shape[1])
            self.total, self.cross = np.zeros(rows.shape[1]), np.zeros((rows.shape[1], rows.shape[1]))
        centred = rows - self.shift
        self.n += rows.shape[0]
        self.total += centred.sum(axis=0)
        self.cross += centred.T @ centred

    def covariance(self) -> FloatArray:
        """The sample covariance matrix (n - 1 in the denominator)."""
        mean = self.total / max(self.n, 1)
        return (self.cross - self.n * np.outer(mean, mean)) / max(self.n - 1, 1)

    def correlation(self) -> FloatArray:
        """The correlation matrix (columns without variance give 0 off the diagonal)."""
        cov = self.covariance()
        scale = np.sqrt(np.maximum(np.diag(cov), 1e-300))
        return cov / np.outer(scale, scale)

    def constant(self) -> bool:
        """Whether some column has no variance."""
        return bool(np.any(np.diag(self.covariance()) <= 0))


def complete_rows_moments(responses: FloatArray) -> BlockMoments:
    """The moments of the rows with every column answered."""
    moments = BlockMoments()
    for start in range(0, responses.shape[0], BLOCK_ROWS):
        block = responses[start : start + BLOCK_ROWS]
        moments.add(block[~np.isnan(block).any(axis=1)])
    return moments


def classical_statistics(responses: FloatArray) -> ClassicalStatistics:
    """Cronbach's alpha, alpha if item deleted and item-rest correlations of complete rows.

    One pass in row blocks: the complete rows' covariance matrix ``C`` gives alpha and every alpha if
    deleted (``(k-1)/(k-2) (1 - (tr C - C_jj) / (sum C - 2 sum_l C_jl + C_jj))``), and each item's sums
    with its prorated rest score give the item-rest correlations; the values are shifted by the item
    means first (sums of centred values, not raw ones).
    """
    x = np.asarray(responses, dtype=np.float64)
    n_rows, n_items = x.shape
    answered_n, score_sum = np.zeros(n_items), np.zeros(n_items)
    for block in _blocks(x):
        answered = ~np.isnan(block)
        answered_n += answered.sum(axis=0)
        score_sum += np.where(answered, block, 0.0).sum(axis=0)
    with np.errstate(invalid="ignore", divide="ignore"):
        mean_score = score_sum / answered_n  # NaN for an item nobody answered
    shift = np.nan_to_num(mean_score)
    rest_shift = shift.sum() - shift  # about the mean of a prorated rest score
    complete = BlockMoments()
    pairs = np.zeros((6, n_items))  # n, sum item, sum rest, sum item^2, sum rest^2, sum item * rest
    for block in _blocks(x):
        answered = ~np.isnan(block)
        centred = np.where(answered, block - shift, 0.0)
        complete.add(block[answered.all(axis=1)])
        row_count = answered.sum(axis=1)
        ok = answered & (row_count > 1)[:, None]
        item = np.where(ok, centred, 0.0)
        # rest = (row total - item) / (count - 1) * (k - 1), shifted: from the centred values and the shifts.
        raw_total = centred.sum(axis=1) + np.where(answered, shift, 0.0).sum(axis=1)
        per_other = (n_items - 1) / np.maximum(row_count - 1, 1)
        rest = np.where(ok, (raw_total[:, None] - (centred + shift)) * per_other[:, None] - rest_shift, 0.0)
        pairs += np.stack(
            [ok.sum(0), item.sum(0), rest.sum(0), (item * item).sum(0), (rest * rest).sum(0), (item * rest).sum(0)]
        )
    alpha, alpha_if = float("nan"), np.full(n_items, np.nan)
    n_complete = complete.n
    if n_complete >= MIN_COMPLETE_ROWS_FOR_ALPHA and n_items >= 2:
        cov = complete.covariance()
        alpha = _alpha_from(float(np.trace(cov)), float(cov.sum()), n_items)
        if n_items > 2:
            with_item = cov.sum(axis=1)
            alpha_if = np.array(
                [
                    _alpha_from(
                        float(np.trace(cov) - cov[j, j]), float(cov.sum() - 2 * with_item[j] + cov[j, j]), n_items - 1
                    )
                    for j in range(n_items)
                ]
            )
    n, s_i, s_r, s_ii, s_rr, s_ir = pairs
    var_i, var_r = n * s_ii - s_i**2, n * s_rr - s_r**2
    defined = (n > 2) & (var_i > 1e-12 * n * n) & (var_r > 1e-12 * n * n)
    item_rest = np.where(defined, (n * s_ir - s_i * s_r) / np.sqrt(np.where(defined, var_i * var_r, 1.0)), np.nan)
    return ClassicalStatistics(
        n_complete=n_complete,
        alpha=alpha,
        alpha_if_deleted=alpha_if,
        item_rest=item_rest,
        mean_score=mean_score if n_rows else np.array([]),
        n_responses=answered_n,
    )


def _blocks(x: FloatArray) -> list[FloatArray]:
    return [x[start : start + BLOCK_ROWS] for start in range(0, x.shape[0], BLOCK_ROWS)]


def _alpha_from(item_variances: float, total_variance: float, k: int) -> float:
    """``k/(k-1) * (1 - sum var(item) / var(total))``; NaN when the total has no variance."""
    if total_variance <= 0:
        return float("nan")
    return k / (k - 1) * (1.0 - item_variances / total_variance)
