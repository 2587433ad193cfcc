"""Group summaries from plausible values: the honest way to compare groups and cohorts with a bundle.

Averages of EAP scores understate a group's spread and pull group differences towards zero (each score
is shrunk towards the one prior). Here every respondent gets ``draws`` plausible values from their
posterior under a latent density conditioned on their reporting cell (the group, and the cohort when
given), the cells' densities fitted with the bundle's items held (Mislevy 1991). Each cell's mean and SD
and every pairwise difference of means are computed on each set of draws and combined by Rubin's rules
(:mod:`calibration.irt.plausible`), with 95% intervals from the Barnard-Rubin df (complete-data df n - 1)
and the difference's standardized size (the difference over the pooled SD). The sampling variance of a
mean is that of a simple random sample (``sd^2 / n``): a clustered or weighted design needs its own
variance estimator. Each
respondent is scored on their group's item set (the bundle's policy); when groups were scored on
different item sets the summary says so, since their comparison then rests on the items they share.
"""

from __future__ import annotations

import itertools
from collections.abc import Sequence

import numpy as np
from pydantic import Field

from calibration.bundle.schema import Frozen
from calibration.bundle.scorer import BundleScorer
from calibration.estimation import fit_cell_densities
from calibration.irt.likelihood import build_design, log_likelihood_grid
from calibration.irt.models import FloatArray
from calibration.irt.plausible import draw_plausible_values, rubin

DEFAULT_DRAWS = 10
DEFAULT_SEED = 20261202
SMALL_CELL = 30
"""A cell with fewer respondents than this gets a warning (its mean's interval is wide; common practice)."""
SUMMARY_CAUTION = (
    "Group summaries describe groups, not individuals. Their SEs assume a simple random sample within each "
    "cell; a clustered or weighted design needs its own variance estimator. Groups scored on different item "
    "sets are compared through the items they share: review the content coverage before reading a difference."
)


class CellSummary(Frozen):
    """One reporting cell (group, and cohort when given): size, mean and SD with SEs, interval, percentiles."""

    group: str
    cohort: str | None = None
    n: int
    mean: float
    se: float = Field(description="Rubin's total SE of the mean (measurement and sampling)")
    ci_low: float
    ci_high: float
    df: float | None = Field(description="Barnard-Rubin small-sample degrees of freedom of the interval")
    sd: float
    sd_se: float
    percentiles: dict[str, float] = Field(default_factory=dict, description="mean over the draws of each percentile")
    items_scored: int = Field(description="items the group is scored on (the bundle's policy)")


class DifferenceSummary(Frozen):
    """The difference of two cells' means, ``mean(first) - mean(second)``, with its interval and size."""

    group: str
    cohort: str | None = None
    versus_group: str
    versus_cohort: str | None = None
    difference: float
    se: float
    ci_low: float
    ci_high: float
    df: float | None
    standardized: float = Field(description="difference over the pooled SD of the two cells")


class GroupSummaries(Frozen):
    """Plausible-value summaries of every reporting cell and every pair of cells."""

    bundle: str
    draws: int
    seed: int
    cells: list[CellSummary]
    differences: list[DifferenceSummary]
    left_out: int = Field(0, description="respondents without any answer, left out of every summary")
    warnings: list[str] = Field(default_factory=list)
    method: str = (
        "plausible values (Mislevy 1991) under each cell's normal latent density fitted with the items held; "
        "means, SDs and differences combined over the draws by Rubin's rules (1987); 95% intervals from "
        "Barnard and Rubin's (1999) small-sample df; simple random sampling within cells"
    )
    caution: str = SUMMARY_CAUTION


def _cell_labels(
    groups: Sequence[str], cohorts: Sequence[str] | None
) -> tuple[list[tuple[str, str | None]], np.ndarray]:
    keys = [
        (g, None if cohorts is None else str(c)) for g, c in zip(groups, cohorts or [None] * len(groups), strict=True)
    ]
    distinct = sorted(set(keys), key=lambda k: (k[0], "" if k[1] is None else k[1]))
    position = {k: i for i, k in enumerate(distinct)}
    return distinct, np.fromiter((position[k] for k in keys), dtype=np.int64, count=len(keys))


def _log_likelihoods(scorer: BundleScorer, x: FloatArray, groups: Sequence[str]) -> FloatArray:
    """Each respondent's ``log P(x | theta_q)`` on the scoring grid, under their group's plan."""
    points = scorer.grid.points
    out = np.empty((x.shape[0], points.size))
    labels = np.asarray(groups, dtype=object)
    for group in set(groups):
        plan = scorer.plans[group]
        rows = np.flatnonzero(labels == group)
        sub = x[np.ix_(rows, plan.columns)]
        out[rows] = log_likelihood_grid(
            plan.params, points, build_design(sub, plan.params.n_categories), tables=plan.tables
        )
    return out


