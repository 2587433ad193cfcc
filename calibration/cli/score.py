"""`equitheta score`: score a response file with a published bundle and write one row per respondent."""

from __future__ import annotations

import argparse
from pathlib import Path

import numpy as np
import pandas as pd

from calibration.bundle import Bundle, resolve
from calibration.bundle.scorer import BundleScorer, UnknownGroup
from calibration.cli import UsageError, store_from
from calibration.cli.console import error_console, out_console
from calibration.cli.render import CAUTION
from calibration.io import MAX_PROBLEMS, read_for_scoring, read_header, row_label, write_csv_atomic

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


def run_score(args: argparse.Namespace) -> int:
    """``equitheta score``: score a response file with a published bundle."""
    store = store_from(args.store)
    bundle = resolve(store, args.bundle)
    scorer = BundleScorer(bundle)
    ignore = [c.strip() for c in args.ignore_columns.split(",") if c.strip()]
    if args.group_column is None and scorer.default_group is None:
        raise UsageError(_missing_group_column(args.responses, bundle, scorer, args.id_column, ignore))
    data = read_for_scoring(
        args.responses,
        item_categories=scorer.item_categories,
        id_column=args.id_column,
        group_column=args.group_column,
        ignore_columns=ignore,
    )
    groups = None if data.groups is None else list(data.groups)
    try:
        frame = score_frame(
            scorer,
            data.responses,
            list(data.ids),
            groups,
            method=args.method,
            unknown_to_reference=args.unknown_group == "reference",
        )
    except UnknownGroup as exc:
        raise UsageError(_unknown_group_message(exc, data.ids, data.header_lines, args.group_column, scorer)) from exc
    write_csv_atomic(frame, args.out)
    for note in data.notes:
        error_console().print(f"note: {note}", highlight=False)
    _print_score_summary(frame, bundle, args.out)
    return 0


def _missing_group_column(path: Path, bundle: Bundle, scorer: BundleScorer, id_column: str, ignore: list[str]) -> str:
    columns = read_header(path)
    others = [c for c in columns if c != id_column and c not in scorer.item_categories and c not in ignore]
    hint = ""
    if others:
        hint = f"; the file's columns that are not items: {', '.join(others)}" + (
            f" (perhaps --group-column {others[0]})" if len(others) == 1 else ""
        )
    return (
        f"bundle {bundle.label} has groups ({', '.join(scorer.plans)}): name the column that holds each "
        f"respondent's group with --group-column{hint}"
    )


def _unknown_group_message(
    exc: UnknownGroup, ids: tuple[str, ...], header_lines: int, column: str | None, scorer: BundleScorer
) -> str:
    lines = [
        f"{row_label(i, header_lines)}, id {ids[i]!r}"
        + (f", column {column!r}: group {g!r} is not in the bundle" if g else ": no group given")
        for i, g in exc.problems[:MAX_PROBLEMS]
    ]
    more = f"\n  ... and {len(exc.problems) - MAX_PROBLEMS} more" if len(exc.problems) > MAX_PROBLEMS else ""
    return (
        f"{len(exc.problems)} respondent(s) with a group that bundle {scorer.bundle.label} does not know "
        f"(its groups: {', '.join(scorer.plans)}); fix the group column or pass --unknown-group reference to "
        "score them with the reference group's items\n" + "\n".join(f"  - {line}" for line in lines) + more
    )


def score_frame(
    scorer: BundleScorer,
    responses: np.ndarray,
    ids: list[str],
    groups: list[str] | None,
    *,
    method: str | None,
    unknown_to_reference: bool = False,
) -> pd.DataFrame:
    """The scored output table (the column names are an interface: keep them).

    Reporting-scale columns are written with the bundle's decimals (the SE with one more).
    """
    resolved = scorer.resolve_groups(groups, len(ids), unknown_to_reference=unknown_to_reference)
    result = scorer.score(responses, resolved, method=method)
    excluded = {g: ";".join(item for item, _ in scorer.excluded_for(g)) for g in scorer.plans}
    decimals = scorer.bundle.scoring.reporting_scale.decimals
    return pd.DataFrame(
        {
            "id": ids,
            "group": resolved,
            "theta": result.theta,
            "se": result.se,
            "scale_score": _fixed(result.scale_score, decimals),
            "scale_se": _fixed(result.scale_se, decimals + 1),
            "items_answered": result.n_answered,
            "method": result.method,
            "person_fit_lz_star": result.person_fit,
            "flags": [";".join(f) for f in result.flags],
            "excluded_items": [excluded[g] for g in resolved],
            "bundle": scorer.bundle.label,
        },
        columns=list(SCORE_COLUMNS),
    )


def _fixed(values: np.ndarray, decimals: int) -> list[str]:
    """Numbers as text with exactly ``decimals`` places; empty where there is none."""
    return ["" if not np.isfinite(v) else f"{v:.{decimals}f}" for v in values]


def _print_score_summary(frame: pd.DataFrame, bundle: Bundle, path: Path) -> None:
    console = out_console()
    ok = frame["theta"].notna()
    scale = pd.to_numeric(frame.loc[ok, "scale_score"])
    console.print(
        f"scored {len(frame)} respondents with {bundle.label} ({frame['method'].iloc[0]}) -> {path}", highlight=False
    )
    console.print(
        f"  theta mean {frame.loc[ok, 'theta'].mean():.3f}, SD {frame.loc[ok, 'theta'].std():.3f}; "
        f"median SE {frame.loc[ok, 'se'].median():.3f}; scale score mean {scale.mean():.1f}",
        highlight=False,
    )
    flagged = frame["flags"].str.len() > 0
    if flagged.any():
        counts = frame.loc[flagged, "flags"].str.split(";").explode().value_counts()
        console.print("  flags: " + ", ".join(f"{k} {v}" for k, v in counts.items()), highlight=False)
    console.print(f"  {CAUTION}", style="dim", highlight=False)
