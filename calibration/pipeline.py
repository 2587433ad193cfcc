"""Orchestration: validated data -> checks -> DIF -> calibration -> quality -> an unpublished bundle.

No numerics live here; each step is a function of its own module. With one group
the flow is: checks, single-group EM, quality. With several groups (a group
column) it is:

1. checks per group (minimum size, items without variance in a group);
2. observed-score screening (purified MH / Mantel / SMD, logistic regression);
3. the scalar model (every item shared, focal means and SDs free);
4. anchors and anchored LR tests of every other item (calibration.dif.irt);
5. the policy per item x group: invariant, group-specific or excluded
   (flagged = significant after FDR and at least a moderate effect), then any
   reviewer overrides;
6. the invariance ladder (configural, metric, scalar, partial);
7. the final calibration under the policy, with SEs;
8. quality by group.
"""

from __future__ import annotations

from collections.abc import Callable, Sequence
from dataclasses import dataclass, field, replace
from datetime import UTC, datetime

import numpy as np
from pydantic import ValidationError
from scipy import stats

from calibration import __version__
from calibration.bundle.schema import (
    AnchorCandidate,
    Anchors,
    Bundle,
    DifReport,
    DifSettingsRecord,
    Dimensionality,
    ExcludedItem,
    FitSummary,
    GroupMetric,
    GroupPolicy,
    GroupQuality,
    InformationTable,
    IrtDifRow,
    ItemEntry,
    ItemQuality,
    LadderRow,
    Metric,
    ObservedDifRow,
    PolicyEvidence,
    Provenance,
    QuadratureSettings,
    Quality,
    ReportingScaleSettings,
    ScoringSettings,
    SummedScoreRow,
)
from calibration.dif.irt import DifOutcome, DifSettings, ItemGroupTest, run_irt_dif
from calibration.dif.logistic import logistic_dif
from calibration.dif.observed import ObservedScreening, matching_scores, screen_observed
from calibration.errors import CalibrationInputError
from calibration.estimation import (
    EMSettings,
    LatentSpec,
    MultiGroupFit,
    calibrate_groups,
    threshold_se,
)
from calibration.io import ResponseData, finite_or_none
from calibration.irt.likelihood import QuadratureGrid
from calibration.irt.models import ItemParameters
from calibration.irt.reliability import information_curve, marginal_reliability
from calibration.irt.scoring import NormalPrior, eap_scores
from calibration.irt.summed_scores import summed_score_table
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

SINGLE_GROUP = "all"
# About 500 respondents per group is a common floor for 2PL/GRM calibration
# (Jiang, Wang & Weiss 2016, published for the GRM). Below it equitheta warns and says
# what suffers. It refuses only below a hard floor: 50 respondents in a single-group
# calibration, 30 per group in a multiple-group one. With fewer than 30 a group's latent
# mean has an SE of at least 1/sqrt(30) = 0.18 even for a perfectly reliable test, a
# right/wrong item answered by so few has slope and intercept SEs of the order of 0.5,
# and the chi-square references of the MH and LR tests need expected cell counts that
# such a group cannot fill; no statement about that group's items would be worth
# publishing. A programme's own rule can raise the floor (``min_group_size``).
RECOMMENDED_MIN_RESPONDENTS = 500
HARD_MIN_RESPONDENTS = 50
HARD_MIN_PER_GROUP = 30
# A graded category with fewer answers than this in any group is merged with a neighbour (common practice).
MIN_CATEGORY_COUNT = 5

DIF_ACTIONS = ("exclude", "free")
POLICY_STATUSES = ("invariant", "group_specific", "excluded")


@dataclass(frozen=True)
class PolicyOverride:
    """A reviewer's decision for one item in one group; ``note`` is required."""

    item: str
    group: str
    status: str
    note: str


@dataclass(frozen=True)
class PipelineSettings:
    em: EMSettings = field(default_factory=EMSettings)
    scoring_quadrature: QuadratureGrid = field(default_factory=QuadratureGrid)
    reporting_scale: ReportingScaleSettings = field(default_factory=ReportingScaleSettings)
    scoring_method: str = "eap"
    min_items_answered: int | None = None  # default: min(5, number of items)
    dif: DifSettings = field(default_factory=DifSettings)
    dif_action: str = "exclude"
    mh_greater_than_one_z: float = 1.645
    min_group_size: int = HARD_MIN_PER_GROUP  # refuse a multiple-group calibration with a smaller group

    def describe(self) -> dict[str, str | int | float | bool | None]:
        prior = self.em.slope_prior
        return {
            "max_iter": self.em.max_iter,
            "tolerance": self.em.tolerance,
            "calibration_quadrature_points": self.em.quadrature.n_points,
            "calibration_quadrature_range": f"{self.em.quadrature.lower:g}..{self.em.quadrature.upper:g}",
            "slope_prior": "none" if prior is None else f"lognormal(mean={prior.mean:g}, sd={prior.sd:g})",
            "acceleration": "squarem" if self.em.accelerate else "none",
            "dif_action": self.dif_action,
            "dif_fdr_alpha": self.dif.alpha,
            "dif_anchors": ",".join(self.dif.anchors) or "automatic",
            "min_group_size": self.min_group_size,
        }


