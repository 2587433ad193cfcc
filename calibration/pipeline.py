"""Orchestration: validated data -> checks -> calibration -> quality -> an unpublished bundle.

No numerics live here; each step is a function of its own module.
"""

from __future__ import annotations

import math
from collections.abc import Callable
from dataclasses import dataclass, field
from datetime import UTC, datetime

import numpy as np

from calibration import __version__
from calibration.bundle.schema import (
    Anchors,
    Bundle,
    ExcludedItem,
    FitSummary,
    GroupMetric,
    GroupPolicy,
    GroupQuality,
    InformationTable,
    ItemEntry,
    Metric,
    Provenance,
    QuadratureSettings,
    Quality,
    ReportingScaleSettings,
    ScoringSettings,
    SummedScoreRow,
)
from calibration.estimation import CalibrationFit, EMSettings, calibrate_single_group
from calibration.io import ResponseData, finite_or_none
from calibration.irt.likelihood import QuadratureGrid
from calibration.irt.scoring import (
    NormalPrior,
    eap_scores,
    information_curve,
    marginal_reliability,
    summed_score_table,
)
from calibration.quality.classical import (
    ALPHA_GROUP_USE,
    ALPHA_INDIVIDUAL_DECISIONS,
    ITEM_REST_MINIMUM,
    classical_statistics,
)

SINGLE_GROUP = "all"
# About 500 respondents per group is a common floor for 2PL/GRM calibration
# (Jiang, Wang & Weiss 2016, published for the GRM).
RECOMMENDED_MIN_RESPONDENTS = 500
HARD_MIN_RESPONDENTS = 50


class CalibrationInputError(ValueError):
    """The data cannot support a calibration (too few respondents or items)."""


@dataclass(frozen=True)
class PipelineSettings:
    em: EMSettings = field(default_factory=EMSettings)
    scoring_quadrature: QuadratureGrid = field(default_factory=QuadratureGrid)
    reporting_scale: ReportingScaleSettings = field(default_factory=ReportingScaleSettings)
    scoring_method: str = "eap"
    min_items_answered: int | None = None  # default: min(5, number of items)

    def describe(self) -> dict[str, str | int | float | bool | None]:
        prior = self.em.slope_prior
        return {
            "max_iter": self.em.max_iter,
            "tolerance": self.em.tolerance,
            "calibration_quadrature_points": self.em.quadrature.n_points,
            "calibration_quadrature_range": f"{self.em.quadrature.lower:g}..{self.em.quadrature.upper:g}",
            "slope_prior": "none" if prior is None else f"lognormal(mean={prior.mean:g}, sd={prior.sd:g})",
            "acceleration": "squarem" if self.em.accelerate else "none",
        }


@dataclass(frozen=True)
class CalibrationOutcome:
    bundle: Bundle
    fit: CalibrationFit
    warnings: tuple[str, ...]


def _now() -> str:
    return datetime.now(UTC).strftime("%Y-%m-%dT%H:%M:%SZ")


def _no_variance_items(data: ResponseData) -> list[tuple[int, str]]:
    found = []
    for j in range(data.n_items):
        answered = data.responses[~np.isnan(data.responses[:, j]), j]
        values = np.unique(answered)
        if values.size == 1:
            reason = f"no variance: all {answered.size} respondents who answered gave category {int(values[0])}"
            found.append((j, reason))
    return found


