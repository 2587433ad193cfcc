"""Observed-score DIF screening: Mantel-Haenszel, Mantel, standardized mean difference.

Every focal group is compared with the reference group, one item at a time,
within strata of a matching score. The matching score is purified in two stages
(Holland & Thayer 1988): stage 1 matches on the total over all items; stage 2
leaves out items flagged B or C (BB or CC for graded items) in stage 1, always
keeping the studied item.

Missing answers: the matching score is the sum over the matching items a
respondent answered, prorated to the full set (rounded to a whole number);
respondents who answered fewer than half of the matching items, or not the
studied item, are left out of that item's analysis.
"""

from __future__ import annotations

import math
from dataclasses import dataclass

import numpy as np
from scipy import stats

from calibration.irt.models import FloatArray, IntArray

D_DIF_SCALE = 2.35  # Holland & Thayer (1988): MH D-DIF = -2.35 ln(alpha_MH)


@dataclass(frozen=True)
class MantelHaenszelResult:
    """MH statistics for one dichotomous item, one focal group.

    ``odds_ratio`` (the MH common odds ratio) > 1 favours the reference group; ``d_dif`` < 0 means the item is
    harder for the focal group at equal matching score.
    """

    odds_ratio: float
    log_odds_ratio_se: float
    chi_square: float
    p_value: float
    d_dif: float
    d_dif_se: float
    category: str
    n_reference: int
    n_focal: int


@dataclass(frozen=True)
class MantelResult:
    """Mantel (1963) test and standardized mean difference for one graded item, one focal group."""

    chi_square: float
    p_value: float
    smd: float
    smd_over_sd: float
    category: str
    n_reference: int
    n_focal: int


def mantel_haenszel(tables: FloatArray) -> tuple[float, float, float, float]:
    """Common odds ratio, RBG SE of its log, corrected chi-square and p value.

    Parameters
    ----------
    tables : array of shape (n_strata, 2, 2)
        Rows reference / focal, columns right / wrong (A B / C D).

    The odds ratio is ``sum(A D / N) / sum(B C / N)`` (Mantel & Haenszel 1959); the
    variance of its log is the Robins, Breslow & Greenland (1986) estimator; the
    chi-square carries the 0.5 continuity correction. Strata with fewer than two
    respondents drop out.
    """
    t = np.asarray(tables, dtype=np.float64)
    a, b, c, d = t[:, 0, 0], t[:, 0, 1], t[:, 1, 0], t[:, 1, 1]
    n = a + b + c + d
    keep = n >= 2
    a, b, c, d, n = a[keep], b[keep], c[keep], d[keep], n[keep]
    r = a * d / n
    s = b * c / n
    sum_r, sum_s = r.sum(), s.sum()
    alpha = sum_r / sum_s if sum_s > 0 else math.inf
    p = (a + d) / n
    q = (b + c) / n
    if sum_r > 0 and sum_s > 0:
        var_log = (p * r).sum() / (2 * sum_r**2) + (p * s + q * r).sum() / (2 * sum_r * sum_s)
        var_log += (q * s).sum() / (2 * sum_s**2)
        se_log = math.sqrt(var_log)
    else:
        se_log = math.inf
    n_ref, n_foc = a + b, c + d
    m1, m0 = a + c, b + d
    expected = n_ref * m1 / n
    variance = n_ref * n_foc * m1 * m0 / (n * n * (n - 1))
    total_var = variance.sum()
    if total_var > 0:
        chi = (abs(a.sum() - expected.sum()) - 0.5) ** 2 / total_var
        p_value = float(stats.chi2.sf(chi, 1))
    else:
        chi, p_value = 0.0, 1.0
    return float(alpha), float(se_log), float(chi), p_value