@dataclass(frozen=True)
class CalibrationOutcome:
    bundle: Bundle
    fit: MultiGroupFit
    warnings: tuple[str, ...]
    dif: DifOutcome | None = None


def _now() -> str:
    return datetime.now(UTC).strftime("%Y-%m-%dT%H:%M:%SZ")


def _quiet_fit(*args, **kwargs) -> MultiGroupFit:  # type: ignore[no-untyped-def]
    """A fit whose non-convergence is reported in the bundle's warnings, not as a Python warning."""
    return calibrate_groups(*args, warn=False, **kwargs)


def _group_setup(data: ResponseData, reference_group: str | None) -> tuple[list[str], np.ndarray]:
    """Group names with the reference first, and each row's group index."""
    if data.groups is None:
        return [SINGLE_GROUP], np.zeros(data.n_persons, dtype=np.int64)
    labels = np.asarray(data.groups, dtype=object)
    names, counts = np.unique(labels, return_counts=True)
    names = [str(n) for n in names]
    if reference_group is None:
        # Default reference: the largest group (ties: alphabetical).
        reference_group = names[int(np.argmax(counts))]
    if reference_group not in names:
        raise CalibrationInputError(
            f"reference group {reference_group!r} is not in the data (groups: {', '.join(names)})"
        )
    ordered = [reference_group] + [n for n in names if n != reference_group]
    lookup = {n: i for i, n in enumerate(ordered)}
    return ordered, np.array([lookup[str(g)] for g in labels], dtype=np.int64)


@dataclass(frozen=True)
class PreparedData:
    """The checked data a calibration runs on: group order, items kept, categories merged."""

    group_names: list[str]  # reference first
    group_index: np.ndarray  # each row's group position
    x: np.ndarray  # (n_persons, n_items kept), merged categories applied
    item_ids: tuple[str, ...]
    k: np.ndarray
    models: tuple[str, ...]
    category_maps: dict[int, list[int]]
    excluded_items: list[ExcludedItem]
    no_variance_cells: dict[tuple[int, int], str]
    notes: list[str]


def prepare_data(
    data: ResponseData,
    *,
    settings: PipelineSettings,
    reference_group: str | None = None,
    overrides: Sequence[PolicyOverride] = (),
) -> PreparedData:
    """Every check that needs no model fit: sizes, variance, sparse categories, overrides, anchors.

    Raises :class:`CalibrationInputError` naming what is wrong; cheap enough to run before a
    progress display starts (the command line does).
    """
    if settings.dif_action not in DIF_ACTIONS:
        raise CalibrationInputError(f"dif action {settings.dif_action!r} is not one of {', '.join(DIF_ACTIONS)}")
    group_names, group_index = _group_setup(data, reference_group)
    n_groups = len(group_names)
    notes: list[str] = []
    if data.n_persons < HARD_MIN_RESPONDENTS:
        raise CalibrationInputError(
            f"{data.source}: {data.n_persons} respondents; a calibration needs at least {HARD_MIN_RESPONDENTS} "
            f"(about {RECOMMENDED_MIN_RESPONDENTS} per group is a common floor for 2PL and graded items)"
        )
    sizes = np.bincount(group_index, minlength=n_groups)
    if settings.min_group_size < HARD_MIN_PER_GROUP:
        raise CalibrationInputError(
            f"the minimum group size cannot be set below {HARD_MIN_PER_GROUP} (the hard floor; see the "
            f"documentation of HARD_MIN_PER_GROUP), got {settings.min_group_size}"
        )
    if n_groups > 1:
        small = [f"{group_names[g]} ({sizes[g]})" for g in range(n_groups) if sizes[g] < settings.min_group_size]
        if small:
            raise CalibrationInputError(
                f"{data.source}: groups with fewer than {settings.min_group_size} respondents cannot be calibrated "
                f"or screened for DIF: {', '.join(small)}; merge or drop them"
            )
    notes.extend(small_group_notes(group_names, sizes, multiple=n_groups > 1))

    # Items without variance: out of the calibration if so in the reference group, else out for that group.
    x_all = data.responses
    excluded_items: list[ExcludedItem] = []
    no_variance_cells: dict[tuple[int, int], str] = {}
    keep: list[int] = []
    for j, item in enumerate(data.item_ids):
        ref_values = np.unique(x_all[(group_index == 0) & ~np.isnan(x_all[:, j]), j])
        all_values = np.unique(x_all[~np.isnan(x_all[:, j]), j])
        if all_values.size <= 1 or ref_values.size <= 1:
            where = "" if n_groups == 1 else f" in the reference group {group_names[0]!r}"
            answered = int(np.sum(~np.isnan(x_all[group_index == 0, j]) if n_groups > 1 else ~np.isnan(x_all[:, j])))
            value = int(ref_values[0]) if ref_values.size else None
            reason = f"no variance{where}: all {answered} respondents who answered gave category {value}"
            excluded_items.append(ExcludedItem(id=item, reason=reason))
            notes.append(f"item {item!r} left out of the calibration: {reason}")
            continue
        keep.append(j)
        for g in range(1, n_groups):
            values = np.unique(x_all[(group_index == g) & ~np.isnan(x_all[:, j]), j])
            if values.size <= 1:
                no_variance_cells[(len(keep) - 1, g)] = (
                    f"no variance in group {group_names[g]!r}: every answer was category "
                    f"{int(values[0]) if values.size else 'none'}"
                )
    if len(keep) < 2:
        raise CalibrationInputError(f"{data.source}: fewer than two items with variance; nothing to calibrate")
    x = x_all[:, keep].copy()
    item_ids = tuple(data.item_ids[j] for j in keep)
    k = data.n_categories[keep].copy()
    category_maps: dict[int, list[int]] = {}
    for j in range(len(keep)):
        merged = collapse_sparse_categories(x[:, j], int(k[j]), group_index, group_names)
        if merged is not None:
            mapping, note = merged
            answered = ~np.isnan(x[:, j])
            x[answered, j] = np.asarray(mapping, dtype=np.float64)[x[answered, j].astype(np.int64)]
            category_maps[j] = mapping
            k[j] = max(mapping) + 1
            notes.append(f"item {item_ids[j]!r}: {note}; scoring applies the same recoding")
    # Reviewer overrides and named anchors are checked now, before the long steps.
    _apply_overrides(overrides, {}, {}, item_ids, group_names, check_only=True)
    _check_anchors(settings.dif.anchors, item_ids, data.item_ids, excluded_items, n_groups)
    # An item merged down to two categories becomes a 2PL item.
    models = tuple("2pl" if k[pos] == 2 and data.models[j] == "grm" else data.models[j] for pos, j in enumerate(keep))
    return PreparedData(
        group_names, group_index, x, item_ids, k, models, category_maps, excluded_items, no_variance_cells, notes
    )


