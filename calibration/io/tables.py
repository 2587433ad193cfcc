"""Tables as text: delimiter detection, CSV and Parquet read through Arrow, header checks, code parsing.

Cells stay text in Arrow arrays until one cast per column turns them into codes, so a bad cell
is named by its row, line and column.
"""

from __future__ import annotations

import csv
import math
from collections.abc import Iterator, Sequence
from dataclasses import dataclass
from pathlib import Path
from typing import TYPE_CHECKING, Any

import numpy as np

from calibration.errors import InputError

if TYPE_CHECKING:
    pass

from calibration.irt.models import FloatArray

MAX_PROBLEMS = 12


DELIMITERS = (",", ";", "\t", "|")


def _is_parquet(path: Path) -> bool:
    return path.suffix.lower() in (".parquet", ".pq")


def header_fields(path: Path) -> tuple[list[str], str]:
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
    check_file(path)
    if _is_parquet(path):
        import pyarrow.parquet as pq

        return unique_header(path, [str(c).strip() for c in pq.read_schema(path).names])
    try:
        return unique_header(path, [c.strip() for c in header_fields(path)[0]])
    except (UnicodeDecodeError, OSError) as exc:
        raise InputError(path.name, [f"cannot be read as CSV: {exc}"]) from exc


def unique_header(path: Path, names: list[str]) -> list[str]:
    """The names, unless one repeats: it would be read as one column or renamed, so it is refused."""
    repeated = sorted({c for c in names if names.count(c) > 1})
    if repeated:
        raise InputError(path.name, [f"column {c!r} appears more than once in the header" for c in repeated])
    return names


def check_file(path: Path) -> None:
    """Refuse a path that is missing, a directory or empty, naming it."""
    if not path.exists():
        raise InputError(str(path), ["file not found"])
    if path.stat().st_size == 0:
        raise InputError(path.name, ["the file is empty (no header, no respondents)"])


@dataclass(frozen=True)
class TextTable:
    """A file's cells as read (Arrow arrays: text for CSV, the stored types for Parquet); no cell converted yet.

    Empty CSV cells are nulls. ``header_lines`` is 1 for CSV (the header line), 0 for Parquet;
    ``first_row`` is the 0-based row of the table's first row in its file (a batch of a larger
    file starts later): both are for row and line numbers in messages.
    """

    columns: list[str]
    cells: dict[str, Any]  # column -> pyarrow (Chunked)Array
    n_rows: int
    header_lines: int
    first_row: int = 0

    def text(self, column: str) -> list[str]:
        """A column's cells as text with surrounding white space removed ("" for an empty cell)."""
        import pyarrow.compute as pc

        return pc.utf8_trim_whitespace(as_text(self.cells[column])).to_pylist()  # type: ignore[no-any-return]

    def label(self, index: int) -> str:
        """The row and line label of the table's row ``index`` in its file."""
        return row_label(self.first_row + index, self.header_lines)


def as_text(column: Any) -> Any:
    """Cells as an Arrow string array without nulls: a float's integral value loses its ".0"."""
    import pyarrow as pa
    import pyarrow.compute as pc

    if pa.types.is_floating(column.type):
        # 3.0 from a float column is the code 3: drop an integral value's ".0".
        as_int = pc.cast(column, pa.int64(), safe=False)
        integral = pc.equal(pc.cast(as_int, column.type), column)
        column = pc.if_else(integral, pc.cast(as_int, pa.string()), pc.cast(column, pa.string()))
    elif not pa.types.is_string(column.type):
        column = pc.cast(column, pa.string())
    return pc.fill_null(column, "")


class CodesNotTyped(Exception):  # noqa: N818 - a signal, not an error a user sees
    """A CSV file's code columns did not all read as small whole numbers: read the file as text instead."""


def _csv_options(
    path: Path, *, codes: Sequence[str] = (), include: Sequence[str] | None = None
) -> tuple[list[str], Any, Any]:
    """The columns read, and Arrow's parse and convert options: text columns, empty cells null.

    ``codes`` columns are read as small integers (one pass, no text); ``include`` limits the
    columns read (in that order).
    """
    import pyarrow as pa
    import pyarrow.csv as pa_csv

    first, delimiter = header_fields(path)
    names = unique_header(path, [c.strip() for c in first])
    raw = dict(zip(names, first, strict=True))
    wanted = set(codes)
    convert = pa_csv.ConvertOptions(
        column_types={raw[name]: pa.int8() if name in wanted else pa.string() for name in names},
        strings_can_be_null=True,
        null_values=[""],
        include_columns=[raw[c] for c in include] if include else [],
    )
    return list(include) if include else names, pa_csv.ParseOptions(delimiter=delimiter), convert


