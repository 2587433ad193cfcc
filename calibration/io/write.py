"""Writing files: atomically (temporary file, then rename) with the permissions the umask allows."""

from __future__ import annotations

import math
import os
import tempfile
from pathlib import Path
from typing import TYPE_CHECKING

if TYPE_CHECKING:
    import pandas as pd


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