def mh_abc_class(d_dif: float, d_dif_se: float, p_value: float, *, greater_than_one_z: float = 1.645) -> str:
    """A/B/C with a sign (Zwick 2012 after Petersen 1988).

    A: not significantly different from 0 (alpha .05) or |D| < 1. C: |D| >= 1.5 and
    |D| significantly greater than 1 (z = (|D| - 1) / SE above ``greater_than_one_z``;
    sources differ between 1.645 and 1.96, so it is a setting). B otherwise.
    ``-`` means the item disadvantages the focal group, ``+`` the reference group.
    """
    if not math.isfinite(d_dif) or p_value >= 0.05 or abs(d_dif) < 1.0:
        return "A"
    sign = "-" if d_dif < 0 else "+"
    if abs(d_dif) >= 1.5 and d_dif_se > 0 and (abs(d_dif) - 1.0) / d_dif_se > greater_than_one_z:
        return "C" + sign
    return "B" + sign


def mantel_polytomous(scores: FloatArray, is_focal: np.ndarray, strata: IntArray) -> tuple[float, float, float]:
    """Mantel (1963) chi-square (1 df), its p value and the SMD (Dorans & Schmitt 1991).

    ``SMD = sum_k (n_Fk / n_F) (mean_Fk - mean_Rk)`` over strata with both groups present;
    negative means the focal group scores lower at equal matching score.
    """
    sum_f = expected = variance = 0.0
    smd = 0.0
    n_focal_total = int(is_focal.sum())
    for k in np.unique(strata):
        in_k = strata == k
        y = scores[in_k]
        f = is_focal[in_k]
        n_k, n_f = y.size, int(f.sum())
        n_r = n_k - n_f
        if n_k < 2 or n_f == 0 or n_r == 0:
            continue
        sum_f += y[f].sum()
        expected += n_f * y.mean()
        variance += n_r * n_f / (n_k * n_k * (n_k - 1)) * (n_k * (y * y).sum() - y.sum() ** 2)
        smd += n_f / n_focal_total * (y[f].mean() - y[~f].mean())
    if variance <= 0:
        return 0.0, 1.0, smd
    chi = (sum_f - expected) ** 2 / variance
    return float(chi), float(stats.chi2.sf(chi, 1)), float(smd)


def polytomous_category(p_value: float, smd_over_sd: float) -> str:
    """AA/BB/CC for graded items by |SMD|/SD (.17 and .25 cut-offs; recalled from memory, common practice)."""
    size = abs(smd_over_sd)
    if p_value >= 0.05 or size <= 0.17:
        return "AA"
    sign = "-" if smd_over_sd < 0 else "+"
    return ("CC" if size > 0.25 else "BB") + sign


def matching_scores(responses: FloatArray, n_categories: IntArray, items: np.ndarray) -> tuple[FloatArray, np.ndarray]:
    """Prorated summed score over ``items`` (bool mask) and whether enough of them were answered."""
    matching = MatchingSet(responses, n_categories, items)
    return matching.prorate(matching.got, matching.possible, matching.count, int(items.sum()))


class MatchingSet:
    """Sums over a matching set computed once; each studied item adds its own answer (``for_item``)."""

    def __init__(self, responses: FloatArray, n_categories: IntArray, items: np.ndarray) -> None:
        self.responses = responses
        self.items = np.asarray(items, dtype=bool)
        self.top = (n_categories - 1).astype(np.float64)
        sub = responses[:, self.items]
        answered = ~np.isnan(sub)
        self.got = np.where(answered, sub, 0.0).sum(axis=1)
        self.possible = answered @ self.top[self.items]
        self.count = answered.sum(axis=1)
        self.full = float(self.top[self.items].sum())

    def for_item(self, j: int) -> tuple[FloatArray, np.ndarray]:
        """The matching score with item j in the set (it always is part of its own matching score)."""
        if self.items[j]:
            return self.prorate(self.got, self.possible, self.count, int(self.items.sum()))
        answered = ~np.isnan(self.responses[:, j])
        got = self.got + np.where(answered, self.responses[:, j], 0.0)
        possible = self.possible + answered * self.top[j]
        full = self.full + self.top[j]
        return self.prorate(got, possible, self.count + answered, int(self.items.sum()) + 1, full=full)

    def prorate(
        self, got: FloatArray, possible: FloatArray, count: np.ndarray, n_items: int, *, full: float | None = None
    ) -> tuple[FloatArray, np.ndarray]:
        """Score rounded from the answered share to the full set; enough when half the set was answered."""
        full = self.full if full is None else full
        score = np.where(possible > 0, np.round(got * full / np.maximum(possible, 1e-12)), np.nan)
        return score, count * 2 >= n_items