def read_table(path: Path) -> TextTable:
    """Read a CSV or Parquet file whole, no cell converted (Arrow, no Python object per cell).

    The CSV delimiter is taken from the header line (comma, semicolon, tab or bar,
    whichever occurs most), so a semicolon-delimited export reads as it is.
    """
    check_file(path)
    import pyarrow as pa  # here, not at import: a missing file or a bad header answers without it

    if _is_parquet(path):
        import pyarrow.parquet as pq

        try:
            table = pq.read_table(path)
        except (pa.ArrowInvalid, OSError) as exc:
            raise InputError(path.name, [f"cannot be read as Parquet: {exc}"]) from exc
        return _parquet_table(table, 0)
    import pyarrow.csv as pa_csv

    names, parse, convert = _csv_options(path)
    try:
        table = pa_csv.read_csv(path, parse_options=parse, convert_options=convert)
    except (pa.ArrowInvalid, UnicodeDecodeError, OSError) as exc:
        raise InputError(path.name, [f"cannot be read as CSV: {_arrow_message(exc)}"]) from exc
    return TextTable(names, dict(zip(names, table.columns, strict=True)), table.num_rows, 1)


@dataclass(frozen=True)
class Partition:
    """The slice of a response file that one task of a distributed job reads.

    CSV: the bytes ``start .. stop`` of the file (whole lines after the header; the header is read
    again for each part). Parquet: the row groups ``start .. stop``, whose first row is ``first_row``
    of the file. ``index`` counts from 0 of ``count`` partitions.
    """

    index: int
    count: int
    start: int
    stop: int
    first_row: int = 0

    def describe(self, path: Path) -> str:
        """How messages name the partition: the file, its place, and the bytes or row groups it holds."""
        what = (
            f"row groups {self.start}-{self.stop - 1}"
            if _is_parquet(path)
            else f"bytes {self.start}-{self.stop - 1}; rows counted from the partition's start"
        )
        return f"{path.name}, partition {self.index + 1} of {self.count} ({what})"


PARTITION_BYTES = 64 << 20
"""CSV text per partition of a distributed job (about 1.5 million rows of 40 items)."""
PARTITION_ROWS = 1_000_000
"""Parquet rows per partition of a distributed job (whole row groups; at least one per partition)."""


def plan_partitions(
    path: Path, *, partition_bytes: int = PARTITION_BYTES, partition_rows: int = PARTITION_ROWS
) -> list[Partition]:
    """Split a response file into partitions of whole lines (CSV) or whole row groups (Parquet).

    CSV boundaries are found by seeking to each multiple of ``partition_bytes`` and moving on to the
    next line break, so a quoted cell that holds a line break must not straddle one (response files
    have none). Only the file's metadata (Parquet) or a few bytes per boundary (CSV) are read.
    """
    check_file(path)
    if _is_parquet(path):
        import pyarrow as pa
        import pyarrow.parquet as pq

        try:
            meta = pq.ParquetFile(path).metadata
        except (pa.ArrowInvalid, OSError) as exc:
            raise InputError(path.name, [f"cannot be read as Parquet: {exc}"]) from exc
        sizes = [meta.row_group(g).num_rows for g in range(meta.num_row_groups)]
        starts, rows = [0], 0
        for g, n in enumerate(sizes):
            rows += n
            if rows >= partition_rows and g + 1 < len(sizes):
                starts.append(g + 1)
                rows = 0
        offsets = np.cumsum([0, *sizes])
        bounds = [*starts, len(sizes)]
        return [
            Partition(i, len(starts), bounds[i], bounds[i + 1], int(offsets[bounds[i]])) for i in range(len(starts))
        ]
    size = path.stat().st_size
    with path.open("rb") as handle:
        handle.readline()
        body = handle.tell()
        cuts = [body]
        position = body + partition_bytes
        while position < size:
            handle.seek(position)
            handle.readline()  # on to the end of the line the cut falls in
            cut = handle.tell()
            if cut >= size:
                break
            if cut > cuts[-1]:
                cuts.append(cut)
            position = cut + partition_bytes
    bounds = [*cuts, size]
    return [Partition(i, len(cuts), bounds[i], bounds[i + 1]) for i in range(len(cuts))]


