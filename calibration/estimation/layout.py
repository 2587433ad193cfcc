"""Parameter layout: which item slots are free, per group, and where they sit in the parameter vector.

An item's slots are its slope (slot 0), its intercepts (slots 1..K-1) and, for a 3PL item,
``logit(g)`` (slot 2); a group's items form a slot table of shape (n_items, max_slots), NaN-padded.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

from calibration.irt.models import (
    CUMULATIVE_MODELS,
    GUESSING_SLOT,
    MODEL_3PL,
    SHARED_SLOPE_MODELS,
    FloatArray,
    IntArray,
    ItemParameters,
)


@dataclass(frozen=True)
class GroupLayout:
    """Which item parameters are free, per group, and where they sit in the parameter vector.

    ``index[g, j, s]`` is the position of slot ``s`` of item ``j`` in group ``g``
    (slot 0 = slope, slots 1.. = intercepts) in the free-item-parameter vector, or -1
    when the slot does not exist or is fixed. A slot a group shares with the
    reference group (group 0) has the reference group's index; "1pl" and "pcm" items share
    one slope (the Rasch family). ``owner`` marks the first place each index appears (where a slope prior
    is counted once). ``coupled`` is True when one index spans several items.
    """

    index: IntArray
    owner: np.ndarray
    n_free: int
    coupled: bool

    @classmethod
    def build(
        cls,
        template: ItemParameters,
        n_groups: int = 1,
        *,
        group_free: np.ndarray | None = None,
        fixed: np.ndarray | None = None,
    ) -> GroupLayout:
        """The layout of a slot template for ``n_groups`` groups, with group-specific and fixed slots."""
        n_items, k_max = template.n_items, template.max_slots
        exists = np.arange(k_max)[None, :] < template.n_slots[:, None]
        shape = (n_groups, n_items, k_max)
        own = np.zeros(shape, dtype=bool) if group_free is None else np.asarray(group_free, dtype=bool)
        held = np.zeros(shape, dtype=bool) if fixed is None else np.asarray(fixed, dtype=bool)
        if held.shape == (n_items, k_max):
            held = np.broadcast_to(held, shape)
        index = np.full(shape, -1, dtype=np.int64)
        position = 0
        common_slope = -1
        for j in range(n_items):
            for s_ in range(k_max):
                if not exists[j, s_] or held[0, j, s_]:
                    continue
                if s_ == 0 and template.models[j] in SHARED_SLOPE_MODELS:
                    if common_slope < 0:
                        common_slope, position = position, position + 1
                    index[0, j, 0] = common_slope
                else:
                    index[0, j, s_], position = position, position + 1
        for g in range(1, n_groups):
            for j in range(n_items):
                for s_ in range(k_max):
                    if not exists[j, s_]:
                        continue
                    if own[g, j, s_]:
                        if not held[g, j, s_]:
                            index[g, j, s_], position = position, position + 1
                    else:
                        index[g, j, s_] = index[0, j, s_]
        flat = index.reshape(-1)
        owner = np.zeros(flat.shape, dtype=bool)
        _, first = np.unique(flat, return_index=True)
        owner[first] = True
        owner &= flat >= 0
        items_of_index = {}
        for (_g, j, _s), i in np.ndenumerate(index):
            if i >= 0:
                items_of_index.setdefault(int(i), set()).add(j)
        coupled = any(len(v) > 1 for v in items_of_index.values())
        return cls(index=index, owner=owner.reshape(shape), n_free=position, coupled=coupled)

    def to_vector(self, tables: FloatArray) -> FloatArray:
        """The free-parameter vector of slot tables (n_groups, n_items, k_max)."""
        vec = np.zeros(self.n_free)
        mask = self.index >= 0
        vec[self.index[mask]] = tables[mask]
        return vec

    def from_vector(self, vec: FloatArray, tables: FloatArray) -> FloatArray:
        """Slot tables with the free slots taken from ``vec`` and the rest from ``tables``."""
        out = tables.copy()
        mask = self.index >= 0
        out[mask] = vec[self.index[mask]]
        return out

    def gather(self, per_slot: FloatArray) -> FloatArray:
        """Sum values of shape (n_groups, n_items, k_max) into the free vector."""
        vec = np.zeros(self.n_free)
        mask = self.index >= 0
        np.add.at(vec, self.index[mask], per_slot[mask])
        return vec


def slot_table(params: ItemParameters) -> FloatArray:
    """(n_items, max_slots) table: slope in column 0, intercepts after, a 3PL item's ``logit(g)`` in
    column 2 (NaN padding)."""
    table = np.full((params.n_items, params.max_slots), np.nan)
    table[:, 0] = params.slopes
    table[:, 1 : params.max_categories] = params.intercepts[:, : params.max_categories - 1]
    rows = params.has_guessing
    if rows.any():
        g = params.guessing[rows]
        with np.errstate(divide="ignore"):
            table[rows, GUESSING_SLOT] = np.log(g) - np.log1p(-g)
    return table


def params_from_table(table: FloatArray, template: ItemParameters) -> ItemParameters:
    """Item parameters from a slot table, with the template's categories and models."""
    k_max = template.max_categories
    intercepts = table[:, 1:k_max].copy()
    rows = template.has_guessing
    guessing = np.zeros(template.n_items)
    if rows.any():
        intercepts[rows, 1:] = np.nan
        guessing[rows] = 1.0 / (1.0 + np.exp(-table[rows, GUESSING_SLOT]))
    return ItemParameters(
        slopes=table[:, 0].copy(),
        intercepts=intercepts,
        n_categories=template.n_categories,
        models=template.models,
        guessing=guessing,
    )


def valid_tables(tables: FloatArray, template: ItemParameters) -> np.ndarray:
    """(n_groups, n_items): finite slots, and strictly decreasing intercepts for the cumulative items
    (a partial-credit item's steps may come in any order)."""
    k_max = tables.shape[-1]
    exists = np.arange(k_max)[None, :] < template.n_slots[:, None]
    finite = (np.isfinite(tables) | ~exists[None]).all(axis=-1)
    n_categories = template.n_categories
    ordered_items = np.array([m in CUMULATIVE_MODELS for m in template.models], dtype=bool)
    both = (np.arange(2, max(k_max, 2))[None, :] < n_categories[:, None]) & ordered_items[:, None]
    if both.shape[1] == 0:
        return finite
    c = tables[..., 1 : both.shape[1] + 2]
    steps = c[..., 1:] - c[..., :-1]
    ordered = ((steps < 0) | ~both[None]).all(axis=-1)
    return finite & ordered


def slot_guessing(row: FloatArray, model: str) -> float | None:
    """The lower asymptote ``g`` of one item's slot row when it is a 3PL item, else None."""
    if model != MODEL_3PL:
        return None
    return float(1.0 / (1.0 + np.exp(-row[GUESSING_SLOT])))
