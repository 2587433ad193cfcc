"""Response tables: read and validate for calibration or for scoring; categories and models per item."""

from __future__ import annotations

import hashlib
from collections.abc import Callable, Iterator, Sequence
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

import numpy as np

from calibration.errors import InputError
from calibration.io.tables import (
    MAX_PROBLEMS,
    CodesNotTyped,
    Partition,
    TextTable,
    as_text,
    check_required_columns,
    iter_tables,
    open_respondent_table,
    parse_codes,
    read_header,
    row_label,
)
from calibration.irt.models import MODEL_2PL, MODEL_GRM, RIGHT_WRONG_MODELS, FloatArray, IntArray

MISSING_CODE_GAP = 4


@dataclass(frozen=True)
class ItemSpec:
    """What a user declares about an item (all optional beyond the id)."""

    item: str
    model: str | None = None
    n_categories: int | None = None
    include: bool = True
    label: str = ""
    guessing: float | None = None  # a 3PL item's asymptote held at this value (None: estimated)


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
    held_guessing : dict of str to float
        3PL items whose asymptote the item spec holds at a known value (the rest are estimated).
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
    held_guessing: dict[str, float] = field(default_factory=dict)

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
    polytomous_model: str = MODEL_GRM,
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
    item_ids, declared, notes = select_items(columns, source, id_column, group_column, item_spec)
    trimmed, problems = trimmed_ids(table, id_column)
    ids = trimmed.to_pylist()
    duplicates = _duplicate_ids(trimmed, id_column, header)
    responses, code_problems, bad_cells = parse_codes(table, item_ids)
    problems += duplicates + code_problems
    if problems:
        total = len(problems) - len(code_problems) + bad_cells
        raise InputError(source, problems[:MAX_PROBLEMS], total=total)

    n_categories, models, category_problems = categories_and_models(
        category_counts(responses),
        item_ids,
        declared,
        (dichotomous_model, polytomous_model),
        _cells_of(responses, header),
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
        held_guessing={item: spec.guessing for item, spec in declared.items() if spec.guessing is not None},
    )


def select_items(
    columns: Sequence[str],
    source: str,
    id_column: str,
    group_column: str | None,
    item_spec: Sequence[ItemSpec] | None,
) -> tuple[list[str], dict[str, ItemSpec], list[str]]:
    """The item columns a calibration reads (every other column, or the spec's included items), what is
    declared about each, and notes on columns ignored or excluded; raises naming spec items with no column."""
    reserved = {id_column} | ({group_column} if group_column else set())
    notes: list[str] = []
    problems: list[str] = []
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
    return item_ids, declared, notes


def id_hashes(ids: Any) -> np.ndarray:
    """A 64-bit hash of each id (pandas' hash of the strings): kept instead of the ids to find repeats."""
    import pandas as pd

    return pd.util.hash_array(np.asarray(ids.to_numpy(zero_copy_only=False), dtype=object), categorize=False)


def repeated_hashes(hashes: Sequence[np.ndarray]) -> np.ndarray:
    """The hashes that occur more than once over all the arrays (their ids may still differ)."""
    every = np.sort(np.concatenate(hashes)) if hashes else np.zeros(0, dtype=np.uint64)
    return np.unique(every[1:][every[1:] == every[:-1]])


def _duplicate_ids(trimmed: Any, id_column: str, header_lines: int) -> list[str]:
    """Every repeat of an id (trimmed ids, as :func:`trimmed_ids` gives them), naming its row and the row
    it was first seen at (Arrow finds them; few are listed)."""
    import pyarrow as pa
    import pyarrow.compute as pc

    counts = pc.value_counts(trimmed)  # a chunked array is counted as it is (no combined copy of every id)
    repeated = pc.filter(counts.field("values"), pc.greater(counts.field("counts"), 1))
    repeated = pc.filter(repeated, pc.not_equal(repeated, ""))  # empty ids are reported as empty
    if len(repeated) == 0:
        return []
    if isinstance(trimmed, pa.ChunkedArray):
        trimmed = trimmed.combine_chunks()
    rows = pc.indices_nonzero(pc.is_in(trimmed, value_set=repeated)).to_pylist()
    values = pc.take(trimmed, pa.array(rows, type=pa.uint64())).to_pylist()
    first_row: dict[str, int] = {}
    problems = []
    for row, value in zip(rows, values, strict=True):
        if value in first_row:
            problems.append(
                f"{row_label(row, header_lines)}, column {id_column!r}: duplicate id {value!r} "
                f"(first seen at {row_label(first_row[value], header_lines)})"
            )
        first_row.setdefault(value, row)
    return problems


