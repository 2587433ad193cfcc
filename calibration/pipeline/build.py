"""Bundle building: the final fit, the policy, the evidence and the quality as an unpublished bundle."""

from __future__ import annotations

from dataclasses import dataclass
from datetime import UTC, datetime

import numpy as np

from calibration import __version__
from calibration.bundle.schema import (
    Anchors,
    Bundle,
    DifReport,
    FitSummary,
    GroupMetric,
    GroupPolicy,
    GroupQuality,
    InformationTable,
    ItemEntry,
    LadderRow,
    Metric,
    PolicyEvidence,
    Provenance,
    QuadratureSettings,
    Quality,
    ScoringSettings,
)
from calibration.estimation import MultiGroupFit, threshold_se
from calibration.estimation.layout import slot_guessing
from calibration.estimation.settings import GUESSING_PRIOR
from calibration.io import ResponseData, finite_or_none
from calibration.irt.likelihood import QuadratureGrid
from calibration.irt.models import GUESSING_SLOT, MODEL_3PL
from calibration.irt.reliability import information_curve
from calibration.pipeline.fits import WholeTable
from calibration.pipeline.link import LinkStage
from calibration.pipeline.policy import PolicyTable
from calibration.pipeline.prepare import PreparedData
from calibration.pipeline.quality import alpha_comparisons
from calibration.pipeline.settings import PipelineSettings
from calibration.quality.classical import classical_statistics


def _now() -> str:
    return datetime.now(UTC).strftime("%Y-%m-%dT%H:%M:%SZ")


@dataclass(frozen=True)
class CalibrationRun:
    """What a calibration was asked to do: the data read, the bundle's name, the settings, the prepared data."""

    data: ResponseData
    name: str
    settings: PipelineSettings
    prepared: PreparedData
    whole: WholeTable | None = None  # the whole table when ``data`` is a sample of it

    @property
    def group_sizes(self) -> np.ndarray:
        """Respondents per group (in the prepared order) of the table the final calibration ran on."""
        if self.whole is None:
            return np.bincount(self.prepared.group_index, minlength=self.prepared.n_groups)
        return np.array([self.whole.group_sizes[g] for g in self.prepared.group_names], dtype=np.int64)


@dataclass(frozen=True)
class Findings:
    """What a calibration found: the final fit, the policy, anchors, DIF report, ladder, quality and warnings."""

    fit: MultiGroupFit
    policy: PolicyTable
    anchors: Anchors
    dif: DifReport | None
    ladder: list[LadderRow]
    quality: dict[str, GroupQuality]
    notes: list[str]
    link: LinkStage | None = None


def build_bundle(run: CalibrationRun, findings: Findings) -> Bundle:
    """The unpublished bundle (version 0) of a finished calibration; pydantic checks every range."""
    data, name, settings, prepared = run.data, run.name, run.settings, run.prepared
    fit = findings.fit
    group_names = prepared.group_names
    sizes = run.group_sizes
    held = {} if findings.link is None else findings.link.held_entries
    curve = information_curve(fit.group_params(0))
    return Bundle(
        name=name,
        version=0,
        created_at=_now(),
        software_version=__version__,
        provenance=Provenance(
            data_sha256=data.source_sha256,
            data_source=data.source,
            n_respondents=int(sizes.sum()),
            n_respondents_by_group={g: int(sizes[i]) for i, g in enumerate(group_names)},
            settings=_settings_record(settings, prepared, None if run.whole is None else run.whole.sample_record),
            notes=list(data.notes),
        ),
        metric=_metric(fit, group_names, sizes),
        items=_item_entries(prepared, fit, findings.policy, held, {} if run.whole is None else run.whole.answered),
        excluded_items=prepared.excluded_items,
        anchors=findings.anchors,
        scoring=_scoring(settings, prepared, findings.link),
        fit=_fit_summary(fit, settings.em.quadrature, multiple=prepared.n_groups > 1, link=findings.link),
        quality=Quality(
            by_group=findings.quality,
            test_information=InformationTable(
                theta=[float(t) for t in curve.theta],
                information=[float(i) for i in curve.information],
                se=[float(s) for s in curve.se],
            ),
            warnings=findings.notes,
            alpha_comparison=alpha_comparisons(prepared, findings.quality) if prepared.n_groups > 1 else [],
        ),
        dif=findings.dif,
        invariance=findings.ladder,
        link=None if findings.link is None else findings.link.record,
    )


def _scoring(settings: PipelineSettings, prepared: PreparedData, link: LinkStage | None) -> ScoringSettings:
    """How the service scores: from the settings, or the parent's (method, grid, prior, bounds, reporting scale)
    when linked, so that both versions report on one scale."""
    minimum = settings.min_items_answered or min(5, prepared.n_items)
    if link is not None:
        return link.parent_scoring.model_copy(update={"min_items_answered": minimum})
    grid = settings.scoring_quadrature
    return ScoringSettings(
        method=settings.scoring_method,  # type: ignore[arg-type]
        quadrature=QuadratureSettings(n_points=grid.n_points, lower=grid.lower, upper=grid.upper),
        min_items_answered=minimum,
        reporting_scale=settings.reporting_scale,
    )


