"""Quality by group: classical statistics, reliability, item fit and dimensionality, and their warnings."""

from __future__ import annotations

import numpy as np

from calibration.bundle.schema import (
    AlphaComparisonRow,
    CategoryFunctioning,
    Dimensionality,
    GroupQuality,
    ItemQuality,
    ModalRange,
    SummedScoreRow,
)
from calibration.estimation import EMSettings, MultiGroupFit
from calibration.estimation.settings import GUESSING_PRIOR
from calibration.io import finite_or_none
from calibration.irt.likelihood import QuadratureGrid
from calibration.irt.models import GUESSING_SLOT, ItemParameters
from calibration.irt.reliability import marginal_reliability
from calibration.irt.scoring import NormalPrior, eap_scores
from calibration.irt.summed_scores import summed_score_table
from calibration.pipeline.policy import PolicyTable
from calibration.pipeline.prepare import PreparedData
from calibration.quality.categories import category_check
from calibration.quality.classical import (
    ALPHA_GROUP_USE,
    ALPHA_INDIVIDUAL_DECISIONS,
    ITEM_REST_MINIMUM,
    classical_statistics,
)
from calibration.quality.model_fit import (
    EIGENVALUE_RATIO_MINIMUM,
    RESIDUAL_EIGENVALUE_MAXIMUM,
    RMSD_WARNING,
    S_X2_MISFIT_P,
    dimensionality,
    item_fit,
)
from calibration.quality.reliability import alpha_interval, compare_alphas, one_factor_omega

SLOPE_VERY_LARGE = 4.0
"""A reference slope above this is reported as very large (a near-Heywood case)."""
PRIOR_DOMINATED = 0.8
"""A 3PL asymptote whose SE is above this share of the asymptote prior's SD is reported as set mostly by the
prior (equitheta's rule: the data narrowed the prior by less than a fifth)."""


def quality_by_group(
    prepared: PreparedData, fit: MultiGroupFit, policy: PolicyTable, grid: QuadratureGrid
) -> tuple[dict[str, GroupQuality], list[str]]:
    """Each group's quality on the items it is scored on, and the warnings it raises."""
    by_group: dict[str, GroupQuality] = {}
    notes: list[str] = []
    for g, group in enumerate(prepared.group_names):
        kept = policy.kept_items(g)
        whole = prepared.n_groups == 1 and len(kept) == prepared.n_items  # the table itself, no copy
        quality = _group_quality(
            prepared.x if whole else prepared.x[np.ix_(prepared.group_index == g, kept)],
            fit.group_params(g).subset(kept),
            [prepared.item_ids[j] for j in kept],
            grid,
            (float(fit.latent_mean[g]), float(fit.latent_sd[g])),
        )
        by_group[group] = quality
        notes.extend(_quality_warnings(quality, group if prepared.n_groups > 1 else None))
    return by_group, notes


def alpha_comparisons(prepared: PreparedData, by_group: dict[str, GroupQuality]) -> list[AlphaComparisonRow]:
    """Feldt's test of each focal group's alpha against the reference group's, Holm-adjusted over the groups.

    Each group's alpha is on the items it is scored on (an item left out for a group is left out of its
    alpha), so a difference may also reflect the item sets.
    """
    reference = prepared.group_names[0]
    ref = by_group[reference]
    rows = []
    for group in prepared.group_names[1:]:
        q = by_group[group]
        n_ref, n_group = _complete_rows(ref), _complete_rows(q)
        test = compare_alphas(q.alpha if q.alpha is not None else np.nan, n_group,
                              ref.alpha if ref.alpha is not None else np.nan, n_ref)  # fmt: skip
        if np.isfinite(test.p_value):
            rows.append((group, test))
    order = sorted(range(len(rows)), key=lambda i: rows[i][1].p_value)
    adjusted, running = [0.0] * len(rows), 0.0
    for rank, i in enumerate(order):
        running = max(running, min(1.0, (len(rows) - rank) * rows[i][1].p_value))
        adjusted[i] = running
    return [
        AlphaComparisonRow(group=g, reference=reference, w=t.w, df=[t.df_a, t.df_b], p_value=t.p_value, p_holm=p)
        for (g, t), p in zip(rows, adjusted, strict=True)
    ]


def _complete_rows(quality: GroupQuality) -> int:
    """Rows with every item of the group answered: those its alpha was computed on."""
    return 0 if quality.dimensionality is None else quality.dimensionality.n_complete