def trimmed_ids(table: TextTable, id_column: str) -> tuple[Any, list[str]]:
    """A table's ids as a trimmed Arrow string array; an empty id is a problem naming its row."""
    import pyarrow as pa
    import pyarrow.compute as pc

    ids = pc.utf8_trim_whitespace(as_text(table.cells[id_column]))
    if isinstance(ids, pa.ChunkedArray):
        ids = ids.combine_chunks()
    empty = pc.indices_nonzero(pc.equal(pc.utf8_length(ids), 0)).to_pylist()
    return ids, [f"{table.label(i)}, column {id_column!r}: empty respondent id" for i in empty]


def _group_problems(groups: list[str], table: TextTable, group_column: str, what: str = "group") -> list[str]:
    return [f"{table.label(i)}, column {group_column!r}: empty {what}" for i, g in enumerate(groups) if not g]


def _empty_group_advice(count: int, column: str, what: str = "group") -> list[str]:
    """What to do about rows without a group (or cohort): said once, after the rows are listed."""
    if count == 0:
        return []
    rows = "1 row has" if count == 1 else f"{count:,} rows have"
    why = "it decides which item parameters score them" if what == "group" else "cohorts go with every row or none"
    return [
        f"{rows} no {what} in column {column!r}: every respondent needs one ({why}); fill in the empty cells, or "
        "leave those rows out of the file"
    ]


def _group_labels(table: TextTable, group_column: str | None, source: str) -> tuple[str, ...] | None:
    if group_column is None:
        return None
    groups = table.text(group_column)
    problems = _group_problems(groups, table, group_column)
    if problems:
        advice = _empty_group_advice(len(problems), group_column)
        raise InputError(source, problems[:MAX_PROBLEMS], total=len(problems), advice=advice)
    return tuple(groups)


SCORING_BATCH_ROWS = 32_768
"""Rows per batch when a response file is read for scoring."""


@dataclass(frozen=True)
class ScoringBatch:
    """Rows of a response file, validated and aligned to the bundle's items (NaN = not administered)."""

    first_row: int
    ids: Any  # Arrow string array, trimmed
    groups: list[str] | None
    responses: FloatArray
    cohorts: list[str] | None = None
    texts: dict[str, list[str]] | None = None  # the other columns asked for, as trimmed text


