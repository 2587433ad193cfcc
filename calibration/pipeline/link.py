"""The link stage: this calibration put on a published bundle's scale, the common items screened for drift.

1. **Common items** are the items of both cycles with the same id, model, categories and category
   merging; an item whose categories differ cannot be compared and is calibrated as a new item.
2. **Purification.** A fixed-parameter fit through the candidate link (every common item at first)
   gives a provisional scale; every common item is tested for drift against its published
   parameters (:mod:`calibration.linking.drift`: the anchored LR test of the DIF screen, FDR control
   across the common items, an effect in theta units). Drifted items leave the link and the round
   repeats until the link set stops changing (at most ``LINK_ROUNDS``). The screening is the same
   whatever the method; the method decides how the final scale is fixed.
3. **The final fit.** ``fixed-parameter`` (the default) holds the link items at their published
   parameters and estimates everything else on that scale in one multiple-group EM, the reference
   group's latent mean and SD included: they are the linking constants B and A (Kim 2006 on
   re-estimating the latent density every cycle). ``stocking-lord`` and ``haebara`` fit the data on
   its own scale and transform every parameter with the constants that match the link items'
   characteristic curves (:mod:`calibration.linking.curves`).

With groups, the link is made on the reference group (its respondents are the ones tested for drift);
the policy of every item and group comes from this cycle's own DIF stage, not from the parent.
"""

from __future__ import annotations

from collections.abc import Sequence
from dataclasses import dataclass, replace

import numpy as np

from calibration.bundle.schema import (
    Bundle,
    DriftRow,
    ItemEntry,
    Link,
    LinkConstants,
    NotLinkedItem,
    ReportingScaleSettings,
    ScoringSettings,
)
from calibration.bundle.scorer import entry_parameters
from calibration.errors import CalibrationInputError
from calibration.estimation import EMSettings, LatentSpec, MultiGroupFit
from calibration.estimation.layout import slot_table
from calibration.io import ResponseData, finite_or_none
from calibration.irt.models import GUESSING_SLOT, SHARED_SLOPE_MODELS, ItemParameters
from calibration.linking import DriftTest, PublishedItem, characteristic_curve_constants, drift_tests, rescale
from calibration.linking.curves import LinkingConstants
from calibration.pipeline.dif import ProgressCallback
from calibration.pipeline.fits import quiet_fit
from calibration.pipeline.policy import PolicyTable
from calibration.pipeline.prepare import PreparedData
from calibration.pipeline.settings import PipelineSettings
from calibration.vocabulary import LinkMethod

MIN_LINK_ITEMS = 2
"""Fewest link items a link is made through (two curves fix a location and a unit; see RECOMMENDED_LINK_ITEMS)."""
RECOMMENDED_LINK_ITEMS = 5
RECOMMENDED_LINK_SHARE = 0.20
"""Below max(5, 20% of the items) link items the summary warns (common practice for common-item links)."""
LINK_ROUNDS = 5
"""Purification rounds before the link set is taken as it stands."""


@dataclass(frozen=True)
class LinkRequest:
    """Put this calibration on ``parent``'s scale by ``method``."""

    parent: Bundle
    method: LinkMethod = "fixed-parameter"


@dataclass(frozen=True)
class LinkStage:
    """The final fit on the parent's scale, the bundle's link section, the parent entries of the link items."""

    fit: MultiGroupFit
    record: Link
    held_entries: dict[int, ItemEntry]  # link items held at published values (fixed-parameter): their SEs
    parent_scoring: ScoringSettings
    notes: list[str]


@dataclass(frozen=True)
class _Common:
    positions: list[int]
    published: dict[int, ItemParameters]
    entries: dict[int, ItemEntry]
    new_items: list[str]
    not_linked: list[NotLinkedItem]


def link_reference_group(data: ResponseData, request: LinkRequest | None, reference_group: str | None) -> str | None:
    """The reference group of a linked calibration: as given, else the parent's when the data has that group."""
    if request is None or reference_group is not None or data.groups is None:
        return reference_group
    parent_reference = request.parent.metric.reference_group
    return parent_reference if parent_reference in set(data.groups) else None


def check_link_request(request: LinkRequest, settings: PipelineSettings) -> None:
    """Refuse what a link cannot do before any work: another reporting scale than the parent's."""
    scale = settings.reporting_scale
    parent_scale = request.parent.scoring.reporting_scale
    if scale not in (parent_scale, ReportingScaleSettings()):
        raise CalibrationInputError(
            f"a calibration linked to {request.parent.label} reports on that version's reporting scale "
            f"(mean {parent_scale.location:g}, sd {parent_scale.scale:g}); leave the reporting-scale options out"
        )


