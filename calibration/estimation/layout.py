"""Parameter layout: which item slots are free, per group, and where they sit in the parameter vector.

An item's slots are its slope (slot 0) and its intercepts (slots 1..K-1); a group's
items form a slot table of shape (n_items, k_max), NaN-padded.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

from calibration.irt.models import MODEL_1PL, FloatArray, IntArray, ItemParameters


@dataclass(frozen=True)
class GroupLayout:
    """Which item parameters are free, per group, and where they sit in the parameter vector.

    ``index[g, j, s]`` is the position of slot ``s`` of item ``j`` in group ``g``
    (slot 0 = slope, slots 1.. = intercepts) in the free-item-parameter vector, or -1
    when the slot does not exist or is fixed. A slot a group shares with the
    reference group (group 0) has the reference group's index; "1pl" items share one
    slope. ``owner`` marks the first place each index appears (where a slope prior
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
        n_items, k_max = template.n_items, template.max_categories
        exists = np.arange(k_max)[None, :] < template.n_categories[:, None]
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
                if s_ == 0 and template.models[j] == MODEL_1PL:
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
    """(n_items, k_max) table: slope in column 0, intercepts after (NaN padding)."""
    table = np.full((params.n_items, params.max_categories), np.nan)
    table[:, 0] = params.slopes
    table[:, 1:] = params.intercepts[:, : params.max_categories - 1]
    return table


def params_from_table(table: FloatArray, template: ItemParameters) -> ItemParameters:
    """Item parameters from a slot table, with the template's categories and models."""
    return ItemParameters(
        slopes=table[:, 0].copy(),
        intercepts=table[:, 1:].copy(),
        n_categories=template.n_categories,
        models=template.models,
    )


def valid_tables(tables: FloatArray, n_categories: IntArray) -> np.ndarray:
    """(n_groups, n_items): finite slots and strictly decreasing intercepts."""
    k_max = tables.shape[-1]
    exists = np.arange(k_max)[None, :] < n_categories[:, None]
    finite = (np.isfinite(tables) | ~exists[None]).all(axis=-1)
    c = tables[..., 1:]
    both = exists[:, 2:]  # intercept pairs (m, m+1) that both exist
    if both.shape[1] == 0:
        return finite
    steps = c[..., 1:] - c[..., :-1]
    ordered = ((steps < 0) | ~both[None]).all(axis=-1)
    return finite & ordered