class ScoringInput:
    """A response file opened for scoring: the header is checked at once, the rows are read in batches.

    Item columns must be items of the bundle (``item_categories`` maps each to its number of
    categories) and codes must lie within those categories. A column that is neither an item, the
    id, the group nor listed in ``ignore_columns`` is an error (a misspelt item would otherwise be
    silently unscored). Bundle items without a column count as not administered, with a note.
    :meth:`batches` yields valid batches in file order; once a problem is found it yields no more,
    reads on to count every problem and raises one :class:`InputError` at the end (duplicate ids
    are found at the end too), so a caller that writes its output under a temporary name loses
    nothing.
    """

    def __init__(  # noqa: PLR0913 - keyword-only options of the public reader
        self,
        path: Path | str,
        *,
        item_categories: dict[str, int],
        id_column: str = "id",
        group_column: str | None = None,
        ignore_columns: Sequence[str] = (),
        batch_rows: int = SCORING_BATCH_ROWS,
        cohort_column: str | None = None,
        partition: Partition | None = None,
        text_columns: Sequence[str] = (),
    ) -> None:
        self.path = Path(path)
        self.partition = partition
        self.source = self.path.name if partition is None else partition.describe(self.path)
        columns = read_header(self.path)
        check_required_columns(self.path, columns, id_column, group_column)
        if cohort_column is not None and cohort_column not in columns:
            raise InputError(
                self.source, [f"no cohort column {cohort_column!r}; the columns are: {', '.join(columns)}"]
            )
        missing = [c for c in text_columns if c not in columns]
        if missing:
            raise InputError(self.source, [f"no column {c!r}; the columns are: {', '.join(columns)}" for c in missing])
        self.text_columns = list(text_columns)
        reserved = {id_column, *ignore_columns, *text_columns} | {c for c in (group_column, cohort_column) if c}
        unknown = [c for c in columns if c not in reserved and c not in item_categories]
        problems = [
            f"column {c!r} is not an item of the bundle (known items: {', '.join(list(item_categories)[:8])}"
            f"{', ...' if len(item_categories) > 8 else ''}); pass --ignore-columns {c} to skip it"
            for c in unknown
        ]
        if problems:
            raise InputError(self.source, problems[:MAX_PROBLEMS], total=len(problems))
        self.present = [c for c in columns if c in item_categories]
        if not self.present:
            raise InputError(self.source, ["no column matches an item of the bundle"])
        self.item_ids = tuple(item_categories)
        self.n_categories = np.array([item_categories[c] for c in self.item_ids], dtype=np.int64)
        self.positions = np.array([self.item_ids.index(c) for c in self.present], dtype=np.int64)
        absent = [c for c in self.item_ids if c not in self.present]
        self.notes = [f"bundle items with no column, scored as not administered: {', '.join(absent)}"] if absent else []
        self.id_column, self.group_column, self.batch_rows = id_column, group_column, batch_rows
        self.cohort_column = cohort_column
        text = self.path.suffix.lower() not in (".parquet", ".pq")
        self.header_lines = 1 if text and partition is None else 0  # a CSV partition counts rows, not lines

    def batches(self) -> Iterator[ScoringBatch]:
        """Valid batches in file order; one InputError at the end if any row has a problem.

        A CSV file is first read with its item columns as small integers; a cell that is not one
        (or any other problem) sends the reader back to the start to read the file as text, which
        names every bad cell. Rows already yielded are not yielded again.
        """
        labels = [c for c in (self.group_column, self.cohort_column) if c]
        needed = [self.id_column, *labels, *self.text_columns, *self.present]
        typed = self.path.suffix.lower() not in (".parquet", ".pq")
        part = self.partition
        yielded = 0
        if typed:
            try:
                tables = iter_tables(self.path, self.batch_rows, codes=self.present, include=needed, partition=part)
                for batch in self._batches(tables):
                    yield batch
                    yielded += len(batch.ids)
                return
            except CodesNotTyped:
                pass
        tables = iter_tables(self.path, self.batch_rows, include=needed, partition=part)
        yield from self._batches(tables, skip=yielded, exact=True)

    def _batches(self, tables: Iterator[TextTable], *, skip: int = 0, exact: bool = False) -> Iterator[ScoringBatch]:
        """The batches of ``tables`` after the first ``skip`` rows; problems end in one InputError (``exact``)
        or in :class:`CodesNotTyped` (a typed read, whose bad cells the text read names)."""
        problems: list[str] = []
        total = empty_groups = empty_cohorts = 0
        id_chunks, hashes = [], []
        n_rows = 0
        for table in tables:
            n_rows += table.n_rows
            ids, batch_problems = trimmed_ids(table, self.id_column)
            id_chunks.append(ids)
            hashes.append(id_hashes(ids))
            groups = None if self.group_column is None else table.text(self.group_column)
            if groups is not None and self.group_column is not None:
                empty = _group_problems(groups, table, self.group_column)
                empty_groups += len(empty)
                batch_problems += empty
            cohorts = None if self.cohort_column is None else table.text(self.cohort_column)
            if cohorts is not None and self.cohort_column is not None:
                empty = _group_problems(cohorts, table, self.cohort_column, "cohort")
                empty_cohorts += len(empty)
                batch_problems += empty
            parsed, code_problems, bad_cells = parse_codes(table, self.present)
            range_problems, out_of_range = self._range_problems(parsed, table)
            total += len(batch_problems) + bad_cells + out_of_range
            if total and not exact:
                raise CodesNotTyped
            problems.extend((batch_problems + code_problems + range_problems)[: max(0, MAX_PROBLEMS - len(problems))])
            if total or n_rows <= skip:
                continue
            start = max(0, skip - table.first_row)
            responses = np.full((table.n_rows - start, len(self.item_ids)), np.nan)
            responses[:, self.positions] = parsed[start:]
            texts = {c: table.text(c)[start:] for c in self.text_columns} if self.text_columns else None
            yield ScoringBatch(
                table.first_row + start,
                ids.slice(start),
                None if groups is None else groups[start:],
                responses,
                None if cohorts is None else cohorts[start:],
                texts,
            )
        if n_rows == 0 and self.partition is None:
            raise InputError(self.source, ["the file has a header but no respondents"])
        import pyarrow as pa

        # Repeats are looked for by a 64-bit hash per id (counting every id by value held a table of all of
        # them: most of the peak memory of a large file); only a repeated hash has its ids compared.
        repeats = repeated_hashes(hashes).size > 0
        duplicates = _duplicate_ids(pa.chunked_array(id_chunks), self.id_column, self.header_lines) if repeats else []
        total += len(duplicates)
        problems.extend(duplicates[: max(0, MAX_PROBLEMS - len(problems))])
        if total:
            advice = [
                *_empty_group_advice(empty_groups, str(self.group_column)),
                *_empty_group_advice(empty_cohorts, str(self.cohort_column), "cohort"),
            ]
            raise InputError(self.source, problems, total=total, advice=advice)

    def _range_problems(self, parsed: FloatArray, table: TextTable) -> tuple[list[str], int]:
        limits = self.n_categories[self.positions]
        over = parsed >= limits[None, :]  # NaN compares False
        if not over.any():
            return [], 0
        problems = []
        for row, j in zip(*np.nonzero(over), strict=True):
            if len(problems) == MAX_PROBLEMS:
                break
            problems.append(
                f"{table.label(int(row))}, column {self.present[j]!r}: category code {int(parsed[row, j])} is outside "
                f"the item's categories 0..{limits[j] - 1}"
            )
        return problems, int(over.sum())