def common_items(prepared: PreparedData, parent: Bundle) -> _Common:
    """The items both cycles share and can compare, the new items, and the shared ones that cannot be compared."""
    entries = {item.id: item for item in parent.items}
    positions: list[int] = []
    published: dict[int, ItemParameters] = {}
    held: dict[int, ItemEntry] = {}
    new_items: list[str] = []
    not_linked: list[NotLinkedItem] = []
    for j, item in enumerate(prepared.item_ids):
        entry = entries.get(item)
        if entry is None:
            new_items.append(item)
            continue
        k_j, model, merged = int(prepared.k[j]), prepared.models[j], prepared.category_maps.get(j)
        reason = None
        if entry.n_categories != k_j:
            reason = f"{entry.n_categories} categories in {parent.label}, {k_j} in this calibration"
        elif entry.category_map != merged:
            reason = f"answer codes merged as {entry.category_map} in {parent.label}, as {merged} now"
        elif entry.model != model:
            reason = f"model {entry.model} in {parent.label}, {model} now"
        if reason is not None:
            not_linked.append(NotLinkedItem(item=item, reason=reason + ": calibrated as a new item"))
            new_items.append(item)
            continue
        positions.append(j)
        held[j] = entry
        published[j] = entry_parameters([entry])
    return _Common(positions, published, held, new_items, not_linked)


def _stack(published: dict[int, ItemParameters], items: Sequence[int]) -> ItemParameters:
    """The published parameters of ``items`` as one test (intercepts NaN-padded to the widest item)."""
    return ItemParameters.stack(
        [
            (
                float(published[j].slopes[0]),
                published[j].intercepts[0, : int(published[j].n_categories[0]) - 1].tolist(),
                published[j].models[0],
                float(published[j].guessing[0]),
            )
            for j in items
        ]
    )


def _on_parent_scale(fit: MultiGroupFit, constants: LinkingConstants) -> MultiGroupFit:
    """A fit on its own scale expressed on the parent's: every group's items and latent density, and the
    covariance of the free parameters through the (linear, given the constants) transformation."""
    slope, shift = constants.slope, constants.intercept
    tables = fit.tables.copy()
    for g in range(tables.shape[0]):
        rescaled = rescale(fit.group_params(g), slope, shift)
        tables[g] = slot_table(rescaled)
    mean, sd = slope * fit.latent_mean + shift, slope * fit.latent_sd
    mean_se, sd_se = slope * fit.latent_mean_se, slope * fit.latent_sd_se
    mean_se[0], sd_se[0] = constants.intercept_se, constants.slope_se  # the reference group's density is (B, A)
    covariance, slot_se = fit.covariance, fit.slot_se
    if fit.covariance is not None:
        jacobian = _rescale_jacobian(fit, slope, shift)
        covariance = jacobian @ fit.covariance @ jacobian.T
        se = np.sqrt(np.clip(np.diag(covariance), 0.0, None))
        slot_se = np.where(fit.layout.index >= 0, se[np.maximum(fit.layout.index, 0)], np.nan)
        n_item = fit.layout.n_free
        n_mean = int(fit.latent.free_mean.sum())
        mean_se[fit.latent.free_mean] = se[n_item : n_item + n_mean]
        sd_se[fit.latent.free_sd] = se[n_item + n_mean :]
    return replace(
        fit,
        tables=tables,
        latent_mean=mean,
        latent_sd=sd,
        latent_mean_se=mean_se,
        latent_sd_se=sd_se,
        covariance=covariance,
        slot_se=slot_se,
    )


def _rescale_jacobian(fit: MultiGroupFit, slope: float, shift: float) -> np.ndarray:
    """d(parameters on the parent's scale) / d(parameters on the own scale): a / A; c - a B / A; A mean + B; A sd."""
    size = fit.covariance.shape[0] if fit.covariance is not None else 0
    jacobian = np.zeros((size, size))
    index = fit.layout.index
    for (g, j, s), i in np.ndenumerate(index):
        if i < 0:
            continue
        if s == 0:
            jacobian[i, i] = 1.0 / slope
            continue
        jacobian[i, i] = 1.0
        if s == GUESSING_SLOT and fit.template.has_guessing[j]:
            continue  # a 3PL asymptote does not depend on the scale
        if index[g, j, 0] >= 0:
            jacobian[i, index[g, j, 0]] = -shift / slope
    for i in range(fit.layout.n_free, size):
        jacobian[i, i] = slope  # free latent means (A mean + B) and SDs (A sd)
    return jacobian


def _slot_covariance(fit: MultiGroupFit, items: Sequence[int]) -> np.ndarray | None:
    """Covariance of the reference group's slots of ``items`` (slope, intercepts item by item)."""
    if fit.covariance is None:
        return None
    at = [int(fit.layout.index[0, j, s]) for j in items for s in range(int(fit.template.n_slots[j]))]
    return fit.covariance[np.ix_(at, at)]