def fit_warnings(prepared: PreparedData, fit: MultiGroupFit, em: EMSettings) -> list[str]:
    """Non-convergence, latent densities beyond the grid, cells to review, suspicious slopes."""
    notes = []
    if not fit.converged:
        notes.append(f"EM did not converge in {em.max_iter} iterations; estimates may be unstable")
    grid = em.quadrature
    for g, group in enumerate(prepared.group_names):
        low, high = fit.latent_mean[g] - 4 * fit.latent_sd[g], fit.latent_mean[g] + 4 * fit.latent_sd[g]
        if low < grid.lower or high > grid.upper:
            notes.append(
                f"group {group!r}: latent N({fit.latent_mean[g]:.2f}, {fit.latent_sd[g]:.2f}^2) reaches beyond the "
                f"quadrature grid {grid.lower:g}..{grid.upper:g} at 4 SD; widen the grid for accurate estimates"
            )
    return notes


def reversed_item_warnings(prepared: PreparedData, fit: MultiGroupFit) -> list[str]:
    """Reference slopes that are not positive: items that run against the others, in one warning shown first (the
    item-rest correlations, alpha and the category checks read such items backwards too).

    One such item is most often reverse-keyed and left unreversed; many point to a test that measures more
    than one trait, so the warning names both causes when more than one item runs backwards.
    """
    slopes = fit.group_params(0).slopes
    backwards = [j for j in range(len(prepared.item_ids)) if slopes[j] <= 0]
    if not backwards:
        return []
    listed = ", ".join(f"{prepared.item_ids[j]} ({slopes[j]:.3f})" for j in backwards)
    one = len(backwards) == 1
    note = (
        f"{'item' if one else f'{len(backwards)} of {len(slopes)} items'} with a slope that is not positive, "
        f"running against the others: {listed}. A reverse-keyed item left unreversed does this: recode "
        f"{'it' if one else 'such items'} in the file (the top code minus each code) and calibrate again; until "
        "then alpha and the item-rest correlations read "
        f"{'it' if one else 'them'} backwards"
    )
    if not one:
        note += (
            ". Many such items can also mean the test measures more than one trait (see the dimensionality "
            "checks): then calibrate each trait's items as a test of its own"
        )
    return [note]


def review_warnings(prepared: PreparedData, fit: MultiGroupFit, policy: PolicyTable) -> list[str]:
    """Cells with a policy other than invariant, and reference slopes that look near-Heywood."""
    notes = []
    reviewed = policy.reviewed_cells()
    if reviewed:
        notes.append(
            "items with a group policy other than invariant (content experts must review these): "
            + ", ".join(f"{prepared.item_ids[j]} in {prepared.group_names[g]}" for j, g in reviewed)
        )
    slopes = fit.group_params(0).slopes
    for j, item in enumerate(prepared.item_ids):
        if slopes[j] > SLOPE_VERY_LARGE:
            notes.append(f"item {item!r}: slope {slopes[j]:.2f} is very large (near-Heywood?)")
    weak = []
    for j in np.flatnonzero(fit.template.has_guessing):
        g = float(fit.group_params(0).guessing[j])
        se = g * (1.0 - g) * float(fit.slot_se[0, j, GUESSING_SLOT])
        if np.isfinite(se) and se > PRIOR_DOMINATED * GUESSING_PRIOR.sd:
            weak.append(f"{prepared.item_ids[j]} ({g:.2f}, SE {se:.2f})")
    if weak:
        notes.append(
            f"3PL asymptotes set mostly by their prior (mode 0.2, SD {GUESSING_PRIOR.sd:.3f}): {', '.join(weak)}; "
            "few respondents low enough on the scale to show guessing, or too few items: consider holding the "
            "asymptote at the chance rate in the item spec, or the 2PL"
        )
    return notes


