"""Model-based quality checks: S-X2 item fit, RMSD, and dimensionality summaries.

- S-X2 (Orlando & Thissen 2000): observed versus expected proportions in each
  category of an item among respondents with the same summed score; expected
  values come from the Lord-Wingersky distribution of the other items' summed
  score. Summed scores 0 and the maximum are left out, adjacent score groups are
  merged until every expected cell count is at least 1, and
  df = score groups x (K - 1) - number of item parameters. Needs complete rows.
- RMSD per item (common practice, no single source): the root mean squared
  difference between the group's observed expected-score curve (posterior
  weighted) and the model curve, over the group's latent density, divided by the
  item's maximum score.
- Dimensionality: the first-to-second eigenvalue ratio of the item correlation
  matrix, and the largest eigenvalue of a principal component analysis of the
  standardized residuals (values above about 2 suggest a second dimension).
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np
from scipy import stats

from calibration.irt.likelihood import (
    CALIBRATION_GRID,
    QuadratureGrid,
    build_design,
    log_likelihood_grid,
    normal_log_weights,
    normal_weights,
    posterior_weights,
)
from calibration.irt.models import (
    PROBABILITY_FLOOR,
    FloatArray,
    IntArray,
    ItemParameters,
    category_probabilities,
    expected_item_scores,
    item_score_moments,
)
from calibration.irt.summed_scores import summed_score_likelihoods
from calibration.quality.classical import BLOCK_ROWS, BlockMoments

MIN_COMPLETE_ROWS = 100
# Warning thresholds (rules of thumb; see REFERENCES in the docs of each): RMSD above this misses the
# group's observed curve (common practice), S-X2 below this p is misfit, a first-to-second eigenvalue
# ratio below this questions unidimensionality (Raiche 2005, recalled from memory), a residual-PCA
# eigenvalue above this suggests a second dimension.
RMSD_WARNING = 0.10
S_X2_MISFIT_P = 0.001
EIGENVALUE_RATIO_MINIMUM = 3.0
RESIDUAL_EIGENVALUE_MAXIMUM = 2.0


@dataclass(frozen=True)
class Dimensionality:
    """None where there were too few complete rows (fewer than MIN_COMPLETE_ROWS) or items."""

    eigenvalue_ratio: float | None
    residual_pca_first_eigenvalue: float | None
    n_complete: int


@dataclass(frozen=True)
class ItemFit:
    """S-X2 item fit (statistic, df, p) and RMSD per item; NaN where it could not be computed."""

    s_x2: FloatArray
    s_x2_df: IntArray
    s_x2_p: FloatArray
    rmsd: FloatArray


def item_fit(
    params: ItemParameters,
    responses: FloatArray,
    *,
    latent_mean: float = 0.0,
    latent_sd: float = 1.0,
    grid: QuadratureGrid | None = None,
) -> ItemFit:
    """S-X2 (complete rows, at least 100) and RMSD of every item in one group."""
    grid = grid or CALIBRATION_GRID
    points = grid.points
    weights = normal_weights(points, latent_mean, latent_sd)
    n_items = params.n_items
    s_x2 = np.full(n_items, np.nan)
    df = np.zeros(n_items, dtype=np.int64)
    p = np.full(n_items, np.nan)
    complete = responses[~np.isnan(responses).any(axis=1)]
    if complete.shape[0] >= MIN_COMPLETE_ROWS and n_items >= 3:
        s_x2, df, p = _s_x2(params, complete, points, weights)
    return ItemFit(s_x2=s_x2, s_x2_df=df, s_x2_p=p, rmsd=_rmsd(params, responses, points, latent_mean, latent_sd))


def _s_x2(
    params: ItemParameters, x: FloatArray, points: FloatArray, weights: FloatArray
) -> tuple[FloatArray, IntArray, FloatArray]:
    n_items = params.n_items
    totals = x.sum(axis=1).astype(np.int64)
    max_score = int(np.sum(params.n_categories - 1))
    full = summed_score_likelihoods(params, points) @ weights  # P(S = s)
    prob = category_probabilities(params, points)
    out_stat = np.full(n_items, np.nan)
    out_df = np.zeros(n_items, dtype=np.int64)
    out_p = np.full(n_items, np.nan)
    for j in range(n_items):
        k_j = int(params.n_categories[j])
        rest = summed_score_likelihoods(params.subset([i for i in range(n_items) if i != j]), points)
        scores = np.arange(1, max_score)
        expected = np.zeros((scores.size, k_j))
        for row, s in enumerate(scores):
            for k in range(k_j):
                if 0 <= s - k < rest.shape[0]:
                    expected[row, k] = (prob[j, k] * rest[s - k]) @ weights
            expected[row] /= max(full[s], PROBABILITY_FLOOR)
        # Respondents per (summed score, category of item j), counted in one pass.
        table = np.bincount(totals * k_j + x[:, j].astype(np.int64), minlength=(max_score + 1) * k_j)
        observed = table.reshape(max_score + 1, k_j)[scores].astype(np.float64)
        n_s = observed.sum(axis=1)
        # Merge adjacent score groups from each end until every expected count is at least 1.
        groups: list[tuple[float, FloatArray, FloatArray]] = []
        acc_n, acc_e, acc_o = 0.0, np.zeros(k_j), np.zeros(k_j)
        for row in range(scores.size):
            acc_n += n_s[row]
            acc_e += expected[row] * n_s[row]
            acc_o += observed[row]
            if acc_n > 0 and np.all(acc_e >= 1.0):
                groups.append((acc_n, acc_e.copy(), acc_o.copy()))
                acc_n, acc_e, acc_o = 0.0, np.zeros(k_j), np.zeros(k_j)
        if acc_n > 0 and groups:
            n_last, e_last, o_last = groups.pop()
            groups.append((n_last + acc_n, e_last + acc_e, o_last + acc_o))
        n_params = int(params.n_slots[j])  # slope + K - 1 intercepts (+ a 3PL item's asymptote)
        dof = len(groups) * (k_j - 1) - n_params
        if dof < 1:
            continue
        stat = float(sum(np.sum((o - e) ** 2 / np.maximum(e, 1e-12)) for _, e, o in groups))
        out_stat[j], out_df[j], out_p[j] = stat, dof, float(stats.chi2.sf(stat, dof))
    return out_stat, out_df, out_p


def _rmsd(params: ItemParameters, x: FloatArray, points: FloatArray, mean: float, sd: float) -> FloatArray:
    log_prior = normal_log_weights(points, mean, sd)
    observed_sum = np.zeros((params.n_items, points.size))
    mass = np.zeros((params.n_items, points.size))
    for start in range(0, x.shape[0], BLOCK_ROWS):
        block = x[start : start + BLOCK_ROWS]
        design = build_design(block, params.n_categories)
        post = posterior_weights(log_likelihood_grid(params, points, design, log_prior=log_prior))
        answered = ~np.isnan(block)
        observed_sum += np.where(answered, block, 0.0).T @ post  # (J, Q)
        mass += answered.astype(np.float64).T @ post
    observed = observed_sum / np.maximum(mass, 1e-12)
    model = expected_item_scores(params, points)
    w = np.exp(log_prior)
    top = (params.n_categories - 1).astype(np.float64)
    return np.sqrt((observed - model) ** 2 @ w) / top


def dimensionality(params: ItemParameters, responses: FloatArray, theta: FloatArray) -> Dimensionality:
    """Eigenvalue ratio of the item correlations and the first eigenvalue of the residual PCA (complete rows;
    both correlation matrices summed over row blocks)."""
    complete = ~np.isnan(responses).any(axis=1)
    n_complete = int(complete.sum())
    if n_complete < MIN_COMPLETE_ROWS or responses.shape[1] < 3:
        return Dimensionality(None, None, n_complete)
    items, residuals = BlockMoments(), BlockMoments()
    for start in range(0, responses.shape[0], BLOCK_ROWS):
        keep = complete[start : start + BLOCK_ROWS]
        x = responses[start : start + BLOCK_ROWS][keep]
        if x.shape[0] == 0:
            continue
        items.add(x)
        mean, var = item_score_moments(params, theta[start : start + BLOCK_ROWS][keep])  # (J, n)
        residuals.add((x - mean.T) / np.sqrt(np.maximum(var.T, 1e-12)))
    if items.constant():
        return Dimensionality(None, None, n_complete)
    eig = np.sort(np.linalg.eigvalsh(items.correlation()))[::-1]
    ratio = float(eig[0] / eig[1]) if eig[1] > 0 else None
    contrast = float(np.max(np.linalg.eigvalsh(residuals.correlation())))
    return Dimensionality(eigenvalue_ratio=ratio, residual_pca_first_eigenvalue=contrast, n_complete=n_complete)