def _fixed_fit(  # noqa: PLR0913 - the data, the policy, the link and the start
    prepared: PreparedData,
    settings: PipelineSettings,
    policy: PolicyTable,
    common: _Common,
    link: Sequence[int],
    start: MultiGroupFit,
    *,
    standard_errors: bool,
    progress: ProgressCallback | None,
) -> MultiGroupFit:
    """Every parameter but the link items' (held at their published values) on the parent's scale."""
    n_groups = prepared.n_groups
    tables = start.tables.copy()
    group_free = policy.group_free(tables.shape[2])
    fixed = np.zeros(tables.shape, dtype=bool)
    for j in link:
        row = slot_table(common.published[j])[0]
        tables[0, j, : row.size] = row
        fixed[0, j, : row.size] = True
        for g in range(1, n_groups):
            if not group_free[g, j].any():
                tables[g, j] = tables[0, j]
    one_pl = [j for j, m in enumerate(prepared.models) if m in SHARED_SLOPE_MODELS]
    held_one_pl = [j for j in link if prepared.models[j] in SHARED_SLOPE_MODELS]
    if held_one_pl:  # the 1PL items share one slope: the published one
        tables[:, one_pl, 0] = common.published[held_one_pl[0]].slopes[0]
        fixed[0, one_pl, 0] = True
    every = np.ones(n_groups, dtype=bool)
    latent = LatentSpec(start.latent_mean.copy(), start.latent_sd.copy(), every, every.copy())
    return quiet_fit(
        policy.administered(prepared.x, prepared.group_index),
        prepared.k,
        prepared.group_index,
        n_groups,
        models=prepared.models,
        settings=replace(settings.em, standard_errors=standard_errors),
        group_free=group_free,
        fixed=fixed,
        start=tables,
        latent=latent,
        progress=None if progress is None else (lambda it, ll: progress("link", it, ll)),
    )


LINK_RULE = (
    "Each common item is fitted in this cycle's reference group with every other item held at a "
    "fixed-parameter link (the one-item models of the DIF screen, the earlier cycle as a reference with known "
    "parameters and no respondents; this cycle's latent mean and SD re-estimated). Its change is tested by a "
    "Wald statistic with both cycles' sampling error (this cycle's covariance plus the published SEs squared; "
    "the bundle keeps no covariances of the published values); the LR G2 beside it takes the published values "
    "as exact and overstates the evidence. An item drifts when the Wald test is significant after "
    "Benjamini-Hochberg control across the common items at the DIF FDR level and its effect (the gap between "
    "the published and this cycle's expected-score curves, weighted by this cycle's reference population on "
    "the parent's scale, in theta units) reaches the moderate cut-off (0.20). Drifted items leave the link; "
    "the rounds repeat until the link set stops changing."
)


def _published_se(entry: ItemEntry) -> np.ndarray:
    """The published slot SEs (slope, intercepts, a 3PL item's logit(g) from the SE of g), 0 where the bundle
    has none."""
    values = [entry.slope_se, *entry.intercept_se]
    if entry.guessing is not None:
        g = entry.guessing
        values.append(None if entry.guessing_se is None or not 0 < g < 1 else entry.guessing_se / (g * (1 - g)))
    return np.array([0.0 if v is None else v for v in values], dtype=np.float64)


def _rows(
    prepared: PreparedData,
    common: _Common,
    tests: dict[int, DriftTest],
    drifted: set[int],
    settings: PipelineSettings,
) -> list[DriftRow]:
    rows = []
    for j in common.positions:
        drift, k_j = tests[j], int(prepared.k[j])
        test = drift.test
        rows.append(
            DriftRow(
                item=prepared.item_ids[j],
                wald=finite_or_none(drift.wald),
                df=test.df_omnibus,
                p_value=test.p_omnibus,
                p_adjusted=finite_or_none(test.p_adjusted),
                g2=test.g2_omnibus,
                g2_p_value=drift.lr_p,
                g2_nonuniform=finite_or_none(test.g2_nonuniform),
                g2_uniform=finite_or_none(test.g2_uniform),
                effect_theta=finite_or_none(test.effect_theta),
                effect_signed=finite_or_none(test.effect_signed),
                effect_theta_se=finite_or_none(test.effect_theta_se),
                level=test.level(settings.dif),  # type: ignore[arg-type]
                drifted=j in drifted,
                parent_slope=float(common.published[j].slopes[0]),
                parent_intercepts=[float(c) for c in common.published[j].intercepts[0, : k_j - 1]],
                slope=float(test.focal_table[0]),
                intercepts=[float(c) for c in test.focal_table[1:k_j]],
            )
        )
    return rows