def calibrate_data(
    data: ResponseData,
    *,
    name: str,
    settings: PipelineSettings | None = None,
    reference_group: str | None = None,
    overrides: Sequence[PolicyOverride] = (),
    progress: Callable[[str, int, float], None] | None = None,
) -> CalibrationOutcome:
    """Calibrate a response table (one or several groups) and build the unpublished bundle."""
    settings = settings or PipelineSettings()
    prepared = prepare_data(data, settings=settings, reference_group=reference_group, overrides=overrides)
    group_names, group_index, x, item_ids, k, models = (
        prepared.group_names,
        prepared.group_index,
        prepared.x,
        prepared.item_ids,
        prepared.k,
        prepared.models,
    )
    n_groups = len(group_names)
    category_maps, excluded_items = prepared.category_maps, prepared.excluded_items
    no_variance_cells, notes = prepared.no_variance_cells, list(prepared.notes)
    n_items = len(item_ids)

    def em_progress(stage: str) -> Callable[[int, float], None]:
        return lambda it, ll: progress(stage, it, ll) if progress is not None else None

    observed_rows: list[ObservedDifRow] = []
    irt_rows: list[IrtDifRow] = []
    ladder: list[LadderRow] = []
    dif_outcome: DifOutcome | None = None
    status = {(j, g): "invariant" for j in range(n_items) for g in range(n_groups)}
    reasons: dict[tuple[int, int], str] = {
        (j, g): ("single-group calibration" if n_groups == 1 else "no DIF flag")
        for j in range(n_items)
        for g in range(n_groups)
    }
    evidence: dict[tuple[int, int], PolicyEvidence] = {}
    anchors_record = Anchors(items=[], method="none: single-group calibration (the scale is fixed by N(0,1))")
    em_no_se = replace(settings.em, standard_errors=False)

    # Cells without variance in a group cannot be estimated: every model treats them as not administered.
    x_model = x.copy()
    for j, g in no_variance_cells:
        x_model[group_index == g, j] = np.nan
    if n_groups > 1:
        if progress is not None:
            progress("screen", 0, 0.0)
        screening = screen_observed(x, k, group_index, n_groups, greater_than_one_z=settings.mh_greater_than_one_z)
        observed_rows = _observed_rows(x, k, group_index, screening, item_ids, group_names)
        scalar = _quiet_fit(
            x_model, k, group_index, n_groups, models=models, settings=em_no_se, progress=em_progress("scalar")
        )
        dif_outcome = run_irt_dif(
            x_model,
            k,
            group_index,
            n_groups,
            scalar,
            item_ids=item_ids,
            models=models,
            settings=settings.dif,
            em_settings=settings.em,
            skip=set(no_variance_cells),
            progress=(lambda stage, done, total: progress(stage, done, float(total))) if progress else None,
        )
        anchors_record = Anchors(
            items=[item_ids[j] for j in dif_outcome.anchors],
            method=dif_outcome.anchor_method,
            ranking=[
                AnchorCandidate(
                    item=item_ids[c.item],
                    rank=r + 1,
                    statistic=finite_or_none(c.statistic),
                    worst_group=group_names[c.worst_group] if c.worst_group >= 0 else "none",
                    p_adjusted=finite_or_none(c.p_adjusted),
                    selected=c.item in dif_outcome.anchors,
                )
                for r, c in enumerate(dif_outcome.ranking)
            ],
        )
        notes.extend(dif_outcome.warnings)
        for j in dif_outcome.anchors:
            for g in range(1, n_groups):
                reasons[(j, g)] = "anchor item (constrained equal across groups)"
                test = dif_outcome.screening.get((j, g))
                if test is not None:
                    evidence[(j, g)] = _evidence(test, settings.dif, "screening with all other items as anchors")
        irt_rows = [
            _irt_row(t, "screening", item_ids, group_names, settings.dif) for t in dif_outcome.screening.values()
        ]
        irt_rows += [_irt_row(t, "test", item_ids, group_names, settings.dif) for t in dif_outcome.tests.values()]
        action = "excluded" if settings.dif_action == "exclude" else "group_specific"
        for (j, g), test in dif_outcome.tests.items():
            evidence[(j, g)] = _evidence(test, settings.dif, "anchored LR test against the anchor set")
            if test.flagged(settings.dif):
                status[(j, g)] = action
                low, high = test.effect_interval()
                reasons[(j, g)] = (
                    f"DIF flag: omnibus G2 = {test.g2_omnibus:.1f} (df {test.df_omnibus}), FDR-adjusted "
                    f"p = {test.p_adjusted:.2g}, effect {test.effect_theta:.2f} theta units "
                    f"(95% interval {low:.2f} to {high:.2f}: {test.level(settings.dif)})"
                )
        for (j, g), why in no_variance_cells.items():
            status[(j, g)] = "excluded"
            reasons[(j, g)] = why
        _apply_overrides(overrides, status, reasons, item_ids, group_names)
        ladder = _ladder(
            x_model, k, group_index, n_groups, models, em_no_se, scalar, status, dif_outcome, set(no_variance_cells)
        )

    # Final calibration under the policy: excluded cells are not administered for that group.
    k_max = int(k.max())
    group_free = np.zeros((n_groups, n_items, k_max), dtype=bool)
    x_final = x.copy()
    for (j, g), st in status.items():
        if st == "group_specific":
            group_free[g, j, :] = True
        elif st == "excluded":
            x_final[group_index == g, j] = np.nan
    if progress is not None:
        progress("final", 0, 0.0)
    start = dif_outcome.anchor_fit.tables if dif_outcome is not None else None
    fit = _quiet_fit(
        x_final,
        k,
        group_index,
        n_groups,
        models=models,
        settings=settings.em,
        group_free=group_free,
        start=start,
        progress=em_progress("final"),
    )
    if not fit.converged:
        notes.append(f"EM did not converge in {settings.em.max_iter} iterations; estimates may be unstable")
    grid = settings.em.quadrature
    for g, group in enumerate(group_names):
        low, high = fit.latent_mean[g] - 4 * fit.latent_sd[g], fit.latent_mean[g] + 4 * fit.latent_sd[g]
        if low < grid.lower or high > grid.upper:
            notes.append(
                f"group {group!r}: latent N({fit.latent_mean[g]:.2f}, {fit.latent_sd[g]:.2f}^2) reaches beyond the "
                f"quadrature grid {grid.lower:g}..{grid.upper:g} at 4 SD; widen the grid for accurate estimates"
            )

    # Quality by group.
    if progress is not None:
        progress("quality", 0, fit.log_likelihood)
    prior = NormalPrior(0.0, 1.0)
    by_group: dict[str, GroupQuality] = {}
    for g, group in enumerate(group_names):
        rows = group_index == g
        kept = [j for j in range(n_items) if status[(j, g)] != "excluded"]
        params = fit.group_params(g).subset(kept)
        xg = x[np.ix_(rows, kept)]
        quality = _group_quality(
            xg, params, [item_ids[j] for j in kept], prior, settings, float(fit.latent_mean[g]), float(fit.latent_sd[g])
        )
        by_group[group] = quality
        notes.extend(_quality_warnings(quality, group if n_groups > 1 else None))
    flagged_cells = [(item_ids[j], group_names[g]) for (j, g), st in status.items() if st != "invariant" and g > 0]
    if flagged_cells:
        notes.append(
            "items with a group policy other than invariant (content experts must review these): "
            + ", ".join(f"{i} in {g}" for i, g in flagged_cells)
        )
    reference_params = fit.group_params(0)
    for j, item in enumerate(item_ids):
        if reference_params.slopes[j] <= 0:
            notes.append(f"item {item!r}: slope {reference_params.slopes[j]:.3f} is not positive (miskeyed?)")
        elif reference_params.slopes[j] > 4:
            notes.append(f"item {item!r}: slope {reference_params.slopes[j]:.2f} is very large (near-Heywood?)")

    try:
        bundle = _assemble(
            data=data,
            name=name,
            settings=settings,
            fit=fit,
            x=x,
            item_ids=item_ids,
            models=models,
            k=k,
            group_names=group_names,
            group_index=group_index,
            status=status,
            reasons=reasons,
            evidence=evidence,
            excluded_items=excluded_items,
            anchors=anchors_record,
            by_group=by_group,
            notes=notes,
            category_maps=category_maps,
            dif=(
                DifReport(
                    settings=DifSettingsRecord(
                        fdr_alpha=settings.dif.alpha,
                        effect_moderate=settings.dif.effect_moderate,
                        effect_large=settings.dif.effect_large,
                        action=settings.dif_action,  # type: ignore[arg-type]
                        mh_greater_than_one_z=settings.mh_greater_than_one_z,
                        anchor_fraction=settings.dif.anchor_fraction,
                        min_anchors=settings.dif.min_anchors,
                    ),
                    observed=observed_rows,
                    irt=irt_rows,
                )
                if n_groups > 1
                else None
            ),
            ladder=ladder,
        )
    except ValidationError as exc:
        # An estimate outside the publishable ranges (a runaway slope, a latent mean off the grid): say which,
        # before anything is published, instead of a traceback after the long steps.
        problems = "; ".join(e["msg"].removeprefix("Value error, ") for e in exc.errors()[:5])
        raise CalibrationInputError(
            f"{data.source}: the calibration produced values that cannot be published ({problems}); a slope "
            "this large is a near-Heywood case (the item is almost a step function of the others): leave the item "
            "out with an item spec (--items, include=no) or calibrate with a slope prior (--slope-prior-sd)"
        ) from exc
    return CalibrationOutcome(bundle=bundle, fit=fit, warnings=tuple(notes), dif=dif_outcome)


