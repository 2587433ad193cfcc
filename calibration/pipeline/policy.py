"""The policy of every item in every group: invariant, group-specific or excluded, with reason and evidence."""

from __future__ import annotations

from collections.abc import Iterator, Sequence
from dataclasses import dataclass

import numpy as np

from calibration.bundle.schema import PolicyEvidence
from calibration.errors import CalibrationInputError
from calibration.pipeline.settings import PolicyOverride
from calibration.vocabulary import POLICY_STATUSES

Cell = tuple[int, int]
"""(item position, group position) in a prepared calibration; group 0 is the reference."""


@dataclass
class CellPolicy:
    """One item's policy in one group."""

    status: str
    reason: str
    evidence: PolicyEvidence | None = None
    proposed: str | None = None  # the computed status, once a reviewer's decision replaces it


class PolicyTable:
    """Status, reason and evidence of every (item, group) cell; every cell starts invariant."""

    def __init__(self, n_items: int, n_groups: int) -> None:
        """Every cell invariant, with the reason that fits a single- or a multiple-group calibration."""
        reason = "single-group calibration" if n_groups == 1 else "no DIF flag"
        self.n_items, self.n_groups = n_items, n_groups
        self._cells = {(j, g): CellPolicy("invariant", reason) for j in range(n_items) for g in range(n_groups)}

    def __getitem__(self, cell: Cell) -> CellPolicy:
        """The policy of one cell."""
        return self._cells[cell]

    def cells(self) -> Iterator[tuple[Cell, CellPolicy]]:
        """Every cell and its policy, items first, then groups."""
        return iter(self._cells.items())

    def status(self, cell: Cell) -> str:
        """The status of one cell."""
        return self._cells[cell].status

    def apply_overrides(
        self, overrides: Sequence[PolicyOverride], item_ids: tuple[str, ...], group_names: list[str]
    ) -> None:
        """Reviewer decisions replace the computed status (checked first; see :func:`check_overrides`)."""
        check_overrides(overrides, item_ids, group_names)
        for o in overrides:
            cell = self._cells[(item_ids.index(o.item), group_names.index(o.group))]
            cell.proposed = cell.status if cell.proposed is None else cell.proposed
            cell.status = o.status
            cell.reason = f"reviewer override: {o.note.strip()}"

    def group_free(self, k_max: int, *, statuses: tuple[str, ...] = ("group_specific",)) -> np.ndarray:
        """(n_groups, n_items, k_max): True where a cell's status is one of ``statuses`` (its own parameters)."""
        out = np.zeros((self.n_groups, self.n_items, k_max), dtype=bool)
        for (j, g), cell in self._cells.items():
            if cell.status in statuses:
                out[g, j, :] = True
        return out

    def administered(self, x: np.ndarray, group_index: np.ndarray, *, copy: bool = True) -> np.ndarray:
        """The responses (a copy, unless ``copy`` is False) with every excluded cell not administered for its group."""
        out = x.copy() if copy else x
        for (j, g), cell in self._cells.items():
            if cell.status == "excluded":
                out[group_index == g, j] = np.nan
        return out

    def kept_items(self, g: int) -> list[int]:
        """Items group g is scored on (every status but excluded)."""
        return [j for j in range(self.n_items) if self._cells[(j, g)].status != "excluded"]

    def reviewed_cells(self) -> list[Cell]:
        """Focal-group cells with a status other than invariant (content experts must review these)."""
        return [cell for cell, p in self._cells.items() if p.status != "invariant" and cell[1] > 0]


def check_overrides(overrides: Sequence[PolicyOverride], item_ids: tuple[str, ...], group_names: list[str]) -> None:
    """Raise :class:`CalibrationInputError` naming every override that cannot apply, and why."""
    problems = [p for o in overrides if (p := _override_problem(o, item_ids, group_names))]
    if problems:
        raise CalibrationInputError("; ".join(problems))


def _override_problem(o: PolicyOverride, item_ids: tuple[str, ...], group_names: list[str]) -> str | None:
    if o.item not in item_ids:
        return f"policy override: item {o.item!r} is not a calibrated item"
    if o.group not in group_names:
        return f"policy override for {o.item}: group {o.group!r} is not in the data"
    if o.status not in POLICY_STATUSES:
        return (
            f"policy override for {o.item} in {o.group}: status {o.status!r} is not one of {', '.join(POLICY_STATUSES)}"
        )
    if o.group == group_names[0] and o.status != "invariant":
        return f"policy override for {o.item}: the reference group {o.group!r} keeps every item"
    if not o.note.strip():
        return f"policy override for {o.item} in {o.group}: a reviewer note is required"
    return None