def _item_entries(
    prepared: PreparedData,
    fit: MultiGroupFit,
    policy: PolicyTable,
    held: dict[int, ItemEntry],
    answered: dict[str, int],
) -> list[ItemEntry]:
    """Every item's entry; an item held at its published parameters (a fixed-parameter link) keeps their SEs.
    ``answered``: each item's answers in the whole table when the prepared data are a sample of it."""
    x, k, group_names = prepared.x, prepared.k, prepared.group_names
    reference = fit.group_params(0)
    b_se = threshold_se(reference, fit.layout.index[0], fit.covariance)
    classical = classical_statistics(x if prepared.n_groups == 1 else x[prepared.group_index == 0])
    items = []
    for j, item in enumerate(prepared.item_ids):
        kj = int(k[j])
        by_group = {}
        for g, group in enumerate(group_names):
            cell = policy[(j, g)]
            specific = cell.status == "group_specific"
            by_group[group] = GroupPolicy(
                status=cell.status,  # type: ignore[arg-type]
                reason=cell.reason,
                evidence=cell.evidence or PolicyEvidence(),
                proposed_status=cell.proposed,  # type: ignore[arg-type]
                slope=float(fit.tables[g, j, 0]) if specific else None,
                intercepts=[float(c) for c in fit.tables[g, j, 1:kj]] if specific else None,
                guessing=slot_guessing(fit.tables[g, j], prepared.models[j]) if specific else None,
            )
        items.append(
            ItemEntry(
                id=item,
                model=prepared.models[j],  # type: ignore[arg-type]
                n_categories=kj,
                slope=float(reference.slopes[j]),
                intercepts=[float(c) for c in reference.intercepts[j, : kj - 1]],
                thresholds=[float(b) for b in reference.thresholds()[j, : kj - 1]],
                slope_se=held[j].slope_se if j in held else finite_or_none(float(fit.slot_se[0, j, 0])),
                intercept_se=held[j].intercept_se
                if j in held
                else [finite_or_none(float(s)) for s in fit.slot_se[0, j, 1:kj]],
                threshold_se=held[j].threshold_se
                if j in held
                else [finite_or_none(float(s)) for s in b_se[j, : kj - 1]],
                guessing=held[j].guessing if j in held else slot_guessing(fit.tables[0, j], prepared.models[j]),
                guessing_se=held[j].guessing_se if j in held else _guessing_se(fit, j, prepared.models[j]),
                category_map=prepared.category_maps.get(j),
                n_responses=answered[item] if answered else int(np.sum(~np.isnan(x[:, j]))),
                mean_score=finite_or_none(float(np.nanmean(x[:, j]))),
                item_rest_correlation=finite_or_none(float(classical.item_rest[j])),
                policy=by_group,
            )
        )
    return items


def _settings_record(
    settings: PipelineSettings, prepared: PreparedData, sample: str | None
) -> dict[str, str | int | float | bool | None]:
    """The settings as provenance records them; with 3PL items, their asymptote prior and any held asymptotes;
    the evidence sample when the evidence rests on one."""
    record = settings.describe()
    if sample is not None:
        record["evidence_sample"] = sample
    if MODEL_3PL in prepared.models:
        record["guessing_prior"] = GUESSING_PRIOR.describe()
        held = [f"{i}={g:g}" for i, g in zip(prepared.item_ids, prepared.held_guessing, strict=False) if g == g]
        if held:
            record["held_asymptotes"] = ", ".join(held)
    return record


def _guessing_se(fit: MultiGroupFit, j: int, model: str) -> float | None:
    """SE of a 3PL asymptote by the delta method from ``logit(g)``: ``g (1 - g) SE(logit g)``."""
    g = slot_guessing(fit.tables[0, j], model)
    if g is None:
        return None
    return finite_or_none(g * (1.0 - g) * float(fit.slot_se[0, j, GUESSING_SLOT]))


def _metric(fit: MultiGroupFit, group_names: list[str], sizes: np.ndarray) -> Metric:
    return Metric(
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
    )


def _scale_words(link: LinkStage | None, *, multiple: bool) -> str:
    """How the scale was fixed, in words."""
    if link is None:
        return "reference group N(0,1)" + (", other groups N(mean, sd) estimated" if multiple else "")
    record = link.record
    how = (
        f"{len(record.link_items)} link items held at their published values, every latent mean and SD estimated"
        if record.method == "fixed-parameter"
        else f"fitted on its own scale (reference group N(0,1)), then every parameter transformed with the "
        f"{record.method} constants of {len(record.link_items)} link items"
    )
    return f"on the scale of {record.parent}: {how}"


def _fit_summary(fit: MultiGroupFit, em: QuadratureGrid, *, multiple: bool, link: LinkStage | None) -> FitSummary:
    return FitSummary(
        log_likelihood=fit.log_likelihood,
        n_parameters=fit.n_parameters,
        n_persons=fit.n_persons,
        aic=fit.aic,
        bic=fit.bic,
        converged=fit.converged,
        n_iter=fit.n_iter,
        estimation=(
            f"{'multiple-group ' if multiple else ''}marginal ML, Bock-Aitkin EM over "
            f"{em.n_points} equally spaced points on {em.lower:g}..{em.upper:g} (equitheta's default grid); "
            f"{_scale_words(link, multiple=multiple)}; SEs from the analytic observed information (Louis 1982)"
            + (
                "; SEs of the transformed parameters take the linking constants as known"
                if link and link.record.method != "fixed-parameter"
                else ""
            )
            + (
                "; the final model under the item policy: excluded cells count as not administered, so its "
                "log-likelihood is on other data than the invariance ladder's and is not comparable with it"
                if multiple
                else ""
            )
        ),
    )