def small_group_notes(group_names: list[str], sizes: np.ndarray, *, multiple: bool) -> list[str]:
    """What a group below the recommended size means for its evidence, in words."""
    out = []
    for name, n in zip(group_names, sizes, strict=True):
        if n >= RECOMMENDED_MIN_RESPONDENTS:
            continue
        what = "item-parameter SEs are wide; the S-X2 item fit and the residual PCA rest on sparse cells"
        if multiple:
            what += (
                "; its latent mean and SD and any group-specific parameters are imprecise; DIF tests have low "
                "power, so the absence of a flag is weak evidence of invariance; Mantel-Haenszel strata are "
                "sparse; effect sizes carry wide intervals (effect_theta_se)"
            )
        out.append(
            f"group {name!r}: {int(n)} respondents is below the common floor of about {RECOMMENDED_MIN_RESPONDENTS} "
            f"for 2PL/graded calibration (Jiang, Wang & Weiss 2016): {what}"
        )
    return out


def _check_anchors(
    anchors: Sequence[str],
    item_ids: tuple[str, ...],
    all_items: tuple[str, ...],
    excluded_items: list[ExcludedItem],
    n_groups: int,
) -> None:
    """Named anchors must be calibrated items of a multiple-group calibration."""
    if not anchors:
        return
    if n_groups == 1:
        raise CalibrationInputError("anchors apply only to a multiple-group calibration (give a group column)")
    dropped = {e.id: e.reason for e in excluded_items}
    problems = []
    for anchor in anchors:
        if anchor in dropped:
            problems.append(f"anchor {anchor!r} was left out of the calibration ({dropped[anchor]})")
        elif anchor not in item_ids:
            near = [i for i in all_items if i.lower() == anchor.lower()]
            hint = f" (did you mean {near[0]!r}?)" if near else ""
            problems.append(f"anchor {anchor!r} is not an item of the data{hint}")
    if problems:
        raise CalibrationInputError("; ".join(problems))


