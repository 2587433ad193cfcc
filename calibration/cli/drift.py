"""`equitheta drift`: the drift watch's report for one published version (counts from the shared Redis store)."""

from __future__ import annotations

import argparse

from calibration.bundle import resolve
from calibration.bundle.drift_watch import DriftWatchReport, drift_report
from calibration.cli import UsageError, store_from
from calibration.cli.console import dash, new_table, out_console


def run_drift(args: argparse.Namespace) -> int:
    """``equitheta drift NAME@V --store redis://...``: RMSD of every item and group on production traffic."""
    from calibration.bundle.redis_store import RedisStore

    store = store_from(args.store)
    if not isinstance(store, RedisStore):
        raise UsageError(
            "drift-watch counts are kept in the shared Redis store the scoring service writes to: give "
            "--store redis://HOST:PORT/DB (and run the service with EQUITHETA_DRIFT_WATCH=true)"
        )
    report = drift_report(store, resolve(store, args.reference))
    console = out_console()
    if args.json:
        console.print_json(report.model_dump_json())
        return 0
    print_drift_report(report)
    return 0


def print_drift_report(report: DriftWatchReport) -> None:
    """Flagged cells first, then every item and group with its answers counted and RMSD."""
    console = out_console()
    counted = ", ".join(f"{g} {n}" for g, n in sorted(report.respondents.items())) or "none yet"
    console.print(f"{report.bundle}: respondents counted by group: {counted}", highlight=False)
    rows = sorted(report.rows, key=lambda r: (not r.flagged, -(r.rmsd or 0.0), r.item, r.group))
    table = new_table(
        f"production fit (RMSD of the expected-score curve; flagged above {report.threshold:g} with at least "
        f"{report.min_responses} answers)",
        ["item", "group", "answers", "RMSD", "drift"],
        right=("answers", "RMSD"),
    )
    for row in rows:
        enough = row.responses >= report.min_responses
        verdict = "FLAGGED" if row.flagged else ("-" if enough else "too few answers")
        table.add_row(row.item, row.group, f"{row.responses:,.0f}", dash(row.rmsd, ".3f"), verdict)
    console.print(table)
    console.print(f"  {report.rule}", highlight=False)
    console.print(f"  {report.caution}", highlight=False)
