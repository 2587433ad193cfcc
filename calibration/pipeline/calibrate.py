"""calibrate_data: the order of the steps, and nothing else.

With one group: checks, single-group EM, quality. With several groups (a group column):

1. checks per group (minimum size, items without variance in a group);
2. observed-score screening (purified MH / Mantel / SMD, logistic regression);
3. the scalar model (every item shared, focal means and SDs free);
4. anchors and anchored LR tests of every other item (calibration.dif.irt);
5. the policy per item x group: invariant, group-specific or excluded
   (flagged = significant after FDR and at least a moderate effect), then any
   reviewer overrides;
6. the invariance ladder (configural, metric, scalar, partial);
7. the final calibration under the policy, with SEs;
8. with a link to an earlier bundle: drift screening of the common items and the calibration put on that
   bundle's scale (calibration.pipeline.link);
9. quality by group.

With ``whole`` the response table is a random sample of a larger one held elsewhere (a Dask cluster,
:mod:`calibration.distributed`): steps 1-6 and 9 run on the sample, step 7 on every respondent.
"""

from __future__ import annotations

from collections.abc import Sequence
from dataclasses import dataclass, replace

from pydantic import ValidationError

from calibration.bundle.schema import Bundle
from calibration.dif.irt import DifOutcome
from calibration.errors import CalibrationInputError
from calibration.estimation import MultiGroupFit
from calibration.io import ResponseData
from calibration.irt.likelihood import with_single_threaded_blas
from calibration.pipeline.build import CalibrationRun, Findings, build_bundle
from calibration.pipeline.dif import SINGLE_GROUP_ANCHORS, DifStage, ProgressCallback, run_dif_stage
from calibration.pipeline.fits import WholeTable, quiet_fit
from calibration.pipeline.invariance import invariance_ladder
from calibration.pipeline.link import LinkRequest, check_link_request, link_reference_group, run_link_stage
from calibration.pipeline.policy import PolicyTable
from calibration.pipeline.prepare import PreparedData, prepare_data
from calibration.pipeline.quality import fit_warnings, quality_by_group, reversed_item_warnings, review_warnings
from calibration.pipeline.settings import PipelineSettings, PolicyOverride


@dataclass(frozen=True)
class CalibrationOutcome:
    """The unpublished bundle, the final fit, every warning, and the DIF outcome (several groups only)."""

    bundle: Bundle
    fit: MultiGroupFit
    warnings: tuple[str, ...]
    dif: DifOutcome | None = None


