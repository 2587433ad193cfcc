"""Tables as text: delimiter detection, CSV and Parquet read through Arrow, header checks, code parsing.

Cells stay text in Arrow arrays until one cast per column turns them into codes, so a bad cell
is named by its row, line and column.
"""

from __future__ import annotations

import csv
import math
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


def read_table(path: Path) -> TextTable:
    """Read a CSV or Parquet file with every cell as text (Arrow, no Python object per cell).

    The CSV delimiter is taken from the header line (comma, semicolon, tab or bar,
    whichever occurs most), so a semicolon-delimited export reads as it is.
    """
    check_file(path)
    import pyarrow as pa  # here, not at import: a missing file or a bad header answers without it

    if _is_parquet(path):
        return _read_parquet_text(path)
    import pyarrow.csv as pa_csv

    first, delimiter = header_fields(path)
    names = unique_header(path, [c.strip() for c in first])
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
