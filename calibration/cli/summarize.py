"""`equitheta summarize`: group (and cohort) summaries of a response file from plausible values."""

from __future__ import annotations

import argparse
from pathlib import Path

import numpy as np
import pandas as pd

from calibration.bundle import resolve
from calibration.bundle.scorer import BundleScorer, UnknownGroup
from calibration.bundle.summaries import GroupSummaries, summarize_groups
from calibration.cli import UsageError, ignored_columns, store_from
from calibration.cli.console import dash, error_console, new_table, out_console
from calibration.io import ScoringInput, write_csv_atomic


def differences_path(out: Path) -> Path:
    """Where the differences of a summary written to ``out`` go."""
    return out.with_name(f"{out.stem}_differences{out.suffix or '.csv'}")


def run_summarize(args: argparse.Namespace) -> int:
    """``equitheta summarize``: read the file, score each group on its items, summarise with plausible values."""
    store = store_from(args.store)
    scorer = BundleScorer(resolve(store, args.bundle))
    ignore = ignored_columns(args.ignore_columns)
    opened = ScoringInput(
        args.responses,
        item_categories=scorer.item_categories,
        id_column=args.id_column,
        group_column=args.group_column,
        cohort_column=args.cohort_column,
        ignore_columns=ignore,
    )
    batches = list(opened.batches())
    responses = np.concatenate([b.responses for b in batches])
    labels = [g for b in batches for g in (b.groups or [])]
    cohorts = None if args.cohort_column is None else [c for b in batches for c in (b.cohorts or [])]
    if scorer.default_group is not None:  # one bundle group: the column holds any reporting groups
        scored_as = [scorer.default_group] * len(labels)
    else:
        try:
            scored_as = list(scorer.resolve_groups(labels, len(labels)))
        except UnknownGroup as exc:
            raise UsageError(
                f"{opened.source}: column {args.group_column!r} must hold the groups of bundle {scorer.bundle.label} "
                f"({', '.join(scorer.plans)}), whose item policy scores each respondent: {exc}"
            ) from exc
    result = summarize_groups(
        scorer,
        responses,
        labels,
        scored_as=scored_as,
        cohorts=cohorts,
        draws=args.plausible_values,
        seed=args.seed,
        percentiles=args.percentiles,
    )
    write_summaries(result, args.out)
    for note in opened.notes:
        error_console().print(f"note: {note}", highlight=False)
    print_summaries(result, args.out)
    return 0


def write_summaries(result: GroupSummaries, out: Path) -> None:
    """The cells to ``out`` and the differences beside it (each written whole, then renamed into place)."""
    cells = pd.DataFrame(
        [
            {
                **cell.model_dump(exclude={"percentiles"}),
                **cell.percentiles,
                "bundle": result.bundle,
                "plausible_values": result.draws,
                "seed": result.seed,
            }
            for cell in result.cells
        ]
    )
    write_csv_atomic(cells, out)
    write_csv_atomic(pd.DataFrame([d.model_dump() for d in result.differences]), differences_path(out))


def _cell(group: str, cohort: str | None) -> str:
    return group if cohort is None else f"{group} / {cohort}"


def print_summaries(result: GroupSummaries, out: Path) -> None:
    """The cells and the differences as tables, the warnings, the method and the caution."""
    console = out_console()
    console.print(
        f"{result.bundle}: {sum(c.n for c in result.cells)} respondents, {result.draws} plausible values each "
        f"(seed {result.seed})" + (f"; {result.left_out} without any answer left out" if result.left_out else ""),
        highlight=False,
    )
    percentiles = list(result.cells[0].percentiles) if result.cells else []
    table = new_table(
        "groups (theta, the bundle's scale; SE and 95% interval by Rubin's rules)",
        ["group", "n", "items", "mean (SE)", "95% interval", "SD (SE)", *percentiles],
        right=("n", "items"),
    )
    for c in result.cells:
        table.add_row(
            _cell(c.group, c.cohort),
            str(c.n),
            str(c.items_scored),
            f"{c.mean:.3f} ({c.se:.3f})",
            f"{c.ci_low:.3f} to {c.ci_high:.3f}",
            f"{c.sd:.3f} ({c.sd_se:.3f})",
            *(f"{c.percentiles[p]:.3f}" for p in percentiles),
        )
    console.print(table)
    if result.differences:
        table = new_table(
            "differences of means (first minus second)",
            ["group", "versus", "difference (SE)", "95% interval", "standardized", "df"],
        )
        for d in result.differences:
            table.add_row(
                _cell(d.group, d.cohort),
                _cell(d.versus_group, d.versus_cohort),
                f"{d.difference:+.3f} ({d.se:.3f})",
                f"{d.ci_low:+.3f} to {d.ci_high:+.3f}",
                f"{d.standardized:+.2f}",
                dash(d.df, ".0f"),
            )
        console.print(table)
    for warning in result.warnings:
        console.print(f"  warning: {warning}", highlight=False)
    console.print(f"  method: {result.method}", highlight=False)
    console.print(f"  {result.caution}", highlight=False)
    console.print(f"written: {out} and {differences_path(out)}", highlight=False)
