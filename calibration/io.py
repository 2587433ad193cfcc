"""Reading and writing files: the only module that touches the file system for data.

``read_responses`` turns a CSV or Parquet table (one row per respondent, an id
column, every other column an item, empty cell = not administered) into one
validated :class:`ResponseData`. Every problem is reported with its row, column
and value; up to ``MAX_PROBLEMS`` are listed at once so a user can fix a file in
one pass.
"""

from __future__ import annotations

import csv
import hashlib
import math
import os
import tempfile
from collections.abc import Sequence
from dataclasses import dataclass, field
from pathlib import Path
from typing import TYPE_CHECKING, Any

import numpy as np

from calibration.errors import InputError

if TYPE_CHECKING:
    import pandas as pd

from calibration.irt.models import MODEL_1PL, MODEL_2PL, MODEL_GRM, MODELS, FloatArray, IntArray

MAX_PROBLEMS = 12
# This many unused categories between the used low codes and a higher code mark that code as a
# likely missing-data code (9 on a 0..3 item leaves 5 unused, 99 leaves 95).
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
        return int(self.responses.shape[0])

    @property
    def n_items(self) -> int:
        return int(self.responses.shape[1])


def file_sha256(path: Path) -> str:
    digest = hashlib.sha256()
    with path.open("rb") as handle:
        for block in iter(lambda: handle.read(1 << 20), b""):
            digest.update(block)
    return digest.hexdigest()


# Delimiters a CSV header is checked for, in order of preference when counts tie.
DELIMITERS = (",", ";", "\t", "|")


def _is_parquet(path: Path) -> bool:
    return path.suffix.lower() in (".parquet", ".pq")


def _header_fields(path: Path) -> tuple[list[str], str]:
    """The header line's fields and the delimiter they were split on (the most frequent of DELIMITERS)."""
    with path.open(newline="", encoding="utf-8") as handle:
        line = handle.readline()
    delimiter = max(DELIMITERS, key=lambda d: (line.count(d), -DELIMITERS.index(d)))
    if line.count(delimiter) == 0:
        delimiter = ","
    return next(csv.reader([line], delimiter=delimiter), []), delimiter


def read_header(path: Path | str) -> list[str]:
    """The column names of a CSV or Parquet file, without reading its rows."""
    path = Path(path)
    _check_file(path)
    if _is_parquet(path):
        import pyarrow.parquet as pq

        return _unique_header(path, [str(c).strip() for c in pq.read_schema(path).names])
    try:
        return _unique_header(path, [c.strip() for c in _header_fields(path)[0]])
    except (UnicodeDecodeError, OSError) as exc:
        raise InputError(path.name, [f"cannot be read as CSV: {exc}"]) from exc


def _unique_header(path: Path, names: list[str]) -> list[str]:
    """The names, unless one repeats: it would be read as one column or renamed, so it is refused."""
    repeated = sorted({c for c in names if names.count(c) > 1})
    if repeated:
        raise InputError(path.name, [f"column {c!r} appears more than once in the header" for c in repeated])
    return names


def _check_file(path: Path) -> None:
    if not path.exists():
        raise InputError(str(path), ["file not found"])
    if path.stat().st_size == 0:
        raise InputError(path.name, ["the file is empty (no header, no respondents)"])


@dataclass(frozen=True)
class TextTable:
    """A file's cells as text columns (Arrow string arrays), as read; no cell converted yet.

    ``header_lines`` is 1 for CSV (the header line), 0 for Parquet, for row and line numbers
    in messages.
    """

    columns: list[str]
    cells: dict[str, Any]  # column -> pyarrow ChunkedArray of strings, no nulls
    n_rows: int
    header_lines: int

    def text(self, column: str) -> list[str]:
        """A column's cells with surrounding white space removed."""
        import pyarrow.compute as pc

        return pc.utf8_trim_whitespace(self.cells[column]).to_pylist()  # type: ignore[no-any-return]


def _read_table(path: Path) -> TextTable:
    """Read a CSV or Parquet file with every cell as text (Arrow, no Python object per cell).

    The CSV delimiter is taken from the header line (comma, semicolon, tab or bar,
    whichever occurs most), so a semicolon-delimited export reads as it is.
    """
    _check_file(path)
    import pyarrow as pa  # here, not at import: a missing file or a bad header answers without it

    if _is_parquet(path):
        return _read_parquet_text(path)
    import pyarrow.csv as pa_csv

    first, delimiter = _header_fields(path)
    names = _unique_header(path, [c.strip() for c in first])
    try:
        table = pa_csv.read_csv(
            path,
            parse_options=pa_csv.ParseOptions(delimiter=delimiter),
            convert_options=pa_csv.ConvertOptions(
                column_types={name: pa.string() for name in first}, strings_can_be_null=False
            ),
        )
    except (pa.ArrowInvalid, UnicodeDecodeError, OSError) as exc:
        raise InputError(path.name, [f"cannot be read as CSV: {_arrow_message(exc)}"]) from exc
    cells = {name.strip(): table.column(i) for i, name in enumerate(table.column_names)}
    return TextTable(names, cells, table.num_rows, 1)


