"""The DIF stage: observed-score screening, the scalar model, anchors, anchored LR tests, their bundle rows."""

from __future__ import annotations

from dataclasses import dataclass, replace

import numpy as np

from calibration.bundle.schema import (
    AnchorCandidate,
    Anchors,
    DifReport,
    DifSettingsRecord,
    IrtDifRow,
    ObservedDifRow,
    PolicyEvidence,
)
from calibration.dif.anchored_lr import ItemGroupTest
from calibration.dif.irt import DifOutcome, run_irt_dif
from calibration.dif.logistic import logistic_dif
from calibration.dif.observed import MatchingSet, ObservedScreening, screen_observed
from calibration.dif.settings import DifSettings
from calibration.estimation import MultiGroupFit
from calibration.estimation.layout import slot_guessing
from calibration.io import finite_or_none
from calibration.pipeline.fits import ProgressCallback, quiet_fit
from calibration.pipeline.policy import PolicyTable
from calibration.pipeline.prepare import PreparedData
from calibration.pipeline.settings import PipelineSettings

SINGLE_GROUP_ANCHORS = Anchors(items=[], method="none: single-group calibration (the scale is fixed by N(0,1))")


@dataclass(frozen=True)
class DifStage:
    """What the DIF stage found: the scalar fit, the IRT outcome, the anchors and the bundle's DIF section."""

    scalar: MultiGroupFit
    outcome: DifOutcome
    anchors: Anchors
    report: DifReport
    notes: list[str]


def run_dif_stage(
    prepared: PreparedData,
    settings: PipelineSettings,
    policy: PolicyTable,
    progress: ProgressCallback | None = None,
) -> DifStage:
    """Observed-score screening, the scalar model, anchors and anchored LR tests; sets ``policy`` from them.

    Flagged cells become excluded or group-specific (``settings.dif_action``), cells without
    variance in a group are excluded; reviewer overrides are applied afterwards by the caller.
    """
    x, k, group_index, n_groups = prepared.x, prepared.k, prepared.group_index, prepared.n_groups
    item_ids, group_names = prepared.item_ids, prepared.group_names
    x_model = prepared.model_responses
    if progress is not None:
        progress("screen", 0, 0.0)
    screening = screen_observed(x, k, group_index, n_groups, greater_than_one_z=settings.mh_greater_than_one_z)
    observed_rows = _observed_rows(x, k, group_index, screening, item_ids, group_names)
    scalar = quiet_fit(
        x_model,
        k,
        group_index,
        n_groups,
        models=prepared.models,
        settings=replace(settings.em, standard_errors=False),
        progress=None if progress is None else (lambda it, ll: progress("scalar", it, ll)),
    )
    outcome = run_irt_dif(
        x_model,
        k,
        group_index,
        n_groups,
        scalar,
        item_ids=item_ids,
        models=prepared.models,
        settings=settings.dif,
        em_settings=settings.em,
        skip=set(prepared.no_variance_cells),
        progress=None if progress is None else (lambda stage, done, total: progress(stage, done, float(total))),
    )
    _set_policy(policy, outcome, prepared, settings)
    irt_rows = [_irt_row(t, "screening", prepared, settings.dif) for t in outcome.screening.values()]
    irt_rows += [_irt_row(t, "test", prepared, settings.dif) for t in outcome.tests.values()]
    report = DifReport(
        settings=DifSettingsRecord(
            fdr_alpha=settings.dif.fdr_level,
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
    return DifStage(scalar, outcome, _anchors_record(outcome, item_ids, group_names), report, list(outcome.warnings))


def _anchors_record(outcome: DifOutcome, item_ids: tuple[str, ...], group_names: list[str]) -> Anchors:
    return Anchors(
        items=[item_ids[j] for j in outcome.anchors],
        method=outcome.anchor_method,
        ranking=[
            AnchorCandidate(
                item=item_ids[c.item],
                rank=r + 1,
                statistic=finite_or_none(c.statistic),
                worst_group=group_names[c.worst_group] if c.worst_group >= 0 else "none",
                p_adjusted=finite_or_none(c.p_adjusted),
                selected=c.item in outcome.anchors,
            )
            for r, c in enumerate(outcome.ranking)
        ],
    )


def _set_policy(policy: PolicyTable, outcome: DifOutcome, prepared: PreparedData, settings: PipelineSettings) -> None:
    for j in outcome.anchors:
        for g in range(1, prepared.n_groups):
            policy[(j, g)].reason = "anchor item (constrained equal across groups)"
            test = outcome.screening.get((j, g))
            if test is not None:
                policy[(j, g)].evidence = _evidence(test, settings.dif, "screening with all other items as anchors")
    action = "excluded" if settings.dif_action == "exclude" else "group_specific"
    for cell, test in outcome.tests.items():
        policy[cell].evidence = _evidence(test, settings.dif, "anchored LR test against the anchor set")
        if test.flagged(settings.dif):
            low, high = test.effect_interval()
            policy[cell].status = action
            policy[cell].reason = (
                f"DIF flag: omnibus G2 = {test.g2_omnibus:.1f} (df {test.df_omnibus}), FDR-adjusted "
                f"p = {test.p_adjusted:.2g}, effect {test.effect_theta:.2f} theta units "
                f"(95% interval {low:.2f} to {high:.2f}: {test.level(settings.dif)})"
            )
    for cell, why in prepared.no_variance_cells.items():
        policy[cell].status = "excluded"
        policy[cell].reason = why


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


def _irt_row(test: ItemGroupTest, stage: str, prepared: PreparedData, settings: DifSettings) -> IrtDifRow:
    k_j, model = int(prepared.k[test.item]), prepared.models[test.item]
    return IrtDifRow(
        item=prepared.item_ids[test.item],
        group=prepared.group_names[test.group],
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
        reference_slope=float(test.reference_table[0]),
        reference_intercepts=[float(c) for c in test.reference_table[1:k_j]],
        focal_slope=float(test.focal_table[0]),
        focal_intercepts=[float(c) for c in test.focal_table[1:k_j]],
        reference_guessing=slot_guessing(test.reference_table, model),
        focal_guessing=slot_guessing(test.focal_table, model),
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
        scores = MatchingSet(x[members], k, matching)
        for j in range(x.shape[1]):
            score, enough = scores.for_item(j)
            y = scores.responses[:, j]
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
                        mh_odds_ratio=finite_or_none(r.odds_ratio),
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