def _partition_bytes(path: Path, partition: Partition) -> bytes:
    """The header line and the partition's lines of a CSV file."""
    with path.open("rb") as handle:
        header = handle.readline()
        handle.seek(partition.start)
        return header + handle.read(partition.stop - partition.start)


def iter_tables(
    path: Path,
    batch_rows: int,
    *,
    codes: Sequence[str] = (),
    include: Sequence[str] | None = None,
    partition: Partition | None = None,
) -> Iterator[TextTable]:
    """Read a CSV or Parquet file in batches of about ``batch_rows`` rows (memory flat in the file's length).

    ``include`` limits the columns read. CSV ``codes`` columns are read as small integers; if any
    cell of them is not one, :class:`CodesNotTyped` is raised and the caller reads the file again
    as text (which names the bad cells). Parquet columns keep their stored types. With ``partition``
    only that slice is read: a Parquet partition's rows keep their numbers in the file, a CSV
    partition's are counted from its start (its tables have no header line to count).
    """
    check_file(path)
    import pyarrow as pa

    first_row = 0 if partition is None else partition.first_row
    if _is_parquet(path):
        import pyarrow.parquet as pq

        try:
            parquet = pq.ParquetFile(path)
            stored = {str(n).strip(): str(n) for n in parquet.schema_arrow.names}  # names as stored (untrimmed)
            columns = [stored[c] for c in include] if include else None
            groups = None if partition is None else list(range(partition.start, partition.stop))
            batches = parquet.iter_batches(batch_size=batch_rows, columns=columns, row_groups=groups)
            for batch in batches:
                yield _parquet_table(batch, first_row)
                first_row += batch.num_rows
        except (pa.ArrowInvalid, OSError) as exc:
            raise InputError(path.name, [f"cannot be read as Parquet: {exc}"]) from exc
        return
    import io

    import pyarrow.csv as pa_csv

    names, parse, convert = _csv_options(path, codes=codes, include=include)
    read = pa_csv.ReadOptions(block_size=_block_bytes(path, batch_rows))
    source: Any = path if partition is None else io.BytesIO(_partition_bytes(path, partition))
    header_lines = 1 if partition is None else 0
    try:
        reader = pa_csv.open_csv(source, read_options=read, parse_options=parse, convert_options=convert)
        for batch in reader:
            columns = dict(zip(names, batch.columns, strict=True))
            yield TextTable(names, columns, batch.num_rows, header_lines, first_row)
            first_row += batch.num_rows
    except (pa.ArrowInvalid, UnicodeDecodeError, OSError) as exc:
        if codes:
            raise CodesNotTyped from exc
        raise InputError(path.name, [f"cannot be read as CSV: {_arrow_message(exc)}"]) from exc


def _block_bytes(path: Path, batch_rows: int) -> int:
    """Bytes of CSV text that hold about ``batch_rows`` rows, judged from the file's first 64 kB.

    At least four times the longest line seen there (a row must not straddle more than two blocks).
    """
    with path.open("rb") as handle:
        sample = handle.read(1 << 16)
    lines = sample.split(b"\n")
    average = len(sample) / max(len(lines) - 1, 1)
    return int(np.clip(batch_rows * average, max(4 * max(len(line) for line in lines), 64), 1 << 26))


def _arrow_message(exc: Exception) -> str:
    """Arrow's parse errors without the library's own prefix."""
    return str(exc).removeprefix("CSV parse error: ")


def _parquet_table(table: Any, first_row: int) -> TextTable:
    names = [str(c).strip() for c in table.column_names]
    return TextTable(names, dict(zip(names, table.columns, strict=True)), table.num_rows, 0, first_row)