def _group_quality(
    x: np.ndarray,
    params: ItemParameters,
    item_ids: list[str],
    grid: QuadratureGrid,
    latent: tuple[float, float],
) -> GroupQuality:
    prior = NormalPrior(0.0, 1.0)
    latent_mean, latent_sd = latent
    classical = classical_statistics(x)
    interval = alpha_interval(classical.alpha, classical.n_complete, x.shape[1])
    factor = one_factor_omega(x)
    eap = eap_scores(params, x, grid=grid, prior=prior)
    reliability = marginal_reliability(eap.theta, eap.se)
    table = summed_score_table(params, grid=grid, prior=prior)
    fit_stats = item_fit(params, x, latent_mean=latent_mean, latent_sd=latent_sd)
    summary = dimensionality(params, x, eap.theta)
    categories = {}
    for j, item in enumerate(item_ids):
        if params.n_categories[j] > 2:
            check = category_check(params, j, x[:, j], eap.theta)
            categories[item] = CategoryFunctioning(
                counts=[int(c) for c in check.counts],
                mean_theta=[finite_or_none(float(m)) for m in check.mean_theta],
                modal=[
                    None if np.isnan(lo) else ModalRange(low=finite_or_none(float(lo)), high=finite_or_none(float(hi)))
                    for lo, hi in zip(check.modal_from, check.modal_to, strict=True)
                ],
                steps_ordered=check.steps_ordered,
                flags=list(check.flags),
            )
    dims = Dimensionality(
        eigenvalue_ratio=finite_or_none(summary.eigenvalue_ratio),
        residual_pca_first_eigenvalue=finite_or_none(summary.residual_pca_first_eigenvalue),
        n_complete=summary.n_complete,
    )
    items = {
        item: ItemQuality(
            item_rest_correlation=finite_or_none(float(classical.item_rest[j])),
            alpha_if_deleted=finite_or_none(float(classical.alpha_if_deleted[j])),
            s_x2=finite_or_none(fit_stats.s_x2[j]),
            s_x2_df=int(fit_stats.s_x2_df[j]) if fit_stats.s_x2_df[j] > 0 else None,
            s_x2_p=finite_or_none(fit_stats.s_x2_p[j]),
            rmsd=finite_or_none(fit_stats.rmsd[j]),
        )
        for j, item in enumerate(item_ids)
    }
    return GroupQuality(
        n_respondents=int(x.shape[0]),
        alpha=finite_or_none(classical.alpha),
        alpha_if_deleted={i: q.alpha_if_deleted for i, q in items.items()},
        marginal_reliability=finite_or_none(reliability),
        summed_score_table=[
            SummedScoreRow(summed_score=int(s), theta=float(t), se=float(e), probability=float(p))
            for s, t, e, p in zip(table.summed_score, table.theta, table.se, table.probability, strict=True)
        ],
        items=items,
        dimensionality=dims,
        categories=categories,
        alpha_interval=[float(v) for v in interval] if np.all(np.isfinite(interval)) else None,
        omega=finite_or_none(factor.omega),
    )


def _quality_warnings(quality: GroupQuality, group: str | None) -> list[str]:
    where = "" if group is None else f"group {group!r}: "
    out = []
    if quality.alpha is not None and quality.alpha < ALPHA_GROUP_USE:
        out.append(f"{where}alpha = {quality.alpha:.3f} is below {ALPHA_GROUP_USE} (common minimum for group use)")
    rel = quality.marginal_reliability
    if rel is not None and rel < ALPHA_INDIVIDUAL_DECISIONS:
        out.append(
            f"{where}marginal reliability = {rel:.3f} is below {ALPHA_INDIVIDUAL_DECISIONS}: scores must not "
            "drive individual high-stakes decisions on their own"
        )
    for item, q in quality.items.items():
        if q.item_rest_correlation is not None and q.item_rest_correlation < ITEM_REST_MINIMUM:
            out.append(
                f"{where}item {item!r}: item-rest correlation {q.item_rest_correlation:.3f} is below "
                f"{ITEM_REST_MINIMUM} (common practice)"
            )
        if q.rmsd is not None and q.rmsd > RMSD_WARNING:
            out.append(
                f"{where}item {item!r}: RMSD {q.rmsd:.3f} above {RMSD_WARNING:.2f} (common practice): the model curve "
                "misses this group's observed curve"
            )
        if q.s_x2_p is not None and q.s_x2_p < S_X2_MISFIT_P:
            out.append(
                f"{where}item {item!r}: S-X2 = {q.s_x2:.1f} (df {q.s_x2_df}), p < {S_X2_MISFIT_P:g}: item misfit"
            )
    for item, check in quality.categories.items():
        for flag in check.flags:
            out.append(f"{where}item {item!r}: {flag} (category functioning; review the rating guide first)")
    dims = quality.dimensionality
    if dims is not None and dims.eigenvalue_ratio is not None and dims.eigenvalue_ratio < EIGENVALUE_RATIO_MINIMUM:
        out.append(
            f"{where}first-to-second eigenvalue ratio {dims.eigenvalue_ratio:.3f} is below "
            f"{EIGENVALUE_RATIO_MINIMUM:g} "
            "(rule of thumb, Raiche 2005 recalled from memory): check unidimensionality"
        )
    residual = None if dims is None else dims.residual_pca_first_eigenvalue
    if residual is not None and residual > RESIDUAL_EIGENVALUE_MAXIMUM:
        out.append(
            f"{where}largest eigenvalue of the residual PCA {residual:.2f} is above {RESIDUAL_EIGENVALUE_MAXIMUM:g} "
            "(rule of thumb): a second dimension may be present"
        )
    return out