def _arrow_message(exc: Exception) -> str:
    """Arrow's parse errors without the library's own prefix."""
    return str(exc).removeprefix("CSV parse error: ")


def _read_parquet_text(path: Path) -> TextTable:
    import pyarrow as pa
    import pyarrow.compute as pc
    import pyarrow.parquet as pq

    try:
        table = pq.read_table(path)
    except (pa.ArrowInvalid, OSError) as exc:
        raise InputError(path.name, [f"cannot be read as Parquet: {exc}"]) from exc
    cells = {}
    for name, column in zip(table.column_names, table.columns, strict=True):
        if pa.types.is_floating(column.type):
            # 3.0 from a float column is the code 3: drop an integral value's ".0".
            as_int = pc.cast(column, pa.int64(), safe=False)
            integral = pc.equal(pc.cast(as_int, column.type), column)
            column = pc.if_else(integral, pc.cast(as_int, pa.string()), pc.cast(column, pa.string()))
        elif not pa.types.is_string(column.type):
            column = pc.cast(column, pa.string())
        cells[str(name).strip()] = pc.fill_null(column, "")
    return TextTable([str(c).strip() for c in table.column_names], cells, table.num_rows, 0)


def _open_respondent_table(path: Path, id_column: str, group_column: str | None) -> TextTable:
    """Read a respondent table and check its header: unique columns, the id (and group) column, some rows.

    The header is checked before the rows are parsed, so a header problem answers at once.
    """
    _check_required_columns(path, read_header(path), id_column, group_column)
    table = _read_table(path)
    if table.n_rows == 0:
        raise InputError(path.name, ["the file has a header but no respondents"])
    return table


def _check_required_columns(path: Path, columns: list[str], id_column: str, group_column: str | None) -> None:
    if id_column not in columns:
        if len(columns) == 1:
            raise InputError(
                path.name,
                [
                    f"the header has a single column {columns[0]!r}: the file is not "
                    "delimited by a comma, semicolon, tab or bar; save it as CSV"
                ],
            )
        raise InputError(
            path.name,
            [f"no id column {id_column!r}; the columns are: {', '.join(columns)} (choose one with --id-column)"],
        )
    if group_column is not None and group_column not in columns:
        raise InputError(path.name, [f"no group column {group_column!r}; the columns are: {', '.join(columns)}"])


def row_label(index: int, header_lines: int) -> str:
    """1-based data row, and the file line for text files."""
    if header_lines:
        return f"row {index + 1} (line {index + 1 + header_lines})"
    return f"row {index + 1}"


def _rows(table: TextTable, columns: list[str]) -> list[dict[str, str]]:
    """A small table's rows as dicts of trimmed text ("" for a column the file does not have)."""
    present = {c: table.text(c) for c in columns if c in table.cells}
    return [{c: present[c][i] if c in present else "" for c in columns} for i in range(table.n_rows)]


def read_item_spec(path: Path) -> list[ItemSpec]:
    """Read an item spec CSV: columns ``item`` (required), ``model``, ``categories``, ``include``, ``label``."""
    table = _read_table(path)
    columns, header = table.columns, table.header_lines
    if "item" not in columns:
        raise InputError(path.name, [f"the item spec needs an 'item' column; found {', '.join(columns)}"])
    known = {"item", "model", "categories", "include", "label"}
    problems = [f"unknown column {c!r} (known: {', '.join(sorted(known))})" for c in columns if c not in known]
    specs: list[ItemSpec] = []
    seen: set[str] = set()
    for i, row in enumerate(_rows(table, list(known))):
        where = row_label(i, header)
        item = row["item"]
        if not item:
            problems.append(f"{where}: empty item id")
            continue
        if item in seen:
            problems.append(f"{where}: item {item!r} is listed twice")
        seen.add(item)
        model = row["model"].lower() or None
        if model is not None and model not in MODELS:
            problems.append(f"{where}, column 'model': {model!r} is not one of {', '.join(MODELS)}")
        raw_k = row["categories"]
        n_categories = None
        if raw_k:
            if not raw_k.isdigit() or int(raw_k) < 2:
                problems.append(f"{where}, column 'categories': {raw_k!r} is not a whole number >= 2")
            else:
                n_categories = int(raw_k)
        if model in (MODEL_2PL, MODEL_1PL) and n_categories not in (None, 2):
            problems.append(f"{where}: model {model} needs 2 categories, the spec says {n_categories}")
        include_raw = row["include"].lower()
        if include_raw not in ("", "yes", "no", "true", "false", "1", "0"):
            problems.append(f"{where}, column 'include': {include_raw!r} is not yes/no")
        include = include_raw not in ("no", "false", "0")
        specs.append(ItemSpec(item, model, n_categories, include, row["label"]))
    if problems:
        raise InputError(path.name, problems[:MAX_PROBLEMS], total=len(problems))
    return specs


