"""Response tables: read and validate for calibration or for scoring; categories and models per item."""

from __future__ import annotations

import hashlib
from collections.abc import Sequence
from dataclasses import dataclass, field
from pathlib import Path
from typing import TYPE_CHECKING

import numpy as np

from calibration.errors import InputError

if TYPE_CHECKING:
    pass

from calibration.io.tables import MAX_PROBLEMS, TextTable, open_respondent_table, parse_codes, row_label
from calibration.irt.models import MODEL_1PL, MODEL_2PL, MODEL_GRM, FloatArray, IntArray

MISSING_CODE_GAP = 4


@dataclass(frozen=True)
class ItemSpec:
    """What a user declares about an item (all optional beyond the id)."""

    item: str
    model: str | None = None
    n_categories: int | None = None
    include: bool = True
    label: str = ""


@dataclass(frozen=True)
class ResponseData:
    """A validated response table.

    Attributes
    ----------
    ids : tuple of str, length n_persons
    item_ids : tuple of str, length n_items
    responses : float array of shape (n_persons, n_items)
        Category codes 0 .. K_j - 1, NaN for not administered.
    n_categories : int array of shape (n_items,)
    models : tuple of str, one per item
    groups : tuple of str or None
        The group of each respondent when a group column was read.
    source : str
        The file name (no directory) or a description.
    source_sha256 : str
        SHA-256 of the file's bytes.
    notes : tuple of str
        Handling decisions a user should see (ignored columns and the like).
    header_lines : int
        Lines before the first respondent in the file (1 for CSV, 0 for Parquet), for messages.
    """

    ids: tuple[str, ...]
    item_ids: tuple[str, ...]
    responses: FloatArray
    n_categories: IntArray
    models: tuple[str, ...]
    groups: tuple[str, ...] | None = None
    source: str = ""
    source_sha256: str = ""
    notes: tuple[str, ...] = field(default=())
    header_lines: int = 0

    @property
    def n_persons(self) -> int:
        """Number of respondents (rows)."""
        return int(self.responses.shape[0])

    @property
    def n_items(self) -> int:
        """Number of items (columns)."""
        return int(self.responses.shape[1])


def file_sha256(path: Path) -> str:
    """SHA-256 (hex) of a file's bytes, read in blocks."""
    digest = hashlib.sha256()
    with path.open("rb") as handle:
        for block in iter(lambda: handle.read(1 << 20), b""):
            digest.update(block)
    return digest.hexdigest()


def read_responses(
    path: Path | str,
    *,
    id_column: str = "id",
    group_column: str | None = None,
    item_spec: Sequence[ItemSpec] | None = None,
    dichotomous_model: str = MODEL_2PL,
) -> ResponseData:
    """Read and validate a response table for calibration.

    Without a spec every column other than the id (and group) column is an item,
    with categories ``0 .. max code``; each of those categories must occur (an
    unobserved category cannot be estimated). With a spec, only included items are
    read, codes must lie within the declared categories, and other columns are
    ignored with a note.
    """
    path = Path(path)
    table = open_respondent_table(path, id_column, group_column)
    columns, header = table.columns, table.header_lines
    source = path.name
    problems: list[str] = []

    reserved = {id_column} | ({group_column} if group_column else set())
    notes: list[str] = []
    if item_spec is None:
        item_ids = [c for c in columns if c not in reserved]
        declared: dict[str, ItemSpec] = {c: ItemSpec(c) for c in item_ids}
    else:
        declared = {s.item: s for s in item_spec if s.include}
        excluded = [s.item for s in item_spec if not s.include]
        missing = [s for s in declared if s not in columns]
        if missing:
            problems.extend(f"item {m!r} from the item spec has no column in the file" for m in missing)
        item_ids = [c for c in columns if c in declared]
        ignored = [c for c in columns if c not in reserved and c not in declared]
        if ignored:
            notes.append(f"columns not in the item spec were ignored: {', '.join(ignored)}")
        if excluded:
            notes.append(f"items excluded by the item spec: {', '.join(excluded)}")
    if not item_ids:
        problems.append("no item columns: every column other than the id column is read as an item")
    if problems:
        raise InputError(source, problems)

    ids, problems = _respondent_ids(table, id_column)
    responses, code_problems = parse_codes(table, item_ids)
    problems.extend(code_problems)
    if problems:
        raise InputError(source, problems[:MAX_PROBLEMS], total=len(problems))

    n_categories, models, category_problems = _categories_and_models(
        responses, item_ids, declared, header, dichotomous_model
    )
    if category_problems:
        raise InputError(source, category_problems[:MAX_PROBLEMS], total=len(category_problems))

    groups = _group_labels(table, group_column, source)
    return ResponseData(
        ids=tuple(ids),
        item_ids=tuple(item_ids),
        responses=responses,
        n_categories=n_categories,
        models=models,
        groups=groups,
        source=source,
        source_sha256=file_sha256(path),
        notes=tuple(notes),
        header_lines=header,
    )


