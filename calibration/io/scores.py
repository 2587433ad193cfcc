"""Scored rows as written: the output columns of `equitheta score`, as CSV text or an Arrow table."""

from __future__ import annotations

from typing import Any

from calibration.bundle.scorer import BundleScorer, ScoredBatch, group_codes
from calibration.io.write import csv_rows, csv_text, fixed_decimals

# The output columns, in order (an interface: keep the names).
SCORE_COLUMNS = (
    "id",
    "group",
    "theta",
    "se",
    "scale_score",
    "scale_se",
    "items_answered",
    "method",
    "person_fit_lz_star",
    "flags",
    "excluded_items",
    "bundle",
)


def score_rows(scorer: BundleScorer, ids: Any, groups: tuple[str, ...], result: ScoredBatch) -> bytes:
    """The scored rows as CSV lines in SCORE_COLUMNS order (the column names are an interface: keep them).

    Theta, SE and person fit with 6 decimals; reporting-scale columns with the bundle's decimals (the
    SE with one more); empty where there is no value.
    """
    import pyarrow as pa
    import pyarrow.compute as pc

    n = len(ids)
    decimals = scorer.bundle.scoring.reporting_scale.decimals
    names, which = group_codes(groups)
    positions = pa.array(which)
    excluded = [";".join(item for item, _ in scorer.excluded_for(g)) for g in names]

    def per_group(texts: list[str]) -> Any:
        return pc.take(csv_text(pa.array(texts, type=pa.string())), positions)

    def repeated(text: str) -> Any:
        return csv_text(pa.repeat(pa.scalar(text, type=pa.string()), n))

    flags = [";".join(f) for f in result.flags] if any(result.flags) else pa.repeat(pa.scalar("", type=pa.string()), n)
    columns = [
        csv_text(ids),
        per_group(names),
        fixed_decimals(result.theta, 6),
        fixed_decimals(result.se, 6),
        fixed_decimals(result.scale_score, decimals),
        fixed_decimals(result.scale_se, decimals + 1),
        pc.cast(pa.array(result.n_answered), pa.string()),
        repeated(result.method),
        fixed_decimals(result.person_fit, 6),
        csv_text(flags),
        per_group(excluded),
        repeated(scorer.bundle.label),
    ]
    return csv_rows(columns)


def score_table(scorer: BundleScorer, ids: Any, groups: tuple[str, ...], result: ScoredBatch) -> Any:
    """The scored rows as an Arrow table with the SCORE_COLUMNS (numbers as numbers, empty as null).

    The same values as :func:`score_rows` before they are printed: theta, SE and person fit as
    computed; the reporting-scale score and SE rounded as the CSV prints them.
    """
    import numpy as np
    import pyarrow as pa

    decimals = scorer.bundle.scoring.reporting_scale.decimals
    names, which = group_codes(groups)
    excluded = [";".join(item for item, _ in scorer.excluded_for(g)) for g in names]

    def numbers(values: Any, digits: int | None = None) -> Any:
        values = np.asarray(values, dtype=np.float64)
        if digits is not None:
            values = np.round(values, digits)
        return pa.array(values, mask=~np.isfinite(values))

    n = len(ids)
    return pa.table(
        {
            "id": (ids if isinstance(ids, pa.Array | pa.ChunkedArray) else pa.array(ids)).cast(pa.string()),
            "group": pa.array([names[i] for i in which], type=pa.string()),
            "theta": numbers(result.theta),
            "se": numbers(result.se),
            "scale_score": numbers(result.scale_score, decimals),
            "scale_se": numbers(result.scale_se, decimals + 1),
            "items_answered": pa.array(np.asarray(result.n_answered, dtype=np.int64)),
            "method": pa.array([result.method] * n, type=pa.string()),
            "person_fit_lz_star": numbers(result.person_fit),
            "flags": pa.array([";".join(f) for f in result.flags] if any(result.flags) else [""] * n),
            "excluded_items": pa.array([excluded[i] for i in which], type=pa.string()),
            "bundle": pa.array([scorer.bundle.label] * n, type=pa.string()),
        }
    )
