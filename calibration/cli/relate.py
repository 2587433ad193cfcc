"""`equitheta relate`: correlations of the scores with other measures, by group (validity evidence)."""

from __future__ import annotations

import argparse
from pathlib import Path

import numpy as np
import pandas as pd

from calibration.bundle import resolve
from calibration.bundle.relations import EXPECTATIONS, Relations, relate_measures
from calibration.bundle.scorer import BundleScorer, UnknownGroup
from calibration.cli import UsageError, ignored_columns, store_from
from calibration.cli.console import dash, error_console, new_table, out_console
from calibration.cli.score import missing_group_column
from calibration.errors import InputError
from calibration.io import MAX_PROBLEMS, ScoringInput, row_label, write_csv_atomic


def groups_path(out: Path) -> Path:
    """Where the equal-correlation tests of a relation table written to ``out`` go."""
    return out.with_name(f"{out.stem}_groups{out.suffix or '.csv'}")


def _options(args: argparse.Namespace) -> tuple[dict[str, float], dict[str, str]]:
    """The reliabilities and expectations, checked against the measures named."""
    problems, reliabilities, expectations = [], {}, {}
    for text in args.reliability:
        column, _, value = text.partition("=")
        try:
            number = float(value)
        except ValueError:
            number = float("nan")
        if column not in args.measure or not 0 < number <= 1:
            problems.append(
                f"--reliability {text!r}: give MEASURE=VALUE with a measure named by --measure and 0 < VALUE <= 1"
            )
            continue
        reliabilities[column] = number
    for text in args.expect:
        column, _, word = text.partition(":")
        if column not in args.measure or word not in EXPECTATIONS:
            problems.append(
                f"--expect {text!r}: give MEASURE:{'|'.join(EXPECTATIONS)} with a measure named by --measure"
            )
            continue
        expectations[column] = word
    if problems:
        raise UsageError("; ".join(problems))
    return reliabilities, expectations


def run_relate(args: argparse.Namespace) -> int:
    """``equitheta relate``: score the file, correlate theta with each measure by group, write and print."""
    reliabilities, expectations = _options(args)
    scorer = BundleScorer(resolve(store_from(args.store), args.bundle))
    ignore = ignored_columns(args.ignore_columns)
    if args.group_column is None and scorer.default_group is None:
        raise UsageError(missing_group_column(args.responses, scorer, args.id_column, [*ignore, *args.measure]))
    opened = ScoringInput(
        args.responses,
        item_categories=scorer.item_categories,
        id_column=args.id_column,
        group_column=args.group_column,
        ignore_columns=ignore,
        text_columns=args.measure,
    )
    batches = list(opened.batches())
    responses = np.concatenate([b.responses for b in batches])
    labels = [g for b in batches for g in (b.groups or [])] or ["all"] * responses.shape[0]
    measures = {}
    for m in args.measure:
        texts = [t for b in batches for t in (b.texts or {}).get(m, [])]
        measures[m] = _numbers(opened.source, m, texts, opened.header_lines)
    if scorer.default_group is not None:
        scored_as = [scorer.default_group] * len(labels)
    else:
        try:
            scored_as = list(scorer.resolve_groups(labels, len(labels)))
        except UnknownGroup as exc:
            raise UsageError(f"{opened.source}: column {args.group_column!r}: {exc}") from exc
    result = relate_measures(
        scorer, responses, labels, scored_as=scored_as, measures=measures,
        reliabilities=reliabilities, expectations=expectations,
    )  # fmt: skip
    write_csv_atomic(pd.DataFrame([r.model_dump() for r in result.rows]).assign(bundle=result.bundle), args.out)
    write_csv_atomic(pd.DataFrame([h.model_dump() for h in result.homogeneity]), groups_path(args.out))
    for note in opened.notes:
        error_console().print(f"note: {note}", highlight=False)
    print_relations(result, args.out)
    return 0


def _numbers(source: str, column: str, texts: list[str], header_lines: int) -> np.ndarray:
    """A measure column as numbers (empty: missing); every other cell is a problem named by row and line."""
    values = np.full(len(texts), np.nan)
    problems = []
    for i, text in enumerate(texts):
        if not text:
            continue
        try:
            values[i] = float(text)
        except ValueError:
            problems.append(f"{row_label(i, header_lines)}, column {column!r}: {text!r} is not a number")
        else:
            if not np.isfinite(values[i]):
                problems.append(f"{row_label(i, header_lines)}, column {column!r}: {text!r} is not a finite number")
    if problems:
        raise InputError(source, problems[:MAX_PROBLEMS], total=len(problems))
    return values


def print_relations(result: Relations, out: Path) -> None:
    """The correlations, the equal-correlation tests, the method and the caution."""
    console = out_console()
    table = new_table(
        f"{result.bundle}: correlations of theta with other measures (95% interval by Fisher's z)",
        ["group", "measure", "n", "r", "95% interval", "corrected", "expected", "evidence"],
        right=("n", "r", "corrected"),
    )
    for r in result.rows:
        interval = "-" if r.ci_low is None or r.ci_high is None else f"{r.ci_low:+.3f} to {r.ci_high:+.3f}"
        table.add_row(r.group, r.measure, str(r.n), dash(r.r), interval, dash(r.r_corrected), r.expected or "-",
                      r.evidence or "-")  # fmt: skip
    console.print(table)
    for h in result.homogeneity:
        console.print(
            f"  {h.measure}: equal correlation in every group, Q = {h.q:.2f} on {h.df} df, p = {h.p_value:.3g}",
            highlight=False,
        )
    console.print(f"  method: {result.method}", highlight=False)
    console.print(f"  {result.caution}", highlight=False)
    console.print(f"written: {out} and {groups_path(out)}", highlight=False)
