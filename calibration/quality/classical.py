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


def classical_statistics(responses: FloatArray) -> ClassicalStatistics:
    """Cronbach's alpha, alpha if item deleted and item-rest correlations of complete rows."""
    x = np.asarray(responses, dtype=np.float64)
    n_items = x.shape[1]
    complete = x[~np.isnan(x).any(axis=1)]
    enough = complete.shape[0] >= MIN_COMPLETE_ROWS_FOR_ALPHA
    alpha = cronbach_alpha(complete) if enough else float("nan")
    if enough and n_items > 2:
        alpha_if = np.array([cronbach_alpha(np.delete(complete, j, axis=1)) for j in range(n_items)])
    else:
        alpha_if = np.full(n_items, np.nan)
    answered = ~np.isnan(x)
    row_total = np.nansum(x, axis=1)
    row_count = answered.sum(axis=1)
    item_rest = np.full(n_items, np.nan)
    for j in range(n_items):
        ok = answered[:, j] & (row_count > 1)
        item = x[ok, j]
        rest = (row_total[ok] - item) / (row_count[ok] - 1) * (n_items - 1)
        if item.size > 2 and item.std() > 0 and rest.std() > 0:
            item_rest[j] = float(np.corrcoef(item, rest)[0, 1])
    return ClassicalStatistics(
        n_complete=int(complete.shape[0]),
        alpha=alpha,
        alpha_if_deleted=alpha_if,
        item_rest=item_rest,
        mean_score=np.nanmean(np.where(answered, x, np.nan), axis=0) if x.size else np.array([]),
        n_responses=answered.sum(axis=0).astype(np.float64),
    )