def collapse_sparse_categories(
    column: np.ndarray, n_categories: int, group_index: np.ndarray, group_names: list[str]
) -> tuple[list[int], str] | None:
    """Merge graded categories with fewer than MIN_CATEGORY_COUNT answers in any group into a neighbour.

    The sparsest category goes into its smaller neighbour (the end categories into
    their only neighbour) until every category is well filled or two remain.
    Returns (answer code -> new code, a note naming what was merged and why) or None.
    """
    if n_categories < 3:
        return None
    n_groups = len(group_names)
    mapping = list(range(n_categories))
    merged_notes = []
    while max(mapping) >= 2:
        k_now = max(mapping) + 1
        counts = np.zeros((n_groups, k_now))
        for g in range(n_groups):
            values = column[(group_index == g) & ~np.isnan(column)].astype(np.int64)
            counts[g] = np.bincount(np.asarray(mapping)[values], minlength=k_now)
        worst = counts.min(axis=0)
        c = int(np.argmin(worst))
        if worst[c] >= MIN_CATEGORY_COUNT:
            break
        group = int(np.argmin(counts[:, c]))
        if c == 0:
            into = 1
        elif c == k_now - 1:
            into = k_now - 2
        else:
            into = c - 1 if counts[:, c - 1].min() <= counts[:, c + 1].min() else c + 1
        low, high = min(c, into), max(c, into)
        raw = [code for code, m in enumerate(mapping) if m in (low, high)]
        where = "" if n_groups == 1 else f" in group {group_names[group]!r}"
        merged_notes.append(
            f"answer codes {', '.join(map(str, raw))} merged (a category had {int(counts[group, c])} "
            f"answers{where}, below {MIN_CATEGORY_COUNT})"
        )
        mapping = [m if m <= low else m - 1 for m in mapping]
    if not merged_notes:
        return None
    return mapping, "; ".join(merged_notes)