def _respondent_ids(table: TextTable, id_column: str) -> tuple[list[str], list[str]]:
    """Ids as text; empty and duplicate ids are problems naming their rows."""
    problems: list[str] = []
    header = table.header_lines
    ids = table.text(id_column)
    first_row: dict[str, int] = {}
    for i, value in enumerate(ids):
        if not value:
            problems.append(f"{row_label(i, header)}, column {id_column!r}: empty respondent id")
        elif value in first_row:
            problems.append(
                f"{row_label(i, header)}, column {id_column!r}: duplicate id {value!r} "
                f"(first seen at {row_label(first_row[value], header)})"
            )
        first_row.setdefault(value, i)
    return ids, problems


def _group_labels(table: TextTable, group_column: str | None, source: str) -> tuple[str, ...] | None:
    if group_column is None:
        return None
    header = table.header_lines
    groups = tuple(table.text(group_column))
    empty = [i for i, g in enumerate(groups) if not g]
    if empty:
        raise InputError(
            source,
            [f"{row_label(i, header)}, column {group_column!r}: empty group" for i in empty[:MAX_PROBLEMS]],
            total=len(empty),
        )
    return groups


def read_for_scoring(
    path: Path | str,
    *,
    item_categories: dict[str, int],
    id_column: str = "id",
    group_column: str | None = None,
    ignore_columns: Sequence[str] = (),
) -> ResponseData:
    """Read a response table to score against known items.

    Item columns must be items of the bundle (``item_categories`` maps each to its
    number of categories) and codes must lie within those categories. A column
    that is neither an item, the id, the group nor listed in ``ignore_columns`` is
    an error (a misspelt item would otherwise be silently unscored). Bundle items
    without a column count as not administered, with a note.
    """
    path = Path(path)
    table = open_respondent_table(path, id_column, group_column)
    columns, header = table.columns, table.header_lines
    source = path.name
    reserved = {id_column, *ignore_columns} | ({group_column} if group_column else set())
    unknown = [c for c in columns if c not in reserved and c not in item_categories]
    problems = [
        f"column {c!r} is not an item of the bundle (known items: {', '.join(list(item_categories)[:8])}"
        f"{', ...' if len(item_categories) > 8 else ''}); pass --ignore-columns {c} to skip it"
        for c in unknown
    ]
    if problems:
        raise InputError(source, problems[:MAX_PROBLEMS], total=len(problems))
    present = [c for c in columns if c in item_categories]
    if not present:
        raise InputError(source, ["no column matches an item of the bundle"])
    ids, problems = _respondent_ids(table, id_column)
    parsed, code_problems = parse_codes(table, present)
    problems.extend(code_problems)
    for j, item in enumerate(present):
        k = item_categories[item]
        over = np.flatnonzero(parsed[:, j] >= k)
        for row in over[: max(0, MAX_PROBLEMS - len(problems))]:
            problems.append(
                f"{row_label(int(row), header)}, column {item!r}: category code {int(parsed[row, j])} is outside "
                f"the item's categories 0..{k - 1}"
            )
    if problems:
        raise InputError(source, problems[:MAX_PROBLEMS], total=len(problems))
    order = list(item_categories)
    responses = np.full((table.n_rows, len(order)), np.nan)
    for j, item in enumerate(present):
        responses[:, order.index(item)] = parsed[:, j]
    absent = [c for c in order if c not in present]
    notes = [f"bundle items with no column, scored as not administered: {', '.join(absent)}"] if absent else []
    return ResponseData(
        ids=tuple(ids),
        item_ids=tuple(order),
        responses=responses,
        n_categories=np.array([item_categories[c] for c in order], dtype=np.int64),
        models=tuple(MODEL_GRM if item_categories[c] > 2 else MODEL_2PL for c in order),
        groups=_group_labels(table, group_column, source),
        source=source,
        source_sha256=file_sha256(path),
        notes=tuple(notes),
        header_lines=header,
    )