def read_policy_overrides(path: Path) -> list[tuple[str, str, str, str]]:
    """Reviewer decisions: CSV columns ``item``, ``group``, ``status`` and ``note`` (all required).

    Returns (item, group, status, note) tuples; statuses and names are checked
    against the calibration by the pipeline, which knows the items and groups.
    """
    table = _read_table(path)
    needed = ["item", "group", "status", "note"]
    missing = [c for c in needed if c not in table.columns]
    if missing:
        raise InputError(
            path.name, [f"the policy override file needs columns {', '.join(needed)}; missing: {', '.join(missing)}"]
        )
    out, problems = [], []
    for i, row in enumerate(_rows(table, needed)):
        values = [row[c] for c in needed]
        empty = [c for c, v in zip(needed, values, strict=True) if not v]
        if empty:
            problems.append(f"{row_label(i, table.header_lines)}: empty {', '.join(empty)}")
            continue
        out.append((values[0], values[1], values[2].lower(), values[3]))
    if problems:
        raise InputError(path.name, problems[:MAX_PROBLEMS], total=len(problems))
    return out


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
    table = _open_respondent_table(path, id_column, group_column)
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
    table = _open_respondent_table(path, id_column, group_column)
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


def parse_codes(table: TextTable, columns: list[str]) -> tuple[FloatArray, list[str]]:
    """Text cells to float codes: empty = NaN, otherwise a whole number >= 0.

    Each column is converted by Arrow in one pass; only a column that fails is looked at
    cell by cell, to name its bad cells.
    """
    import pyarrow as pa
    import pyarrow.compute as pc

    out = np.full((table.n_rows, len(columns)), np.nan)
    bad_cells: list[tuple[int, int, str]] = []
    total_bad = 0
    for j, column in enumerate(columns):
        trimmed = pc.utf8_trim_whitespace(table.cells[column])
        missing = _numpy_view(pc.utf8_length(trimmed), np.int32) == 0
        # An empty cell becomes the text "nan" so that one cast converts the column; ``missing`` tells
        # it apart from a cell that really says "nan" (which is not a code).
        filled = pc.replace_substring_regex(trimmed, pattern="^$", replacement="nan")
        try:
            values = _numpy_view(pc.cast(filled, pa.float64()), np.float64).copy()
        except pa.ArrowInvalid:
            values = np.array([_code_or_nan(v) for v in filled.to_pylist()], dtype=np.float64)
        bad = ~missing & ~(np.isfinite(values) & (values >= 0) & (np.floor(values) == values))
        if bad.any():
            total_bad += int(bad.sum())
            texts = table.cells[column].to_pylist()
            bad_cells.extend((int(i), j, texts[i]) for i in np.flatnonzero(bad)[:MAX_PROBLEMS])
        out[:, j] = np.where(missing | bad, np.nan, values)
    problems = [
        f"{row_label(i, table.header_lines)}, column {columns[j]!r}: value {text!r} is not a category code "
        "(a whole number >= 0, or empty for not administered)"
        for i, j, text in sorted(bad_cells)[:MAX_PROBLEMS]
    ]
    if total_bad > len(problems):
        problems.append(f"... {total_bad - len(problems)} more cells like these")
    return out, problems


def _numpy_view(array: Any, dtype: type) -> np.ndarray:
    """The values of a null-free, fixed-width Arrow array as numpy, read from its data buffer.

    (``to_numpy`` would do, but it loads pandas, half a second of start-up for a CLI error.)
    """
    combined = array.combine_chunks() if hasattr(array, "combine_chunks") else array
    start = combined.offset
    return np.frombuffer(combined.buffers()[1], dtype=dtype, count=start + len(combined))[start:]


def _code_or_nan(text: str | None) -> float:
    try:
        return float(text) if text is not None else math.nan
    except ValueError:
        return math.nan


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


def current_umask() -> int:
    """The process's umask (read by setting it and putting it back)."""
    mask = os.umask(0)
    os.umask(mask)
    return mask


def write_csv_atomic(frame: pd.DataFrame, path: Path) -> None:
    """Write a table next to its destination and rename it into place (no half-written output)."""
    path = Path(path)
    path.parent.mkdir(parents=True, exist_ok=True)
    fd, tmp = tempfile.mkstemp(prefix=f".{path.name}.", suffix=".tmp", dir=path.parent)
    try:
        with os.fdopen(fd, "w", newline="", encoding="utf-8") as handle:
            frame.to_csv(handle, index=False, float_format="%.6f")
        os.chmod(tmp, 0o666 & ~current_umask())  # the temporary file is 0600; the output follows the umask
        os.replace(tmp, path)
    except BaseException:
        if os.path.exists(tmp):
            os.unlink(tmp)
        raise


def finite_or_none(value: float | None) -> float | None:
    """JSON has no NaN: missing statistics are written as null."""
    return None if value is None or not math.isfinite(value) else float(value)