def _apply_overrides(
    overrides: Sequence[PolicyOverride],
    status: dict[tuple[int, int], str],
    reasons: dict[tuple[int, int], str],
    item_ids: tuple[str, ...],
    group_names: list[str],
    *,
    check_only: bool = False,
) -> None:
    problems = []
    for o in overrides:
        if o.item not in item_ids:
            problems.append(f"policy override: item {o.item!r} is not a calibrated item")
            continue
        if o.group not in group_names:
            problems.append(f"policy override for {o.item}: group {o.group!r} is not in the data")
            continue
        if o.status not in POLICY_STATUSES:
            problems.append(
                f"policy override for {o.item} in {o.group}: status {o.status!r} is not one of "
                f"{', '.join(POLICY_STATUSES)}"
            )
            continue
        if o.group == group_names[0] and o.status != "invariant":
            problems.append(f"policy override for {o.item}: the reference group {o.group!r} keeps every item")
            continue
        if not o.note.strip():
            problems.append(f"policy override for {o.item} in {o.group}: a reviewer note is required")
            continue
        if check_only:
            continue
        cell = (item_ids.index(o.item), group_names.index(o.group))
        status[cell] = o.status
        reasons[cell] = f"reviewer override: {o.note.strip()}"
    if problems:
        raise CalibrationInputError("; ".join(problems))


def _ladder(
    x: np.ndarray,
    k: np.ndarray,
    group_index: np.ndarray,
    n_groups: int,
    models: tuple[str, ...],
    em: EMSettings,
    scalar: MultiGroupFit,
    status: dict[tuple[int, int], str],
    dif: DifOutcome,
    structural: set[tuple[int, int]],
) -> list[LadderRow]:
    """Configural, metric, scalar and partial invariance models on the same data.

    ``structural`` cells (no variance in a group) carry no data in any rung and stay shared.
    """
    n_items, k_max = x.shape[1], int(k.max())
    everything = np.ones((n_groups, n_items, k_max), dtype=bool)
    everything[0] = False
    for j, g in structural:
        everything[g, j, :] = False
    configural = _quiet_fit(
        x,
        k,
        group_index,
        n_groups,
        models=models,
        settings=em,
        group_free=everything,
        start=scalar.tables,
        latent=LatentSpec.reference_fixed(n_groups, free_mean=False, free_sd=False),
    )
    intercepts = everything.copy()
    intercepts[..., 0] = False
    metric = _quiet_fit(
        x,
        k,
        group_index,
        n_groups,
        models=models,
        settings=em,
        group_free=intercepts,
        start=scalar.tables,
        latent=LatentSpec.reference_fixed(n_groups, free_mean=False),
    )
    partial_free = np.zeros((n_groups, n_items, k_max), dtype=bool)
    for (j, g), st in status.items():
        if st != "invariant" and (j, g) not in structural:
            partial_free[g, j, :] = True  # same data as the other rungs: excluded cells are freed here
    partial = _quiet_fit(
        x, k, group_index, n_groups, models=models, settings=em, group_free=partial_free, start=dif.anchor_fit.tables
    )

    def row(model: str, description: str, fit: MultiGroupFit, against: tuple[str, MultiGroupFit] | None) -> LadderRow:
        lr = df = p = None
        compared = None
        if against is not None:
            compared, other = against
            df = abs(fit.n_parameters - other.n_parameters)
            bigger, smaller = (fit, other) if fit.n_parameters >= other.n_parameters else (other, fit)
            lr = max(2.0 * (bigger.log_likelihood - smaller.log_likelihood), 0.0)
            p = float(stats.chi2.sf(lr, df)) if df > 0 else None
        return LadderRow(
            model=model,
            description=description,
            log_likelihood=fit.log_likelihood,  # type: ignore[arg-type]
            n_parameters=fit.n_parameters,
            aic=fit.aic,
            bic=fit.bic,
            compared_with=compared,
            lr_statistic=lr,
            df=df,
            p_value=p,
        )

    return [
        row("configural", "all item parameters free per group; every group N(0,1)", configural, None),
        row("metric", "slopes equal; intercepts free; focal SDs estimated", metric, ("configural", configural)),
        row("scalar", "slopes and intercepts equal; focal means and SDs estimated", scalar, ("metric", metric)),
        row(
            "partial",
            "anchors and unflagged items equal; flagged or overridden cells free",
            partial,
            ("scalar", scalar),
        ),
    ]


