"""Writing files: atomically (temporary file, then rename) with the permissions the umask allows."""

from __future__ import annotations

import contextlib
import io
import math
import os
import tempfile
from collections.abc import Iterator, Sequence
from pathlib import Path
from typing import TYPE_CHECKING, Any, BinaryIO

import numpy as np

from calibration.irt.models import FloatArray

if TYPE_CHECKING:
    import pandas as pd


def current_umask() -> int:
    """The process's umask (read by setting it and putting it back)."""
    mask = os.umask(0)
    os.umask(mask)
    return mask


@contextlib.contextmanager
def atomic_output(path: Path) -> Iterator[BinaryIO]:
    """A binary file written next to ``path`` and renamed into place on success (removed on any error).

    Nothing is ever half-written at ``path``: a reader sees the old file or the whole new one.
    """
    path = Path(path)
    path.parent.mkdir(parents=True, exist_ok=True)
    fd, tmp = tempfile.mkstemp(prefix=f".{path.name}.", suffix=".tmp", dir=path.parent)
    try:
        with os.fdopen(fd, "wb") as handle:
            yield handle
        os.chmod(tmp, 0o666 & ~current_umask())  # the temporary file is 0600; the output follows the umask
        os.replace(tmp, path)
    except BaseException:
        if os.path.exists(tmp):
            os.unlink(tmp)
        raise


def write_csv_atomic(frame: pd.DataFrame, path: Path) -> None:
    """Write a table next to its destination and rename it into place (no half-written output)."""
    with atomic_output(path) as raw:
        handle = io.TextIOWrapper(raw, encoding="utf-8", newline="")
        frame.to_csv(handle, index=False, float_format="%.6f")
        handle.flush()
        handle.detach()  # the binary file stays open for atomic_output to close and rename


def csv_line(fields: Sequence[str]) -> bytes:
    """One CSV line (a header) with the quoting of :func:`csv_text`."""
    return (",".join(_quoted(f) for f in fields) + "\n").encode("utf-8")


def _quoted(text: str) -> str:
    return '"' + text.replace('"', '""') + '"' if any(c in text for c in ',"\r\n') else text


def csv_text(values: Any) -> Any:
    """Text cells for CSV: quoted only when they hold a comma, quote or line break (quotes doubled)."""
    import pyarrow as pa
    import pyarrow.compute as pc

    text = values if isinstance(values, pa.Array | pa.ChunkedArray) else pa.array(values, type=pa.string())
    needs = pc.match_substring_regex(text, pattern='[,"\r\n]')
    if not pc.any(needs).as_py():
        return text
    quoted = pc.binary_join_element_wise('"', pc.replace_substring(text, '"', '""'), '"', "")
    return pc.if_else(needs, quoted, text)


def fixed_decimals(values: FloatArray, decimals: int) -> Any:
    """Numbers as text with exactly ``decimals`` places (as ``f"{v:.{decimals}f}"``); empty where not finite.

    Vectorised: the value times ``10**decimals`` is rounded to an integer and split at the point; the
    rare value whose scaled form lies within 1e-6 of a half is formatted by Python instead, so every
    cell is the correctly rounded decimal.
    """
    import pyarrow as pa
    import pyarrow.compute as pc

    values = np.asarray(values, dtype=np.float64)
    finite = np.isfinite(values)
    safe = np.where(finite, values, 0.0)
    factor = 10**decimals
    scaled = np.abs(safe) * factor
    rounded = np.rint(scaled).astype(np.int64)
    digits = pc.utf8_lpad(pc.cast(pa.array(rounded), pa.string()), decimals + 1, "0")
    if decimals:
        digits = pc.binary_join_element_wise(
            pc.utf8_slice_codeunits(digits, 0, -decimals), pc.utf8_slice_codeunits(digits, -decimals), "."
        )
    negative = pa.array(np.signbit(safe))  # as Python prints it: -0.0001 to 2 places is "-0.00"
    text = pc.if_else(negative, pc.binary_join_element_wise("-", digits, ""), digits)
    close = np.flatnonzero(finite & (np.abs(scaled - np.floor(scaled) - 0.5) < 1e-6))
    if close.size:
        cells = text.to_pylist()
        for i in close.tolist():
            cells[i] = f"{values[i]:.{decimals}f}"
        text = pa.array(cells, type=pa.string())
    return pc.if_else(pa.array(finite), text, "")


def csv_rows(columns: Sequence[Any]) -> bytes:
    """CSV lines from equally long Arrow string columns (already formatted and quoted)."""
    import pyarrow.compute as pc

    if len(columns[0]) == 0:
        return b""
    lines = pc.binary_join_element_wise(*columns, ",")
    lines = pc.binary_join_element_wise(lines, "", "\n")
    if hasattr(lines, "combine_chunks"):
        lines = lines.combine_chunks()
    offsets = np.frombuffer(lines.buffers()[1], dtype=np.int32, count=len(lines) + 1 + lines.offset)[lines.offset :]
    return lines.buffers()[2].to_pybytes()[offsets[0] : offsets[-1]]


def finite_or_none(value: float | None) -> float | None:
    """JSON has no NaN: missing statistics are written as null."""
    return None if value is None or not math.isfinite(value) else float(value)