def _categories_and_models(
    responses: FloatArray,
    item_ids: list[str],
    declared: dict[str, ItemSpec],
    header_lines: int,
    dichotomous_model: str,
) -> tuple[IntArray, tuple[str, ...], list[str]]:
    problems: list[str] = []
    n_categories = np.zeros(len(item_ids), dtype=np.int64)
    models: list[str] = []
    for j, item in enumerate(item_ids):
        column = responses[:, j]
        answered = column[~np.isnan(column)]
        spec = declared[item]
        if answered.size == 0:
            problems.append(f"item {item!r}: no respondent answered it")
            models.append(MODEL_2PL)
            continue
        top = int(answered.max())
        k = spec.n_categories if spec.n_categories is not None else max(top + 1, 2)
        if spec.n_categories is not None and top >= spec.n_categories:
            row = int(np.flatnonzero(column >= spec.n_categories)[0])
            problems.append(
                f"{row_label(row, header_lines)}, column {item!r}: category code {int(column[row])} is outside "
                f"the item's categories 0..{spec.n_categories - 1} (item spec)"
            )
        else:
            counts = np.bincount(answered.astype(np.int64), minlength=k)
            unseen = [c for c in range(k) if counts[c] == 0]
            # An item with a single observed category has no variance: the pipeline reports and
            # leaves it out. An unobserved category inside the range cannot be estimated.
            if unseen and np.count_nonzero(counts) > 1:
                problems.append(_unused_categories_problem(item, column, counts, header_lines))
        n_categories[j] = k
        model = spec.model or (dichotomous_model if k == 2 else MODEL_GRM)
        if model in (MODEL_2PL, MODEL_1PL) and k != 2:
            problems.append(f"item {item!r}: model {model} needs 2 categories, the data have {k}")
        models.append(model)
    return n_categories, tuple(models), problems


def _code_ranges(codes: list[int]) -> str:
    """``[0, 1, 2, 5, 7, 8]`` -> ``"0-2, 5, 7, 8"`` (runs of three or more as a range)."""
    runs: list[list[int]] = []
    for c in codes:
        if runs and c == runs[-1][-1] + 1:
            runs[-1].append(c)
        else:
            runs.append([c])
    parts: list[str] = []
    for run in runs:
        parts.extend([f"{run[0]}-{run[-1]}"] if len(run) >= 3 else map(str, run))
    return ", ".join(parts)


def _unused_categories_problem(item: str, column: FloatArray, counts: IntArray, header_lines: int) -> str:
    """Unused categories, or a code far above the rest that looks like a missing-data code (9, 99, ...)."""
    seen = [int(c) for c in np.flatnonzero(counts)]
    unseen = [c for c in range(counts.size) if counts[c] == 0]
    low_run = 0
    while low_run < counts.size and counts[low_run] > 0:
        low_run += 1
    outliers = [c for c in seen if c >= low_run]
    if low_run >= 2 and len(unseen) >= MISSING_CODE_GAP:
        rows = np.flatnonzero(np.isin(column, outliers))
        listed = ", ".join(row_label(int(r), header_lines) for r in rows[:3])
        more = f" and {rows.size - 3} more" if rows.size > 3 else ""
        return (
            f"item {item!r}: code {', '.join(map(str, outliers))} ({listed}{more}) lies far above the item's "
            f"other codes 0..{low_run - 1}: it looks like a missing-data code; leave such cells empty "
            "(empty = not administered) or recode them"
        )
    return (
        f"item {item!r}: category {_code_ranges(unseen)} has no responses (codes seen: {_code_ranges(seen)}); "
        "recode the item so its categories are 0..K-1 with every category used"
    )