@dataclass(frozen=True)
class ObservedScreening:
    """Stage-2 results per (item, focal group); ``stage1_flagged`` per focal group."""

    mh: dict[tuple[int, int], MantelHaenszelResult]
    mantel: dict[tuple[int, int], MantelResult]
    stage1_flagged: dict[int, tuple[int, ...]]
    matching_items: dict[int, tuple[int, ...]]


def _item_result(
    matching: MatchingSet,
    n_categories: IntArray,
    j: int,
    is_focal: np.ndarray,
    greater_than_one_z: float,
) -> MantelHaenszelResult | MantelResult:
    score, enough = matching.for_item(j)
    y = matching.responses[:, j]
    ok = enough & ~np.isnan(y) & ~np.isnan(score)
    y, score, focal = y[ok], score[ok].astype(np.int64), is_focal[ok]
    n_ref, n_foc = int((~focal).sum()), int(focal.sum())
    if n_categories[j] == 2:
        # One 2 x 2 table per observed score level (levels nobody has are left out).
        cell = score * 4 + focal.astype(np.int64) * 2 + (1 - y).astype(np.int64)
        counts = np.bincount(cell, minlength=4 * (int(score.max(initial=0)) + 1)).reshape(-1, 2, 2)
        tables = counts[counts.sum(axis=(1, 2)) > 0].astype(np.float64)
        odds_ratio, se_log, chi, p = mantel_haenszel(tables)
        if 0 < odds_ratio < math.inf:
            d = -D_DIF_SCALE * math.log(odds_ratio)
        else:
            d = -math.inf if odds_ratio == math.inf else math.inf
        d_se = D_DIF_SCALE * se_log
        return MantelHaenszelResult(
            odds_ratio,
            se_log,
            chi,
            p,
            d,
            d_se,
            mh_abc_class(d, d_se, p, greater_than_one_z=greater_than_one_z),
            n_ref,
            n_foc,
        )
    chi, p, smd = mantel_polytomous(y, focal, score)
    sd = float(np.std(y, ddof=1)) if y.size > 1 else 0.0
    ratio = smd / sd if sd > 0 else 0.0
    return MantelResult(chi, p, smd, ratio, polytomous_category(p, ratio), n_ref, n_foc)


def _flagged(result: MantelHaenszelResult | MantelResult) -> bool:
    return result.category[0] in "BC"


def screen_observed(
    responses: FloatArray,
    n_categories: IntArray,
    group_index: IntArray,
    n_groups: int,
    *,
    greater_than_one_z: float = 1.645,
) -> ObservedScreening:
    """Two-stage purified MH (right/wrong items) and Mantel/SMD (graded items), each focal group vs group 0."""
    n_items = responses.shape[1]
    mh: dict[tuple[int, int], MantelHaenszelResult] = {}
    mantel: dict[tuple[int, int], MantelResult] = {}
    stage1: dict[int, tuple[int, ...]] = {}
    matching_used: dict[int, tuple[int, ...]] = {}
    for g in range(1, n_groups):
        rows = (group_index == 0) | (group_index == g)
        members = responses[rows]
        is_focal = group_index[rows] == g
        all_items = np.ones(n_items, dtype=bool)
        every = MatchingSet(members, n_categories, all_items)
        first = [_item_result(every, n_categories, j, is_focal, greater_than_one_z) for j in range(n_items)]
        flagged = tuple(j for j, r in enumerate(first) if _flagged(r))
        stage1[g] = flagged
        matching = all_items.copy()
        matching[list(flagged)] = False
        if matching.sum() < 2:  # nearly every item flagged: purification has nothing left to match on
            matching = all_items
        matching_used[g] = tuple(int(j) for j in np.flatnonzero(matching))
        purified = MatchingSet(members, n_categories, matching)
        for j in range(n_items):
            result = _item_result(purified, n_categories, j, is_focal, greater_than_one_z)
            if isinstance(result, MantelHaenszelResult):
                mh[(j, g)] = result
            else:
                mantel[(j, g)] = result
    return ObservedScreening(mh=mh, mantel=mantel, stage1_flagged=stage1, matching_items=matching_used)