def calibrate_data(
    data: ResponseData,
    *,
    name: str,
    settings: PipelineSettings | None = None,
    progress: Callable[[str, int, float], None] | None = None,
) -> CalibrationOutcome:
    """Calibrate a single-group response table and build the (unpublished) bundle."""
    settings = settings or PipelineSettings()
    warnings: list[str] = []
    if data.n_persons < HARD_MIN_RESPONDENTS:
        raise CalibrationInputError(
            f"{data.source}: {data.n_persons} respondents; a calibration needs at least {HARD_MIN_RESPONDENTS} "
            f"(about {RECOMMENDED_MIN_RESPONDENTS} is a common floor for 2PL and graded items)"
        )
    if data.n_persons < RECOMMENDED_MIN_RESPONDENTS:
        warnings.append(
            f"{data.n_persons} respondents is below the common floor of about {RECOMMENDED_MIN_RESPONDENTS} "
            "for 2PL/graded calibration (Jiang, Wang & Weiss 2016); parameter SEs will be large"
        )
    dropped = _no_variance_items(data)
    keep = [j for j in range(data.n_items) if j not in {d[0] for d in dropped}]
    excluded = [ExcludedItem(id=data.item_ids[j], reason=reason) for j, reason in dropped]
    for item in excluded:
        warnings.append(f"item {item.id!r} left out of the calibration: {item.reason}")
    if len(keep) < 2:
        raise CalibrationInputError(f"{data.source}: fewer than two items with variance; nothing to calibrate")
    x = data.responses[:, keep]
    item_ids = [data.item_ids[j] for j in keep]
    k = data.n_categories[keep]
    models = tuple(data.models[j] for j in keep)

    def em_progress(iteration: int, log_lik: float) -> None:
        if progress is not None:
            progress("calibrate", iteration, log_lik)

    fit = calibrate_single_group(x, k, models=models, settings=settings.em, progress=em_progress)
    if not fit.converged:
        warnings.append(f"EM did not converge in {settings.em.max_iter} iterations; estimates may be unstable")
    params = fit.params
    if progress is not None:
        progress("quality", 0, fit.log_likelihood)

    classical = classical_statistics(x)
    prior = NormalPrior(0.0, 1.0)
    eap = eap_scores(params, x, grid=settings.scoring_quadrature, prior=prior)
    reliability = marginal_reliability(eap.theta, eap.se)
    table = summed_score_table(params, grid=settings.scoring_quadrature, prior=prior)
    curve = information_curve(params)
    threshold_se = fit.threshold_se()

    if math.isfinite(classical.alpha) and classical.alpha < ALPHA_GROUP_USE:
        warnings.append(f"alpha = {classical.alpha:.3f} is below {ALPHA_GROUP_USE} (common minimum for group use)")
    if reliability < ALPHA_INDIVIDUAL_DECISIONS:
        warnings.append(
            f"marginal reliability = {reliability:.3f} is below {ALPHA_INDIVIDUAL_DECISIONS}: scores must not drive "
            "individual high-stakes decisions on their own"
        )
    for j, item in enumerate(item_ids):
        if params.slopes[j] <= 0:
            warnings.append(f"item {item!r}: slope {params.slopes[j]:.3f} is not positive (miskeyed or reversed?)")
        elif params.slopes[j] > 4:
            warnings.append(f"item {item!r}: slope {params.slopes[j]:.2f} is very large (possible near-Heywood case)")
        if math.isfinite(classical.item_rest[j]) and classical.item_rest[j] < ITEM_REST_MINIMUM:
            warnings.append(
                f"item {item!r}: item-rest correlation {classical.item_rest[j]:.3f} is below {ITEM_REST_MINIMUM} "
                "(common practice)"
            )

    items = []
    for j, item in enumerate(item_ids):
        kj = int(k[j])
        items.append(
            ItemEntry(
                id=item,
                model=models[j],  # type: ignore[arg-type]
                n_categories=kj,
                slope=float(params.slopes[j]),
                intercepts=[float(c) for c in params.intercepts[j, : kj - 1]],
                thresholds=[float(b) for b in params.thresholds()[j, : kj - 1]],
                slope_se=finite_or_none(float(fit.slope_se[j])),
                intercept_se=[finite_or_none(float(s)) for s in fit.intercept_se[j, : kj - 1]],
                threshold_se=[finite_or_none(float(s)) for s in threshold_se[j, : kj - 1]],
                n_responses=int(classical.n_responses[j]),
                mean_score=finite_or_none(float(classical.mean_score[j])),
                item_rest_correlation=finite_or_none(float(classical.item_rest[j])),
                policy={SINGLE_GROUP: GroupPolicy(status="invariant", reason="single-group calibration")},
            )
        )
    min_items = settings.min_items_answered or min(5, len(item_ids))
    grid = settings.scoring_quadrature
    bundle = Bundle(
        name=name,
        version=0,
        created_at=_now(),
        software_version=__version__,
        provenance=Provenance(
            data_sha256=data.source_sha256,
            data_source=data.source,
            n_respondents=data.n_persons,
            n_respondents_by_group={SINGLE_GROUP: data.n_persons},
            settings=settings.describe(),
            notes=list(data.notes),
        ),
        metric=Metric(
            reference_group=SINGLE_GROUP,
            groups=[GroupMetric(name=SINGLE_GROUP, n_respondents=data.n_persons, latent_mean=0.0, latent_sd=1.0)],
        ),
        items=items,
        excluded_items=excluded,
        anchors=Anchors(items=[], method="none: single-group calibration (the scale is fixed by N(0,1))"),
        scoring=ScoringSettings(
            method=settings.scoring_method,  # type: ignore[arg-type]
            quadrature=QuadratureSettings(n_points=grid.n_points, lower=grid.lower, upper=grid.upper),
            min_items_answered=min_items,
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
                f"marginal ML, Bock-Aitkin EM over {settings.em.quadrature.n_points} rectangular points on "
                f"{settings.em.quadrature.lower:g}..{settings.em.quadrature.upper:g}, N(0,1) latent density; "
                "SEs from the observed information (central differences of the analytic marginal score)"
            ),
        ),
        quality=Quality(
            by_group={
                SINGLE_GROUP: GroupQuality(
                    n_respondents=data.n_persons,
                    alpha=finite_or_none(classical.alpha),
                    alpha_if_deleted={
                        item: finite_or_none(float(v))
                        for item, v in zip(item_ids, classical.alpha_if_deleted, strict=True)
                    },
                    marginal_reliability=finite_or_none(reliability),
                    summed_score_table=[
                        SummedScoreRow(summed_score=int(s), theta=float(t), se=float(e), probability=float(p))
                        for s, t, e, p in zip(table.summed_score, table.theta, table.se, table.probability, strict=True)
                    ],
                )
            },
            test_information=InformationTable(
                theta=[float(t) for t in curve.theta],
                information=[float(i) for i in curve.information],
                se=[float(s) for s in curve.se],
            ),
            warnings=warnings,
        ),
    )
    return CalibrationOutcome(bundle=bundle, fit=fit, warnings=tuple(warnings))