@with_single_threaded_blas  # large products are split into row blocks on equitheta's own threads
def calibrate_data(  # noqa: PLR0913 - the data and keyword-only options
    data: ResponseData,
    *,
    name: str,
    settings: PipelineSettings | None = None,
    reference_group: str | None = None,
    overrides: Sequence[PolicyOverride] = (),
    progress: ProgressCallback | None = None,
    link: LinkRequest | None = None,
    whole: WholeTable | None = None,
) -> CalibrationOutcome:
    """Calibrate a response table (one or several groups) and build the unpublished bundle.

    With ``link`` the bundle is put on an earlier bundle's scale (its reference group defaults to the
    parent's; see :mod:`calibration.pipeline.link`). With ``whole``, ``data`` is a sample of that table
    and the final calibration runs on every respondent. BLAS runs single-threaded throughout.
    """
    settings = settings or PipelineSettings()
    if whole is not None and link is not None:
        raise CalibrationInputError("a link to an earlier version needs the whole table in this process")
    if link is not None:
        check_link_request(link, settings)
        reference_group = link_reference_group(data, link, reference_group)
    prepared = prepare_data(
        data,
        settings=settings,
        reference_group=reference_group,
        overrides=overrides,
        whole_sizes=None if whole is None else whole.group_sizes,
    )
    if prepared.held_guessing:  # every fit holds the asymptotes the item spec gives
        settings = replace(settings, em=replace(settings.em, held_guessing=prepared.held_guessing))
    notes = list(prepared.notes)
    policy = PolicyTable(prepared.n_items, prepared.n_groups)
    stage: DifStage | None = None
    ladder = []
    if prepared.n_groups > 1:
        stage = run_dif_stage(prepared, settings, policy, progress)
        notes.extend(stage.notes)
        policy.apply_overrides(overrides, prepared.item_ids, prepared.group_names)
        ladder = invariance_ladder(prepared, settings.em, stage.scalar, policy, stage.outcome)
    # A fixed-parameter link refits with SEs on the parent's scale: the own-scale fit needs none.
    own_scale_errors = link is None or link.method != "fixed-parameter"
    fit = _final_fit(prepared, settings, policy, stage, progress, standard_errors=own_scale_errors, whole=whole)
    linked = None
    if link is not None:
        linked = run_link_stage(prepared, settings, policy, link, fit, progress)
        fit = linked.fit
        notes.extend(linked.notes)
    notes.extend(fit_warnings(prepared, fit, settings.em))
    if progress is not None:
        progress("quality", 0, fit.log_likelihood)
    quality, quality_notes = quality_by_group(prepared, fit, policy, settings.scoring_quadrature)
    notes.extend(quality_notes)
    notes.extend(review_warnings(prepared, fit, policy))
    notes[:0] = reversed_item_warnings(prepared, fit)  # first: every other check reads such an item backwards
    findings = Findings(
        fit=fit,
        policy=policy,
        anchors=SINGLE_GROUP_ANCHORS if stage is None else stage.anchors,
        dif=None if stage is None else stage.report,
        ladder=ladder,
        quality=quality,
        notes=notes,
        link=linked,
    )
    if whole is not None and whole.sample_record is not None:
        notes.append(
            f"DIF screening, the invariance ladder and the quality checks rest on a random sample of "
            f"{data.n_persons:,} of the {sum(whole.group_sizes.values()):,} respondents ({whole.sample_record}); "
            "the final calibration used every respondent"
        )
    run = CalibrationRun(data, name, settings, prepared, whole)
    bundle = _publishable(run, findings)
    return CalibrationOutcome(
        bundle=bundle, fit=fit, warnings=tuple(notes), dif=None if stage is None else stage.outcome
    )


def _final_fit(  # noqa: PLR0913 - the data, the policy, the DIF stage's start and the options
    prepared: PreparedData,
    settings: PipelineSettings,
    policy: PolicyTable,
    stage: DifStage | None,
    progress: ProgressCallback | None,
    *,
    standard_errors: bool,
    whole: WholeTable | None = None,
) -> MultiGroupFit:
    """The calibration under the policy (SEs as asked): excluded cells are not administered for that group."""
    if progress is not None:
        progress("final", 0, 0.0)
    em = replace(settings.em, standard_errors=standard_errors and settings.em.standard_errors)
    group_free = policy.group_free(int(prepared.k.max()))
    start = None if stage is None else stage.outcome.anchor_fit.tables
    if whole is not None:
        return whole.final_fit(prepared, policy, settings=em, group_free=group_free, start=start, progress=progress)
    return quiet_fit(
        policy.administered(prepared.x, prepared.group_index),
        prepared.k,
        prepared.group_index,
        prepared.n_groups,
        models=prepared.models,
        settings=em,
        group_free=group_free,
        start=start,
        progress=None if progress is None else (lambda it, ll: progress("final", it, ll)),
    )


def _publishable(run: CalibrationRun, findings: Findings) -> Bundle:
    try:
        return build_bundle(run, findings)
    except ValidationError as exc:
        # An estimate outside the publishable ranges (a runaway slope, a latent mean off the grid): say which,
        # before anything is published, instead of a traceback after the long steps.
        problems = "; ".join(e["msg"].removeprefix("Value error, ") for e in exc.errors()[:5])
        raise CalibrationInputError(
            f"{run.data.source}: the calibration produced values that cannot be published ({problems}); a slope "
            "this large is a near-Heywood case (the item is almost a step function of the others): leave the item "
            "out with an item spec (--items, include=no) or calibrate with a slope prior (--slope-prior-sd)"
        ) from exc