def read_for_scoring(
    path: Path | str,
    *,
    item_categories: dict[str, int],
    id_column: str = "id",
    group_column: str | None = None,
    ignore_columns: Sequence[str] = (),
) -> ResponseData:
    """Read a whole response table to score against known items (see :class:`ScoringInput`, which streams)."""
    opened = ScoringInput(
        path,
        item_categories=item_categories,
        id_column=id_column,
        group_column=group_column,
        ignore_columns=ignore_columns,
    )
    batches = list(opened.batches())
    groups = None if group_column is None else tuple(g for b in batches for g in (b.groups or []))
    return ResponseData(
        ids=tuple(i for b in batches for i in b.ids.to_pylist()),
        item_ids=opened.item_ids,
        responses=np.concatenate([b.responses for b in batches]),
        n_categories=opened.n_categories,
        models=tuple(MODEL_GRM if k > 2 else MODEL_2PL for k in opened.n_categories),
        groups=groups,
        source=opened.source,
        source_sha256=file_sha256(opened.path),
        notes=tuple(opened.notes),
        header_lines=opened.header_lines,
    )


CellLocator = Callable[[int, Sequence[int]], tuple[list[tuple[str, int]], int]]
"""``(item position, codes) -> (up to 3 (place, code) pairs where the item holds one of the codes, how many
cells hold them)``: a row of an in-memory table, or a partition of a file read on a cluster."""