def _evidence(test: ItemGroupTest, settings: DifSettings, note: str) -> PolicyEvidence:
    return PolicyEvidence(
        statistic="G2 (anchored likelihood ratio, omnibus)",
        value=finite_or_none(test.g2_omnibus),
        p_value=finite_or_none(test.p_omnibus),
        p_adjusted=finite_or_none(test.p_adjusted),
        effect_size=finite_or_none(test.effect_theta),
        effect_size_se=finite_or_none(test.effect_theta_se),
        effect_level=test.level(settings),
        note=note,
    )


def _irt_row(
    test: ItemGroupTest, stage: str, item_ids: tuple[str, ...], groups: list[str], settings: DifSettings
) -> IrtDifRow:
    return IrtDifRow(
        item=item_ids[test.item],
        group=groups[test.group],
        stage=stage,  # type: ignore[arg-type]
        g2_omnibus=test.g2_omnibus,
        df_omnibus=test.df_omnibus,
        p_value=test.p_omnibus,
        p_adjusted=finite_or_none(test.p_adjusted),
        g2_nonuniform=finite_or_none(test.g2_nonuniform),
        p_nonuniform=finite_or_none(test.p_nonuniform),
        g2_uniform=finite_or_none(test.g2_uniform),
        p_uniform=finite_or_none(test.p_uniform),
        effect_theta=finite_or_none(test.effect_theta),
        effect_signed=finite_or_none(test.effect_signed),
        effect_theta_se=finite_or_none(test.effect_theta_se),
        level=test.level(settings),  # type: ignore[arg-type]
        flagged=stage == "test" and test.flagged(settings),
    )


def _observed_rows(
    x: np.ndarray,
    k: np.ndarray,
    group_index: np.ndarray,
    screening: ObservedScreening,
    item_ids: tuple[str, ...],
    groups: list[str],
) -> list[ObservedDifRow]:
    rows = []
    for g in range(1, len(groups)):
        members = (group_index == 0) | (group_index == g)
        matching = np.zeros(x.shape[1], dtype=bool)
        matching[list(screening.matching_items[g])] = True
        for j in range(x.shape[1]):
            items = matching.copy()
            items[j] = True
            score, enough = matching_scores(x[members], k, items)
            y = x[members, j]
            ok = enough & ~np.isnan(y) & ~np.isnan(score)
            logistic = logistic_dif(y[ok], score[ok], group_index[members][ok] == g, int(k[j]))
            common = {
                "item": item_ids[j],
                "group": groups[g],
                "logistic_chi_square": logistic.chi_square_omnibus,
                "logistic_p_value": logistic.p_omnibus,
                "logistic_delta_r2": logistic.delta_r2,
                "logistic_level": logistic.level,
            }
            if (j, g) in screening.mh:
                r = screening.mh[(j, g)]
                rows.append(
                    ObservedDifRow(
                        method="mantel-haenszel",
                        chi_square=r.chi_square,
                        p_value=r.p_value,
                        mh_odds_ratio=finite_or_none(r.alpha),
                        mh_d_dif=finite_or_none(r.d_dif),
                        mh_d_dif_se=finite_or_none(r.d_dif_se),
                        dif_class=r.category,
                        n_reference=r.n_reference,
                        n_focal=r.n_focal,
                        **common,
                    )
                )
            else:
                m = screening.mantel[(j, g)]
                rows.append(
                    ObservedDifRow(
                        method="mantel",
                        chi_square=m.chi_square,
                        p_value=m.p_value,
                        smd=m.smd,
                        smd_over_sd=m.smd_over_sd,
                        dif_class=m.category,
                        n_reference=m.n_reference,
                        n_focal=m.n_focal,
                        **common,
                    )
                )
    return rows


def _group_quality(
    x: np.ndarray,
    params: ItemParameters,
    item_ids: list[str],
    prior: NormalPrior,
    settings: PipelineSettings,
    latent_mean: float,
    latent_sd: float,
) -> GroupQuality:
    classical = classical_statistics(x)
    eap = eap_scores(params, x, grid=settings.scoring_quadrature, prior=prior)
    reliability = marginal_reliability(eap.theta, eap.se)
    table = summed_score_table(params, grid=settings.scoring_quadrature, prior=prior)
    fit_stats = item_fit(params, x, latent_mean=latent_mean, latent_sd=latent_sd)
    summary = dimensionality(params, x, eap.theta)
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


