"""`equitheta score`: score a response file with a published bundle and write one row per respondent."""

from __future__ import annotations

import argparse
from collections import Counter
from pathlib import Path

import numpy as np

from calibration.bundle import Bundle, resolve
from calibration.bundle.scorer import BundleScorer, ScoredBatch, UnknownGroup
from calibration.cli import UsageError, dask_workers, ignored_columns, require_dask, store_from
from calibration.cli.console import error_console, out_console
from calibration.cli.render import CAUTION
from calibration.io import MAX_PROBLEMS, ScoringInput, read_header, row_label
from calibration.io.scores import SCORE_COLUMNS, score_rows
from calibration.io.write import atomic_output, csv_line


def run_score(args: argparse.Namespace) -> int:
    """``equitheta score``: score a response file with a published bundle, batch by batch.

    The file is read, scored and written in batches (memory flat in its length) to a temporary
    file renamed into place at the end; a problem anywhere in the file leaves ``--out`` untouched.
    """
    store = store_from(args.store)
    bundle = resolve(store, args.bundle)
    scorer = BundleScorer(bundle)
    ignore = ignored_columns(args.ignore_columns)
    if args.group_column is None and scorer.default_group is None:
        raise UsageError(missing_group_column(args.responses, scorer, args.id_column, ignore))
    workers = dask_workers(args)
    if args.engine == "dask":
        return _run_on_dask(args, bundle, ignore, workers)
    opened = ScoringInput(
        args.responses,
        item_categories=scorer.item_categories,
        id_column=args.id_column,
        group_column=args.group_column,
        ignore_columns=ignore,
    )
    summary = ScoreSummary()
    unknown: list[tuple[int, str, str | None]] = []
    with atomic_output(args.out) as handle:
        handle.write(csv_line(SCORE_COLUMNS))
        for batch in opened.batches():
            try:
                resolved = scorer.resolve_groups(
                    batch.groups, len(batch.ids), unknown_to_reference=args.unknown_group == "reference"
                )
            except UnknownGroup as exc:
                unknown.extend((batch.first_row + i, batch.ids[i].as_py(), g) for i, g in exc.problems)
                continue
            if unknown:
                continue  # read on only to list every unknown group
            result = scorer.score(batch.responses, resolved, method=args.method)
            handle.write(score_rows(scorer, batch.ids, resolved, result))
            summary.add(result)
        if unknown:
            raise UsageError(_unknown_group_message(unknown, opened.header_lines, args.group_column, scorer))
    for note in opened.notes:
        error_console().print(f"note: {note}", highlight=False)
    summary.print(bundle, args.out, scorer.bundle.scoring.reporting_scale.decimals)
    return 0


def _run_on_dask(args: argparse.Namespace, bundle: Bundle, ignore: list[str], workers: int) -> int:
    """``equitheta score --engine dask``: the file's partitions scored on a cluster (see calibration.distributed)."""
    require_dask()
    import time

    from calibration.distributed.scoring import score_file_on_dask

    console = error_console()
    start = time.perf_counter()

    def progress(done: int, total: int) -> None:
        console.print(f"[{time.perf_counter() - start:8.1f} s] partition {done} of {total} scored", highlight=False)

    where = args.scheduler or f"a local cluster of {workers} worker processes"
    console.print(f"scoring {args.responses.name} on {where}", highlight=False)
    result = score_file_on_dask(
        args.responses,
        bundle,
        args.out,
        scheduler=args.scheduler,
        n_workers=workers,
        progress=progress,
        id_column=args.id_column,
        group_column=args.group_column,
        ignore_columns=tuple(ignore),
        method=args.method,
        unknown_to_reference=args.unknown_group == "reference",
    )
    for note in result.notes:
        console.print(f"note: {note}", highlight=False)
    summary = ScoreSummary()
    summary.add_arrays(result.theta, result.se, result.scale, result.flags, result.method, result.n_rows)
    summary.print(bundle, args.out, bundle.scoring.reporting_scale.decimals)
    out_console().print(f"  {result.n_partitions} partition(s) on Dask", highlight=False)
    return 0


def missing_group_column(path: Path, scorer: BundleScorer, id_column: str, ignore: list[str]) -> str:
    """A bundle with groups met a file without ``--group-column``: the message, with the columns that could be it."""
    bundle = scorer.bundle
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
    problems: list[tuple[int, str, str | None]], header_lines: int, column: str | None, scorer: BundleScorer
) -> str:
    lines = [
        f"{row_label(i, header_lines)}, id {respondent!r}"
        + (f", column {column!r}: group {g!r} is not in the bundle" if g else ": no group given")
        for i, respondent, g in problems[:MAX_PROBLEMS]
    ]
    more = f"\n  ... and {len(problems) - MAX_PROBLEMS} more" if len(problems) > MAX_PROBLEMS else ""
    return (
        f"{len(problems)} respondent(s) with a group that bundle {scorer.bundle.label} does not know "
        f"(its groups: {', '.join(scorer.plans)}); fix the group column or pass --unknown-group reference to "
        "score them with the reference group's items\n" + "\n".join(f"  - {line}" for line in lines) + more
    )


class ScoreSummary:
    """Running figures of a scored file for the closing summary (a few floats per respondent)."""

    def __init__(self) -> None:
        self.theta: list[np.ndarray] = []
        self.se: list[np.ndarray] = []
        self.scale: list[np.ndarray] = []
        self.flags: Counter[str] = Counter()
        self.method = ""
        self.n_rows = 0

    def add(self, result: ScoredBatch) -> None:
        """Take in one scored batch."""
        ok = np.isfinite(result.theta)
        self.theta.append(result.theta[ok].astype(np.float32))
        self.se.append(result.se[ok].astype(np.float32))
        self.scale.append(result.scale_score[ok])
        self.flags.update(f for flags in result.flags for f in flags)
        self.method = result.method
        self.n_rows += len(result.theta)

    def add_arrays(  # noqa: PLR0913 - the figures a distributed run gathers
        self, theta: np.ndarray, se: np.ndarray, scale: np.ndarray, flags: Counter[str], method: str, n_rows: int
    ) -> None:
        """Take in the figures of a whole run scored elsewhere (finite values only, as :meth:`add` keeps)."""
        self.theta.append(theta)
        self.se.append(se)
        self.scale.append(scale)
        self.flags.update(flags)
        self.method = method
        self.n_rows += n_rows

    def print(self, bundle: Bundle, path: Path, decimals: int) -> None:
        """The summary lines: count, theta mean and SD, median SE, scale mean, flags, the caution."""
        console = out_console()
        theta, se = np.concatenate(self.theta or [np.zeros(0)]), np.concatenate(self.se or [np.zeros(0)])
        scale = np.round(np.concatenate(self.scale or [np.zeros(0)]), decimals)
        n = sum(len(t) for t in self.theta)
        console.print(
            f"scored {self.n_rows} respondents with {bundle.label} ({self.method}) -> {path}", highlight=False
        )
        if n:
            console.print(
                f"  theta mean {theta.mean(dtype=np.float64):.3f}, SD {theta.std(ddof=1, dtype=np.float64):.3f}; "
                f"median SE {np.median(se):.3f}; scale score mean {scale.mean():.1f}",
                highlight=False,
            )
        if self.flags:
            console.print("  flags: " + ", ".join(f"{k} {v}" for k, v in self.flags.most_common()), highlight=False)
        console.print(f"  {CAUTION}", style="dim", highlight=False)