def category_counts(responses: FloatArray) -> IntArray:
    """Answers per item and category code: (n_items, highest code + 1), zeros where nobody answered."""
    answered = ~np.isnan(responses)
    top = int(np.nanmax(responses)) + 1 if answered.any() else 1
    counts = np.zeros((responses.shape[1], top), dtype=np.int64)
    for j in range(responses.shape[1]):
        counts[j] = np.bincount(responses[answered[:, j], j].astype(np.int64), minlength=top)
    return counts


def _cells_of(responses: FloatArray, header_lines: int) -> CellLocator:
    """The rows of an in-memory table holding some codes of an item, as messages name them."""

    def locate(j: int, codes: Sequence[int]) -> tuple[list[tuple[str, int]], int]:
        column = responses[:, j]
        rows = np.flatnonzero(np.isin(column, codes))
        return [(row_label(int(r), header_lines), int(column[r])) for r in rows[:3]], int(rows.size)

    return locate


def categories_and_models(
    counts: IntArray,
    item_ids: Sequence[str],
    declared: dict[str, ItemSpec],
    defaults: tuple[str, str],
    locate: CellLocator,
) -> tuple[IntArray, tuple[str, ...], list[str]]:
    """Each item's categories and model (the spec's, else the default for right/wrong or polytomous items),
    from the answers per item and code (:func:`category_counts`, or their sum over a file's partitions)."""
    problems: list[str] = []
    n_categories = np.zeros(len(item_ids), dtype=np.int64)
    models: list[str] = []
    for j, item in enumerate(item_ids):
        seen = np.flatnonzero(counts[j])
        spec = declared[item]
        if seen.size == 0:
            problems.append(f"item {item!r}: no respondent answered it")
            models.append(MODEL_2PL)
            continue
        top = int(seen[-1])
        k = spec.n_categories if spec.n_categories is not None else max(top + 1, 2)
        if spec.n_categories is not None and top >= spec.n_categories:
            places, _ = locate(j, [int(c) for c in seen if c >= spec.n_categories])
            place, code = places[0]
            problems.append(
                f"{place}, column {item!r}: category code {code} is outside "
                f"the item's categories 0..{spec.n_categories - 1} (item spec)"
            )
        else:
            used = np.zeros(k, dtype=np.int64)
            used[: top + 1] = counts[j, : top + 1]
            # An item with a single observed category has no variance: the pipeline reports and
            # leaves it out. An unobserved category inside the range cannot be estimated.
            if np.count_nonzero(used) > 1 and (used == 0).any():
                problems.append(_unused_categories_problem(item, j, used, locate))
        n_categories[j] = k
        model = spec.model or (defaults[0] if k == 2 else defaults[1])
        if model in RIGHT_WRONG_MODELS and k != 2:
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


def _unused_categories_problem(item: str, j: int, counts: IntArray, locate: CellLocator) -> str:
    """Unused categories, or a code far above the rest that looks like a missing-data code (9, 99, ...)."""
    seen = [int(c) for c in np.flatnonzero(counts)]
    unseen = [c for c in range(counts.size) if counts[c] == 0]
    low_run = 0
    while low_run < counts.size and counts[low_run] > 0:
        low_run += 1
    outliers = [c for c in seen if c >= low_run]
    if low_run >= 2 and len(unseen) >= MISSING_CODE_GAP:
        places, total = locate(j, outliers)
        listed = ", ".join(place for place, _ in places)
        more = f" and {total - len(places)} more" if total > len(places) else ""
        return (
            f"item {item!r}: code {', '.join(map(str, outliers))} ({listed}{more}) lies far above the item's "
            f"other codes 0..{low_run - 1}: it looks like a missing-data code; leave such cells empty "
            "(empty = not administered) or recode them"
        )
    return (
        f"item {item!r}: category {_code_ranges(unseen)} has no responses (codes seen: {_code_ranges(seen)}); "
        "recode the item so its categories are 0..K-1 with every category used"
    )