def _item_set_warning(scorer: BundleScorer, scored_as: Sequence[str]) -> list[str]:
    present = sorted(set(scored_as))
    left_out = {g: [item for item, _ in scorer.excluded_for(g)] for g in present}
    if len({tuple(v) for v in left_out.values()}) <= 1:
        return []
    parts = "; ".join(f"{g}: {', '.join(items) or 'none'}" for g, items in left_out.items())
    return [
        f"the groups were scored on different item sets (items left out: {parts}): their scores share the "
        "bundle's scale but not all of its content; review the content coverage before reading a difference"
    ]


def summarize_groups(  # noqa: PLR0913 - the data and keyword-only options
    scorer: BundleScorer,
    responses: FloatArray,
    groups: Sequence[str],
    *,
    scored_as: Sequence[str] | None = None,
    cohorts: Sequence[str] | None = None,
    draws: int = DEFAULT_DRAWS,
    seed: int = DEFAULT_SEED,
    percentiles: Sequence[float] = (),
) -> GroupSummaries:
    """Summaries of every (group, cohort) cell and every pair of cells (see the module).

    ``responses`` (n, J) are aligned to the bundle's items (NaN: no answer); ``groups`` the reporting
    groups, ``scored_as`` the bundle group each respondent is scored as (default: ``groups``, which are
    then the bundle's groups, resolved), ``cohorts`` an optional second breakdown. Respondents without
    any answer are left out.
    """
    scored_as = groups if scored_as is None else scored_as
    x = scorer.model_categories(responses)
    answered = ~np.isnan(x).all(axis=1)
    keep = np.flatnonzero(answered)
    x = x[keep]
    kept_groups = [groups[i] for i in keep]
    kept_plans = [scored_as[i] for i in keep]
    kept_cohorts = None if cohorts is None else [cohorts[i] for i in keep]
    cells, cell_of = _cell_labels(kept_groups, kept_cohorts)
    points = scorer.grid.points
    log_lik = _log_likelihoods(scorer, x, kept_plans)
    densities = fit_cell_densities(log_lik, cell_of, len(cells), points)
    values = draw_plausible_values(
        log_lik, points, densities.mean[cell_of], densities.sd[cell_of], draws=draws, rng=np.random.default_rng(seed)
    )
    warnings = _item_set_warning(scorer, kept_plans)
    if not densities.converged:
        warnings.append(f"the cells' latent densities did not converge in {densities.n_iter} EM iterations")
    summaries, members = [], []
    for c, (group, cohort) in enumerate(cells):
        rows = np.flatnonzero(cell_of == c)
        members.append(rows)
        pv = values[rows]  # (n_c, draws)
        n = rows.size
        means, variances = pv.mean(axis=0), pv.var(axis=0, ddof=1) if n > 1 else np.zeros(draws)
        complete_df = max(n - 1, 1)  # had theta been observed
        mean = rubin(means, variances / max(n, 1), complete_df=complete_df)
        sds = np.sqrt(variances)
        sd = rubin(sds, variances / max(2 * (n - 1), 1), complete_df=complete_df)  # var(sd) about sd^2/(2(n-1))
        low, high = mean.interval()
        if n < SMALL_CELL:
            label = group if cohort is None else f"{group} / {cohort}"
            warnings.append(f"{label}: {n} respondents; its summaries are imprecise (wide intervals)")
        summaries.append(
            CellSummary(
                group=group,
                cohort=cohort,
                n=n,
                mean=mean.estimate,
                se=mean.se,
                ci_low=low,
                ci_high=high,
                df=mean.df if np.isfinite(mean.df) else None,
                sd=sd.estimate,
                sd_se=sd.se,
                percentiles={f"p{p:g}": float(np.mean(np.percentile(pv, p, axis=0))) for p in percentiles},
                items_scored=int(scorer.plans[kept_plans[rows[0]]].columns.size),
            )
        )
    differences = []
    for (a, first), (b, second) in itertools.combinations(enumerate(cells), 2):
        pa, pb = values[members[a]], values[members[b]]
        va, vb = pa.var(axis=0, ddof=1), pb.var(axis=0, ddof=1)
        gap = rubin(
            pa.mean(axis=0) - pb.mean(axis=0),
            va / pa.shape[0] + vb / pb.shape[0],
            complete_df=max(pa.shape[0] + pb.shape[0] - 2, 1),
        )
        low, high = gap.interval()
        differences.append(
            DifferenceSummary(
                group=first[0],
                cohort=first[1],
                versus_group=second[0],
                versus_cohort=second[1],
                difference=gap.estimate,
                se=gap.se,
                ci_low=low,
                ci_high=high,
                df=gap.df if np.isfinite(gap.df) else None,
                standardized=float(np.mean((pa.mean(axis=0) - pb.mean(axis=0)) / np.sqrt((va + vb) / 2))),
            )
        )
    return GroupSummaries(
        bundle=scorer.bundle.label,
        draws=draws,
        seed=seed,
        cells=summaries,
        differences=differences,
        left_out=int((~answered).sum()),
        warnings=warnings,
    )
