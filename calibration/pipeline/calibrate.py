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
8. quality by group.
"""

from __future__ import annotations

from collections.abc import Sequence
from dataclasses import dataclass

from pydantic import ValidationError

from calibration.bundle.schema import Bundle
from calibration.dif.irt import DifOutcome
from calibration.errors import CalibrationInputError
from calibration.estimation import MultiGroupFit
from calibration.io import ResponseData
from calibration.irt.likelihood import single_threaded_blas
from calibration.pipeline.build import CalibrationRun, Findings, build_bundle
from calibration.pipeline.dif import SINGLE_GROUP_ANCHORS, DifStage, ProgressCallback, run_dif_stage
from calibration.pipeline.fits import quiet_fit
from calibration.pipeline.invariance import invariance_ladder
from calibration.pipeline.policy import PolicyTable
from calibration.pipeline.prepare import PreparedData, prepare_data
from calibration.pipeline.quality import fit_warnings, quality_by_group, review_warnings
from calibration.pipeline.settings import PipelineSettings, PolicyOverride


@dataclass(frozen=True)
class CalibrationOutcome:
    """The unpublished bundle, the final fit, every warning, and the DIF outcome (several groups only)."""

    bundle: Bundle
    fit: MultiGroupFit
    warnings: tuple[str, ...]
    dif: DifOutcome | None = None


def calibrate_data(
    data: ResponseData,
    *,
    name: str,
    settings: PipelineSettings | None = None,
    reference_group: str | None = None,
    overrides: Sequence[PolicyOverride] = (),
    progress: ProgressCallback | None = None,
) -> CalibrationOutcome:
    """Calibrate a response table (one or several groups) and build the unpublished bundle.

    BLAS runs single-threaded throughout: the large products are split into row blocks on
    equitheta's own threads, and BLAS threads on the small rest only spin.
    """
    with single_threaded_blas():
        return _calibrate(data, name, settings or PipelineSettings(), reference_group, overrides, progress)


def _calibrate(  # noqa: PLR0913 - calibrate_data's arguments, passed on
    data: ResponseData,
    name: str,
    settings: PipelineSettings,
    reference_group: str | None,
    overrides: Sequence[PolicyOverride],
    progress: ProgressCallback | None,
) -> CalibrationOutcome:
    prepared = prepare_data(data, settings=settings, reference_group=reference_group, overrides=overrides)
    notes = list(prepared.notes)
    policy = PolicyTable(prepared.n_items, prepared.n_groups)
    stage: DifStage | None = None
    ladder = []
    if prepared.n_groups > 1:
        stage = run_dif_stage(prepared, settings, policy, progress)
        notes.extend(stage.notes)
        policy.apply_overrides(overrides, prepared.item_ids, prepared.group_names)
        ladder = invariance_ladder(prepared, settings.em, stage.scalar, policy, stage.outcome)
    fit = _final_fit(prepared, settings, policy, stage, progress)
    notes.extend(fit_warnings(prepared, fit, settings.em))
    if progress is not None:
        progress("quality", 0, fit.log_likelihood)
    quality, quality_notes = quality_by_group(prepared, fit, policy, settings.scoring_quadrature)
    notes.extend(quality_notes)
    notes.extend(review_warnings(prepared, fit, policy))
    findings = Findings(
        fit=fit,
        policy=policy,
        anchors=SINGLE_GROUP_ANCHORS if stage is None else stage.anchors,
        dif=None if stage is None else stage.report,
        ladder=ladder,
        quality=quality,
        notes=notes,
    )
    bundle = _publishable(CalibrationRun(data, name, settings, prepared), findings)
    return CalibrationOutcome(
        bundle=bundle, fit=fit, warnings=tuple(notes), dif=None if stage is None else stage.outcome
    )


def _final_fit(
    prepared: PreparedData,
    settings: PipelineSettings,
    policy: PolicyTable,
    stage: DifStage | None,
    progress: ProgressCallback | None,
) -> MultiGroupFit:
    """The calibration under the policy, with SEs: excluded cells are not administered for that group."""
    if progress is not None:
        progress("final", 0, 0.0)
    return quiet_fit(
        policy.administered(prepared.x, prepared.group_index),
        prepared.k,
        prepared.group_index,
        prepared.n_groups,
        models=prepared.models,
        settings=settings.em,
        group_free=policy.group_free(int(prepared.k.max())),
        start=None if stage is None else stage.outcome.anchor_fit.tables,
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
