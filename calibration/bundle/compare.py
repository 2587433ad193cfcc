"""Two bundle versions compared: items, policy, anchors, group densities, and what the change does to scores.

Every difference is read from the two documents; the sizes are on the theta scale. An item in both
versions (same id and categories) is compared by the gap between its two expected-score curves, weighted
by the newer version's reference population and divided by the older curve's mean slope (the DIF and drift
effect size, in theta units). For a respondent who answers every common item, the expected change in theta
is the true-score change: the theta of the newer version whose expected summed score on the common items
equals the older version's at theta, minus theta, with each version's conditional SE (the test information
of the common items) beside it. Versions are on one scale when one was linked to the other, or both to the
same root (``same_scale``); otherwise the differences include the change of scale, and the comparison says so.
"""

from __future__ import annotations

from collections.abc import Callable

import numpy as np
from pydantic import Field

from calibration.bundle.schema import Bundle, Frozen, ItemEntry
from calibration.bundle.scorer import entry_parameters
from calibration.bundle.store import scale_chain
from calibration.dif.effect_size import effect_size
from calibration.irt.models import ItemParameters, expected_item_scores, total_information

DIFF_THETAS = tuple(np.round(np.arange(-3.0, 3.01, 0.5), 2))
"""Theta points (the older version's scale) at which the expected change in scores is given."""
UNCHANGED = 1e-9
"""Parameters that differ by less than this count as unchanged (rounding of a round trip)."""
DIFF_CAUTION = (
    "A change in an item's parameters between versions is statistical evidence that its calibration moved, "
    "not a finding about the item: review it with content experts. Scores of two versions are comparable only "
    "when they are on one scale (linked); report the SE with every score."
)


class ItemChange(Frozen):
    """One item across the two versions."""

    item: str
    change: str = Field(description="added, removed, changed, unchanged, or not comparable (categories differ)")
    from_slope: float | None = None
    from_thresholds: list[float] | None = None
    to_slope: float | None = None
    to_thresholds: list[float] | None = None
    change_theta: float | None = Field(None, description="size of the curve change, theta units (unsigned)")
    change_signed: float | None = Field(None, description="signed: negative means harder in the newer version")


class PolicyChange(Frozen):
    """A policy cell whose status differs between the versions."""

    item: str
    group: str
    from_status: str
    to_status: str
    to_reason: str


class GroupChange(Frozen):
    """A group's latent density in each version (null where the group is absent)."""

    group: str
    from_mean: float | None
    from_sd: float | None
    to_mean: float | None
    to_sd: float | None


class ScoreChange(Frozen):
    """The expected change in theta and SE at one theta, for a respondent answering every common item."""

    theta: float
    to_theta: float | None = Field(description="the newer version's theta with the same expected summed score")
    change: float | None
    from_se: float
    to_se: float | None


class BundleDiff(Frozen):
    """What changed from one bundle version to another."""

    from_bundle: str
    to_bundle: str
    from_hash: str
    to_hash: str
    same_scale: bool
    scale_note: str
    common_items: list[str]
    items: list[ItemChange]
    policy: list[PolicyChange]
    groups: list[GroupChange]
    anchors_added: list[str]
    anchors_removed: list[str]
    scores: list[ScoreChange]
    caution: str = DIFF_CAUTION


def _one(entry: ItemEntry) -> ItemParameters:
    return entry_parameters([entry])


def _item_changes(older: Bundle, newer: Bundle, mean: float, sd: float) -> tuple[list[ItemChange], list[str]]:
    before = {item.id: item for item in older.items}
    after = {item.id: item for item in newer.items}
    changes, common = [], []
    for item in [*older.items, *(i for i in newer.items if i.id not in before)]:
        old, new = before.get(item.id), after.get(item.id)
        if old is None:
            assert new is not None
            changes.append(ItemChange(item=item.id, change="added", to_slope=new.slope, to_thresholds=new.thresholds))
            continue
        if new is None:
            changes.append(
                ItemChange(item=item.id, change="removed", from_slope=old.slope, from_thresholds=old.thresholds)
            )
            continue
        sides = {
            "from_slope": old.slope,
            "from_thresholds": old.thresholds,
            "to_slope": new.slope,
            "to_thresholds": new.thresholds,
        }
        if old.n_categories != new.n_categories or old.category_map != new.category_map:
            changes.append(ItemChange(item=item.id, change="not comparable", **sides))
            continue
        common.append(item.id)
        gap = max(
            abs(a - b)
            for a, b in zip(
                [old.slope, *old.intercepts, old.guessing or 0.0],
                [new.slope, *new.intercepts, new.guessing or 0.0],
                strict=True,
            )
        )
        unsigned, signed = effect_size(_one(old), _one(new), mean, sd)
        changes.append(
            ItemChange(
                item=item.id,
                change="changed" if gap > UNCHANGED else "unchanged",
                change_theta=unsigned if np.isfinite(unsigned) else None,
                change_signed=signed if np.isfinite(signed) else None,
                **sides,
            )
        )
    return changes, common


