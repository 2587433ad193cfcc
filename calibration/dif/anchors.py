"""Anchor selection (after Woods 2009).

Screen every item with all other items as anchors, rank the items by their largest over focal
groups of (G2 - df) / sqrt(2 df) (ties: its sum over groups, then the item id, so the column
order never matters), then keep the first k (default k = max(4, 20% of items)), or use the
anchors a user names.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

from calibration.dif.anchored_lr import ItemGroupTest
from calibration.dif.settings import DifSettings


@dataclass(frozen=True)
class AnchorCandidate:
    """One item's standing in the anchor ranking (see :func:`rank_anchor_candidates`)."""

    item: int
    statistic: float  # largest over focal groups of (G2 - df) / sqrt(2 df); +inf when never tested
    total: float  # the same, summed over the focal groups (first tie-break)
    worst_group: int  # -1 when never tested
    p_adjusted: float  # smallest FDR-adjusted screening p value over the focal groups


def rank_anchor_candidates(
    screening: dict[tuple[int, int], ItemGroupTest], item_ids: tuple[str, ...]
) -> list[AnchorCandidate]:
    """Every item, cleanest first, by a rule that does not depend on the order of the columns.

    The statistic is ``(G2 - df) / sqrt(2 df)``, approximately z under no DIF, so right/wrong and
    graded items compare; an item's value is its largest over focal groups (the group where it
    looks worst). Ties (e.g. several G2 of exactly 0) are broken by the sum over groups, then
    by item id in text order. An item with no screening test in any group ranks last.
    """
    by_item: dict[int, list[ItemGroupTest]] = {}
    for (j, _g), test in screening.items():
        by_item.setdefault(j, []).append(test)
    out = []
    for j in range(len(item_ids)):
        tests = by_item.get(j, [])
        if not tests:
            out.append(AnchorCandidate(j, float("inf"), float("inf"), -1, float("nan")))
            continue
        z = [(t.g2_omnibus - t.df_omnibus) / np.sqrt(2 * t.df_omnibus) for t in tests]
        worst = int(np.argmax(z))
        out.append(
            AnchorCandidate(
                j,
                float(z[worst]),
                float(np.sum(z)),
                tests[worst].group,
                float(np.nanmin([t.p_adjusted for t in tests])),
            )
        )
    return sorted(out, key=lambda c: (c.statistic, c.total, item_ids[c.item]))


def n_anchors(n_items: int, settings: DifSettings) -> int:
    """How many anchors the rule asks for: max(min_anchors, anchor_fraction of the items), at most all."""
    return min(max(settings.min_anchors, int(np.ceil(settings.anchor_fraction * n_items))), n_items)


def anchor_warnings(
    ranking: list[AnchorCandidate], anchors: list[int], item_ids: tuple[str, ...], settings: DifSettings
) -> list[str]:
    """Say when the anchors include items the screening itself found significant."""
    clean = [c for c in ranking if np.isfinite(c.statistic) and not c.p_adjusted < settings.fdr_level]
    chosen = {c.item: c for c in ranking if c.item in anchors}
    dirty = [c for c in chosen.values() if c.p_adjusted < settings.fdr_level]
    out = []
    if len(clean) < len(anchors):
        out.append(
            f"only {len(clean)} of {len(ranking)} items are clean in the all-other-items screening (FDR-adjusted "
            f"p >= {settings.fdr_level:g} in every group), but the anchor rule asks for {len(anchors)}: the anchor set "
            "may be contaminated; consider naming anchors chosen on content grounds (--anchors)"
        )
    if dirty:
        out.append(
            "anchor items that the screening found significant: "
            + ", ".join(f"{item_ids[c.item]} (adjusted p = {c.p_adjusted:.2g})" for c in dirty)
            + "; DIF in an anchor biases every other item's test"
        )
    return out