def _assemble(
    *,
    data: ResponseData,
    name: str,
    settings: PipelineSettings,
    fit: MultiGroupFit,
    x: np.ndarray,
    item_ids: tuple[str, ...],
    models: tuple[str, ...],
    k: np.ndarray,
    group_names: list[str],
    group_index: np.ndarray,
    status: dict[tuple[int, int], str],
    reasons: dict[tuple[int, int], str],
    evidence: dict[tuple[int, int], PolicyEvidence],
    excluded_items: list[ExcludedItem],
    anchors: Anchors,
    by_group: dict[str, GroupQuality],
    notes: list[str],
    dif: DifReport | None,
    ladder: list[LadderRow],
    category_maps: dict[int, list[int]],
) -> Bundle:
    reference = fit.group_params(0)
    b_se = threshold_se(reference, fit.layout.index[0], fit.covariance)
    classical = classical_statistics(x[group_index == 0])
    sizes = np.bincount(group_index, minlength=len(group_names))
    items = []
    for j, item in enumerate(item_ids):
        kj = int(k[j])
        policy = {}
        for g, group in enumerate(group_names):
            st = status[(j, g)]
            specific = st == "group_specific"
            policy[group] = GroupPolicy(
                status=st,  # type: ignore[arg-type]
                reason=reasons[(j, g)],
                evidence=evidence.get((j, g), PolicyEvidence()),
                slope=float(fit.tables[g, j, 0]) if specific else None,
                intercepts=[float(c) for c in fit.tables[g, j, 1:kj]] if specific else None,
            )
        items.append(
            ItemEntry(
                id=item,
                model=models[j],  # type: ignore[arg-type]
                n_categories=kj,
                slope=float(reference.slopes[j]),
                intercepts=[float(c) for c in reference.intercepts[j, : kj - 1]],
                thresholds=[float(b) for b in reference.thresholds()[j, : kj - 1]],
                slope_se=finite_or_none(float(fit.slot_se[0, j, 0])),
                intercept_se=[finite_or_none(float(s)) for s in fit.slot_se[0, j, 1:kj]],
                threshold_se=[finite_or_none(float(s)) for s in b_se[j, : kj - 1]],
                category_map=category_maps.get(j),
                n_responses=int(np.sum(~np.isnan(x[:, j]))),
                mean_score=finite_or_none(float(np.nanmean(x[:, j]))),
                item_rest_correlation=finite_or_none(float(classical.item_rest[j])),
                policy=policy,
            )
        )
    grid = settings.scoring_quadrature
    curve = information_curve(reference)
    em = settings.em.quadrature
    return Bundle(
        name=name,
        version=0,
        created_at=_now(),
        software_version=__version__,
        provenance=Provenance(
            data_sha256=data.source_sha256,
            data_source=data.source,
            n_respondents=data.n_persons,
            n_respondents_by_group={g: int(sizes[i]) for i, g in enumerate(group_names)},
            settings=settings.describe(),
            notes=list(data.notes),
        ),
        metric=Metric(
            reference_group=group_names[0],
            groups=[
                GroupMetric(
                    name=g,
                    n_respondents=int(sizes[i]),
                    latent_mean=float(fit.latent_mean[i]),
                    latent_sd=float(fit.latent_sd[i]),
                    latent_mean_se=finite_or_none(float(fit.latent_mean_se[i])),
                    latent_sd_se=finite_or_none(float(fit.latent_sd_se[i])),
                )
                for i, g in enumerate(group_names)
            ],
        ),
        items=items,
        excluded_items=excluded_items,
        anchors=anchors,
        scoring=ScoringSettings(
            method=settings.scoring_method,  # type: ignore[arg-type]
            quadrature=QuadratureSettings(n_points=grid.n_points, lower=grid.lower, upper=grid.upper),
            min_items_answered=settings.min_items_answered or min(5, len(item_ids)),
            reporting_scale=settings.reporting_scale,
        ),
        fit=FitSummary(
            log_likelihood=fit.log_likelihood,
            n_parameters=fit.n_parameters,
            n_persons=fit.n_persons,
            aic=fit.aic,
            bic=fit.bic,
            converged=fit.converged,
            n_iter=fit.n_iter,
            estimation=(
                f"{'multiple-group ' if len(group_names) > 1 else ''}marginal ML, Bock-Aitkin EM over "
                f"{em.n_points} equally spaced points on {em.lower:g}..{em.upper:g} (equitheta's default grid); "
                "reference group N(0,1)"
                f"{', other groups N(mean, sd) estimated' if len(group_names) > 1 else ''}; SEs from the observed "
                "information (central differences of the analytic marginal score)"
                + (
                    "; the final model under the item policy: excluded cells count as not administered, so its "
                    "log-likelihood is on other data than the invariance ladder's and is not comparable with it"
                    if len(group_names) > 1
                    else ""
                )
            ),
        ),
        quality=Quality(
            by_group=by_group,
            test_information=InformationTable(
                theta=[float(t) for t in curve.theta],
                information=[float(i) for i in curve.information],
                se=[float(s) for s in curve.se],
            ),
            warnings=notes,
        ),
        dif=dif,
        invariance=ladder,
    )