def open_respondent_table(path: Path, id_column: str, group_column: str | None) -> TextTable:
    """Read a respondent table and check its header: unique columns, the id (and group) column, some rows.

    The header is checked before the rows are parsed, so a header problem answers at once.
    """
    check_required_columns(path, read_header(path), id_column, group_column)
    table = read_table(path)
    if table.n_rows == 0:
        raise InputError(path.name, ["the file has a header but no respondents"])
    return table


def check_required_columns(path: Path, columns: list[str], id_column: str, group_column: str | None) -> None:
    """Refuse a table without its id (or group) column, naming the columns it has."""
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


def table_rows(table: TextTable, columns: list[str]) -> list[dict[str, str]]:
    """A small table's rows as dicts of trimmed text ("" for a column the file does not have)."""
    present = {c: table.text(c) for c in columns if c in table.cells}
    return [{c: present[c][i] if c in present else "" for c in columns} for i in range(table.n_rows)]


def parse_codes(table: TextTable, columns: list[str]) -> tuple[FloatArray, list[str], int]:
    """Cells to float codes: empty = NaN, otherwise a whole number >= 0.

    Returns the codes, up to MAX_PROBLEMS messages and the number of bad cells. A column is
    converted by Arrow in one pass (integer Parquet columns are read as they are); only a column
    that fails is looked at cell by cell, to name its bad cells.
    """
    out = np.empty((table.n_rows, len(columns)))
    bad_cells: list[tuple[int, int, str]] = []
    total_bad = 0
    for j, column in enumerate(columns):
        codes = _valid_codes(table.cells[column])
        if codes is not None:
            out[:, j] = codes
            continue
        values, bad, texts = _codes_cell_by_cell(table.cells[column])
        total_bad += int(bad.sum())
        bad_cells.extend((int(i), j, texts[i]) for i in np.flatnonzero(bad)[:MAX_PROBLEMS])
        out[:, j] = values
    problems = [
        f"{table.label(i)}, column {columns[j]!r}: value {text!r} is not a category code "
        "(a whole number >= 0, or empty for not administered)"
        for i, j, text in sorted(bad_cells)[:MAX_PROBLEMS]
    ]
    return out, problems, total_bad


def _valid_codes(column: Any) -> FloatArray | None:
    """A column's codes as float64 (NaN where empty) when every cell is one, else None (one Arrow cast)."""
    import pyarrow as pa
    import pyarrow.compute as pc

    kind = column.type
    try:
        if pa.types.is_string(kind):
            column = pc.cast(column, pa.int32())
        elif not (pa.types.is_integer(kind) or pa.types.is_floating(kind)):
            return None
        values = _numpy_view(pc.fill_null(pc.cast(column, pa.float64()), math.nan), np.float64)
    except (pa.ArrowInvalid, pa.ArrowNotImplementedError):
        return None
    answered = ~np.isnan(values)
    if pa.types.is_floating(kind) and (pc.sum(pc.is_nan(column)).as_py() or 0) > 0:
        return None  # a stored NaN (not an empty cell) is not a code
    if np.any(values[answered] < 0) or np.any(np.floor(values[answered]) != values[answered]):
        return None
    return values


def _codes_cell_by_cell(column: Any) -> tuple[FloatArray, np.ndarray, list[str]]:
    """Codes (NaN where empty or bad), the bad cells and the cells' text, for a column that failed the cast."""
    import pyarrow as pa
    import pyarrow.compute as pc

    text = as_text(column)
    trimmed = pc.utf8_trim_whitespace(text)
    missing = _numpy_view(pc.utf8_length(trimmed), np.int32) == 0
    # An empty cell becomes the text "nan" so that one cast converts the column; ``missing`` tells
    # it apart from a cell that really says "nan" (which is not a code).
    filled = pc.replace_substring_regex(trimmed, pattern="^$", replacement="nan")
    try:
        values = _numpy_view(pc.cast(filled, pa.float64()), np.float64).copy()
    except pa.ArrowInvalid:
        values = np.array([_code_or_nan(v) for v in filled.to_pylist()], dtype=np.float64)
    bad = ~missing & ~(np.isfinite(values) & (values >= 0) & (np.floor(values) == values))
    return np.where(missing | bad, np.nan, values), bad, text.to_pylist()


def _numpy_view(array: Any, dtype: type) -> np.ndarray:
    """The values of a null-free, fixed-width Arrow array as numpy, read from its data buffer (read-only).

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