def run_link_stage(  # noqa: PLR0913 - the data, the policy, the request and the free fit
    prepared: PreparedData,
    settings: PipelineSettings,
    policy: PolicyTable,
    request: LinkRequest,
    free: MultiGroupFit,
    progress: ProgressCallback | None = None,
) -> LinkStage:
    """Screen the common items for drift, then put the calibration on the parent's scale (see the module)."""
    parent = request.parent
    common = common_items(prepared, parent)
    notes: list[str] = []
    if len(common.positions) < MIN_LINK_ITEMS:
        raise CalibrationInputError(
            f"only {len(common.positions)} item(s) of this calibration can be compared with {parent.label} "
            f"(same id, model and categories); a link needs at least {MIN_LINK_ITEMS}"
        )
    drift_settings = EMSettings(
        tolerance=settings.dif.sub_tolerance,
        standard_errors=False,
        quadrature=settings.em.quadrature,
        compress_patterns=False,
        held_guessing=settings.em.held_guessing,
    )
    reference_rows = policy.administered(prepared.x, prepared.group_index)[prepared.group_index == 0]
    all_common = [PublishedItem(j, common.published[j], _published_se(common.entries[j])) for j in common.positions]
    link = list(common.positions)
    start = _on_parent_scale(
        free,
        characteristic_curve_constants(
            _stack(common.published, link), free.group_params(0).subset(link), method="stocking-lord"
        ),
    )
    rounds, settled = 0, False
    drifted: set[int] = set()
    while rounds < LINK_ROUNDS and not settled:
        rounds += 1
        provisional = _fixed_fit(
            prepared, settings, policy, common, link, start, standard_errors=False, progress=progress
        )
        tests = drift_tests(
            reference_rows,
            provisional.group_params(0),
            all_common,
            mean=float(provisional.latent_mean[0]),
            sd=float(provisional.latent_sd[0]),
            settings=drift_settings,
        )
        drifted = {j for j in common.positions if tests[j].test.flagged(settings.dif)}
        next_link = [j for j in common.positions if j not in drifted]
        settled = next_link == link
        if len(next_link) < MIN_LINK_ITEMS:
            names = ", ".join(prepared.item_ids[j] for j in sorted(drifted))
            raise CalibrationInputError(
                f"only {len(next_link)} of the {len(common.positions)} common items are free of drift against "
                f"{parent.label} (drifted: {names}); a link needs at least {MIN_LINK_ITEMS}: review the items, "
                "or calibrate without a link (a new scale)"
            )
        link, start = next_link, provisional
    if not settled:
        notes.append(f"link: the link set was still changing after {LINK_ROUNDS} purification rounds; the last is used")
    held: dict[int, ItemEntry] = {}
    if request.method == "fixed-parameter":
        fit = _fixed_fit(
            prepared, settings, policy, common, link, start, standard_errors=settings.em.standard_errors, progress=None
        )
        constants = LinkConstants(
            slope=float(fit.latent_sd[0]),
            intercept=float(fit.latent_mean[0]),
            slope_se=finite_or_none(float(fit.latent_sd_se[0])),
            intercept_se=finite_or_none(float(fit.latent_mean_se[0])),
        )
        held = {j: common.entries[j] for j in link}
    else:
        found = characteristic_curve_constants(
            _stack(common.published, link),
            free.group_params(0).subset(link),
            method=request.method,
            covariance=_slot_covariance(free, link),
        )
        fit = _on_parent_scale(free, found)
        constants = LinkConstants(
            slope=found.slope,
            intercept=found.intercept,
            slope_se=finite_or_none(found.slope_se),
            intercept_se=finite_or_none(found.intercept_se),
        )
    share = max(RECOMMENDED_LINK_ITEMS, int(np.ceil(RECOMMENDED_LINK_SHARE * prepared.n_items)))
    if len(link) < share:
        notes.append(
            f"link: {len(link)} link items; at least {share} (5, and about 20% of the test) is common practice for "
            "a common-item link: the scale of this version rests on few items"
        )
    record = Link(
        parent=parent.label,
        parent_hash=parent.hash,
        method=request.method,
        link_items=[prepared.item_ids[j] for j in link],
        drifted_items=[prepared.item_ids[j] for j in common.positions if j in drifted],
        new_items=common.new_items,
        not_linked=common.not_linked,
        constants=constants,
        drift=_rows(prepared, common, tests, drifted, settings),
        rounds=rounds,
        rule=LINK_RULE,
    )
    return LinkStage(fit=fit, record=record, held_entries=held, parent_scoring=parent.scoring, notes=notes)