def _score_changes(older: Bundle, newer: Bundle, common: list[str]) -> list[ScoreChange]:
    """True-score change over DIFF_THETAS for a respondent answering every common item (see the module)."""
    if not common:
        return []
    old = entry_parameters([next(i for i in older.items if i.id == item) for item in common])
    new = entry_parameters([next(i for i in newer.items if i.id == item) for item in common])
    thetas = np.asarray(DIFF_THETAS, dtype=np.float64)
    fine = np.linspace(-8.0, 8.0, 3201)  # the newer test characteristic curve, inverted on a fine grid
    new_curve = expected_item_scores(new, fine).sum(axis=0)
    targets = expected_item_scores(old, thetas).sum(axis=0)
    inside = (targets > new_curve[0]) & (targets < new_curve[-1])
    to_theta = np.where(inside, np.interp(targets, new_curve, fine), np.nan)
    from_se = 1.0 / np.sqrt(total_information(old, thetas))
    to_se = 1.0 / np.sqrt(total_information(new, np.nan_to_num(to_theta)))
    return [
        ScoreChange(
            theta=float(t),
            to_theta=float(u) if np.isfinite(u) else None,
            change=float(u - t) if np.isfinite(u) else None,
            from_se=float(s),
            to_se=float(v) if np.isfinite(u) else None,
        )
        for t, u, s, v in zip(thetas, to_theta, from_se, to_se, strict=True)
    ]


def compare_bundles(older: Bundle, newer: Bundle, *, same_scale: bool, scale_note: str) -> BundleDiff:
    """Everything that changed from ``older`` to ``newer`` (see the module); the caller says if they share a scale."""
    reference = next(g for g in newer.metric.groups if g.name == newer.metric.reference_group)
    items, common = _item_changes(older, newer, reference.latent_mean, reference.latent_sd)
    before = {item.id: item for item in older.items}
    policy = [
        PolicyChange(
            item=item.id,
            group=group,
            from_status=before[item.id].policy[group].status,
            to_status=cell.status,
            to_reason=cell.reason,
        )
        for item in newer.items
        if item.id in before
        for group, cell in item.policy.items()
        if group in before[item.id].policy and before[item.id].policy[group].status != cell.status
    ]
    old_groups = {g.name: g for g in older.metric.groups}
    new_groups = {g.name: g for g in newer.metric.groups}
    groups = [
        GroupChange(
            group=name,
            from_mean=old_groups[name].latent_mean if name in old_groups else None,
            from_sd=old_groups[name].latent_sd if name in old_groups else None,
            to_mean=new_groups[name].latent_mean if name in new_groups else None,
            to_sd=new_groups[name].latent_sd if name in new_groups else None,
        )
        for name in [*old_groups, *(n for n in new_groups if n not in old_groups)]
    ]
    old_anchors, new_anchors = set(older.anchors.items), set(newer.anchors.items)
    return BundleDiff(
        from_bundle=older.label,
        to_bundle=newer.label,
        from_hash=older.hash,
        to_hash=newer.hash,
        same_scale=same_scale,
        scale_note=scale_note,
        common_items=common,
        items=items,
        policy=policy,
        groups=groups,
        anchors_added=sorted(new_anchors - old_anchors),
        anchors_removed=sorted(old_anchors - new_anchors),
        scores=_score_changes(older, newer, common),
    )


def compare_versions(older: Bundle, newer: Bundle, get: Callable[[str, int], Bundle]) -> BundleDiff:
    """Compare two published versions; whether they share a scale is read from their links (``get`` reads parents)."""
    chain_first, chain_second = scale_chain(get, older), scale_chain(get, newer)
    same = chain_first[-1] == chain_second[-1]
    if same:
        through = [label for label in (*chain_first[1:], *chain_second[1:]) if label != chain_first[-1]]
        via = f" (linked through {', '.join(through)})" if through else ""
        note = f"both on the scale of {chain_first[-1]}{via}"
    else:
        note = (
            f"not on one scale: {older.label} uses {chain_first[-1]}'s, {newer.label} uses {chain_second[-1]}'s; "
            "item and score changes include the change of scale (link the newer version to the older one to compare)"
        )
    return compare_bundles(older, newer, same_scale=same, scale_note=note)
