"""The IRT DIF stage: anchors (screened or named), the anchor-model fit, anchored LR tests, FDR control.

Rooms: ``anchored_lr`` (the tests), ``anchors`` (ranking and selection), ``multiplicity``
(Benjamini-Hochberg), ``effect_size`` (theta-scale effect and its interval), ``settings``.
"""

from __future__ import annotations

from collections.abc import Callable
from dataclasses import dataclass, field, replace

import numpy as np

from calibration.dif.anchored_lr import ItemGroupTest, anchored_lr_tests
from calibration.dif.anchors import AnchorCandidate, anchor_warnings, n_anchors, rank_anchor_candidates
from calibration.dif.multiplicity import adjust
from calibration.dif.settings import DifSettings
from calibration.estimation import EMSettings, MultiGroupFit, calibrate_groups
from calibration.irt.models import FloatArray, IntArray


@dataclass(frozen=True)
class DifOutcome:
    """Everything the IRT DIF stage decided and why."""

    screening: dict[tuple[int, int], ItemGroupTest]
    anchors: list[int]
    anchor_method: str
    anchor_fit: MultiGroupFit
    tests: dict[tuple[int, int], ItemGroupTest]
    settings: DifSettings = field(default_factory=DifSettings)
    ranking: list[AnchorCandidate] = field(default_factory=list)  # empty when the user named the anchors
    warnings: tuple[str, ...] = ()


def run_irt_dif(  # noqa: PLR0913 - the data, the base fit and keyword-only options
    responses: FloatArray,
    n_categories: IntArray,
    group_index: IntArray,
    n_groups: int,
    scalar_fit: MultiGroupFit,
    *,
    item_ids: tuple[str, ...],
    models: tuple[str, ...],
    settings: DifSettings,
    em_settings: EMSettings,
    skip: set[tuple[int, int]] | None = None,
    progress: Callable[[str, int, int], None] | None = None,
) -> DifOutcome:
    """Anchor selection (or user anchors), the anchor-model fit, and the tests of every other item.

    ``skip`` names (item, group) cells with no data to test (e.g. no variance in that group).
    """
    n_items = responses.shape[1]

    def report(stage: str) -> Callable[[int, int], None]:
        return lambda done, total: progress(stage, done, total) if progress is not None else None

    screening: dict[tuple[int, int], ItemGroupTest] = {}
    ranking: list[AnchorCandidate] = []
    warnings: list[str] = []
    if settings.anchors:
        unknown = [a for a in settings.anchors if a not in item_ids]
        if unknown:
            raise ValueError(f"anchor items not in the data: {', '.join(unknown)}")
        anchors = sorted(item_ids.index(a) for a in settings.anchors)
        method = "named by the user"
    else:
        screening = adjust(
            anchored_lr_tests(
                scalar_fit,
                responses,
                group_index,
                list(range(n_items)),
                tolerance=settings.sub_tolerance,
                omnibus_only=True,
                skip=skip,
                progress=report("screen"),
            )
        )
        ranking = rank_anchor_candidates(screening, item_ids)
        k = n_anchors(n_items, settings)
        anchors = sorted(c.item for c in ranking[:k])
        warnings = anchor_warnings(ranking, anchors, item_ids, settings)
        method = (
            "all-other-items screening: an omnibus anchored LR test of every item in every focal group, every "
            "other item held at the scalar-model estimates; items ranked by the largest over focal groups of "
            "(G2 - df) / sqrt(2 df), ties broken by its sum over groups and then by item id; the first "
            f"k = max({settings.min_anchors}, {settings.anchor_fraction:.0%} of {n_items} items) = {k} are the anchors"
        )
    group_free = np.zeros(scalar_fit.tables.shape, dtype=bool)  # (groups, items, slots)
    others = [j for j in range(n_items) if j not in anchors]
    group_free[1:, others, :] = True
    for j, g in skip or ():
        group_free[g, j, :] = False  # no data to free the cell with
    anchor_fit = calibrate_groups(
        responses,
        n_categories,
        group_index,
        n_groups,
        models=models,
        settings=replace(em_settings, standard_errors=False),
        group_free=group_free,
        start=scalar_fit.tables,
        warn=False,
    )
    tests = anchored_lr_tests(
        anchor_fit, responses, group_index, others, tolerance=settings.sub_tolerance, skip=skip, progress=report("test")
    )
    return DifOutcome(
        screening=screening,
        anchors=anchors,
        anchor_method=method,
        anchor_fit=anchor_fit,
        tests=adjust(tests),
        settings=settings,
        ranking=ranking,
        warnings=tuple(warnings),
    )
