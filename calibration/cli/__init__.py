"""The ``equitheta`` command line: the parser and the dispatch to one module per command.

Exit codes: 0 success, 2 bad input (data, spec or arguments), 3 bundle or store
problem (not found, conflict, damaged file), 1 anything unexpected.

Only ``argparse`` is imported here, so ``--help`` and ``--version`` answer at once; a
command imports numpy, pandas and the numerical packages when it runs.
"""

from __future__ import annotations

import argparse
import sys
from collections.abc import Sequence
from pathlib import Path
from typing import TYPE_CHECKING

from calibration import __version__

if TYPE_CHECKING:
    from calibration.bundle.store import BundleStore

EXIT_OK, EXIT_UNEXPECTED, EXIT_INPUT, EXIT_BUNDLE = 0, 1, 2, 3


class UsageError(Exception):
    """A command-line argument is unusable."""


# The Redis key prefix of the CLI's stores; the service's default is the same, so both meet in one place.
REDIS_PREFIX_VARIABLE = "EQUITHETA_REDIS_PREFIX"


def store_from(location: str) -> BundleStore:
    """The store a ``--store`` value names (a redis:// URL takes its key prefix from EQUITHETA_REDIS_PREFIX)."""
    import os

    from calibration.bundle import open_store

    return open_store(location, prefix=os.environ.get(REDIS_PREFIX_VARIABLE) or "equitheta")


def ignored_columns(text: str) -> list[str]:
    """The columns an ``--ignore-columns`` value names (comma-separated, blanks dropped)."""
    return [c.strip() for c in text.split(",") if c.strip()]


EVIDENCE_SAMPLE_PER_GROUP = 50_000
"""Respondents per group the evidence of ``calibrate --engine dask`` rests on unless --evidence-sample says."""


def require_dask() -> None:
    """Refuse ``--engine dask`` before any work when the dask extra is not installed, saying what to install."""
    try:
        import dask.distributed  # noqa: F401 - the extra's presence
    except ImportError as exc:
        raise UsageError(
            f"--engine dask needs Dask ({exc.name or 'dask'} is not installed): pip install 'equitheta[dask]'"
        ) from exc


def command_line_mover() -> str:
    """Who moves an alias from the command line, as the alias history records it."""
    import getpass

    try:
        user = getpass.getuser()
    except (KeyError, OSError):  # no user name for this uid (some containers)
        user = "unknown user"
    return f"command line ({user})"


class _Formatter(argparse.ArgumentDefaultsHelpFormatter):
    """Shows defaults, except where an option has none worth showing."""

    def _get_help_string(self, action: argparse.Action) -> str | None:
        text = action.help or ""
        if action.default in (None, False, "", (), argparse.SUPPRESS) or "default" in text:
            return text
        return super()._get_help_string(action)


def _positive_float(text: str) -> float:
    try:
        value = float(text)
    except ValueError:
        raise argparse.ArgumentTypeError(f"{text!r} is not a number") from None
    if not value > 0:
        raise argparse.ArgumentTypeError(f"{text} is not a positive number")
    return value


def _positive_int(text: str) -> int:
    if not text.strip().isdigit() or int(text) < 1:
        raise argparse.ArgumentTypeError(f"{text!r} is not a whole number >= 1")
    return int(text)


def _subparser(sub: argparse._SubParsersAction, name: str, text: str) -> argparse.ArgumentParser:
    return sub.add_parser(name, help=text, description=text, formatter_class=_Formatter)


def _add_calibrate(sub: argparse._SubParsersAction) -> None:
    cal = _subparser(sub, "calibrate", "calibrate a response file and publish the next bundle version")
    cal.add_argument("responses", type=Path, help="CSV or Parquet: one row per respondent, an id column, items")
    cal.add_argument("--name", required=True, help="bundle name (lower-case letters, digits, . _ -)")
    cal.add_argument("--store", required=True, help="bundle store: a directory or a redis:// URL")
    cal.add_argument("--id-column", default="id", help="column holding the respondent ids")
    cal.add_argument(
        "--items",
        type=Path,
        help="item spec CSV (item, model, categories, include, label, guessing); it overrides "
        "the two model options item by item",
    )
    cal.add_argument(
        "--model",
        choices=["2pl", "1pl", "3pl"],
        default="2pl",
        help="model for right/wrong items (3pl: a lower asymptote per item, estimated under a beta(5, 17) prior)",
    )
    cal.add_argument(
        "--polytomous-model",
        choices=["grm", "gpcm", "pcm"],
        default="grm",
        help="model for items with three or more categories: graded response, generalized partial credit, or "
        "partial credit (one slope shared with every pcm and 1pl item)",
    )
    cal.add_argument(
        "--slope-prior-sd",
        type=_positive_float,
        default=None,
        help="log-normal slope prior, log a ~ N(0, SD^2) (default: none, pure marginal ML)",
    )
    cal.add_argument("--max-iter", type=_positive_int, default=1000, help="most EM iterations per model")
    cal.add_argument(
        "--tolerance", type=_positive_float, default=1e-5, help="largest parameter change that counts as converged"
    )
    cal.add_argument("--alias", help="also point this alias (e.g. production) at the new version")
    cal.add_argument(
        "--republish",
        action="store_true",
        help="publish a new version even when the store already holds an identical calibration "
        "(same data, settings and results); without it nothing changes and the existing "
        "version is named",
    )
    grp = cal.add_argument_group("groups and DIF")
    grp.add_argument(
        "--group-column",
        help="column naming each respondent's group: turns on DIF screening, anchors and per-group policies",
    )
    grp.add_argument("--reference-group", help="the group whose scale is N(0,1) (default: the largest group)")
    grp.add_argument(
        "--min-group-size",
        type=_positive_int,
        default=30,
        help="refuse a group smaller than this (30 is the hard floor; below about 500 the summary "
        "warns and says what suffers)",
    )
    grp.add_argument(
        "--dif-action",
        choices=["exclude", "free"],
        default="exclude",
        help="what a DIF flag does for that group: leave the item out or give it group-specific parameters",
    )
    grp.add_argument("--anchors", default="", help="comma-separated anchor items (default: chosen by screening)")
    grp.add_argument("--fdr", type=_positive_float, default=0.05, help="false discovery rate for DIF flags")
    grp.add_argument(
        "--mh-z",
        type=_positive_float,
        default=1.645,
        help="critical z of the 'greater than 1' test in the MH A/B/C rule (1.645 or 1.96)",
    )
    grp.add_argument(
        "--policy-overrides",
        type=Path,
        help="CSV (item, group, status, note): reviewer decisions that override the proposed policy",
    )
    link = cal.add_argument_group("linking to an earlier version (scores of both on one scale)")
    link.add_argument(
        "--link-to",
        metavar="NAME@VERSION",
        help="put this calibration on that published bundle's scale (NAME@ALIAS works too): common items "
        "are screened for drift, the clean ones anchor the link, new items are calibrated onto the scale; "
        "the reference group defaults to the parent's, and the parent's scoring and reporting scale are kept",
    )
    link.add_argument(
        "--link-method",
        choices=["fixed-parameter", "stocking-lord", "haebara"],
        default="fixed-parameter",
        help="hold the link items at their published parameters, or find linking constants that match the "
        "link items' test (stocking-lord) or item (haebara) characteristic curves",
    )
    dask = _add_dask_options(
        cal,
        "local: the whole file in this process; dask: the file held by a Dask cluster's workers, which run the "
        "final calibration's E-step and SEs over every respondent (the evidence: see --evidence-sample)",
    )
    dask.add_argument(
        "--evidence-sample",
        type=_positive_int,
        metavar="N",
        help="with --engine dask: the checks, DIF screening and tests, the invariance ladder and the quality "
        "evidence run here on a random sample of about N respondents per group (a group with at most N: all of "
        f"them; default {EVIDENCE_SAMPLE_PER_GROUP:,}); the final calibration uses every respondent",
    )
    dask.add_argument("--sample-seed", type=int, help="seed of the evidence sample (with --engine dask; default 0)")
    scale = cal.add_argument_group("reporting scale (score = mean + sd * theta, rounded and bounded)")
    scale.add_argument("--report-mean", type=float, default=500.0, help="reporting score at theta = 0")
    scale.add_argument("--report-sd", type=_positive_float, default=100.0, help="reporting points per theta unit")
    scale.add_argument("--report-min", type=float, default=100.0, help="lowest reporting score")
    scale.add_argument("--report-max", type=float, default=900.0, help="highest reporting score")
    scale.add_argument(
        "--report-decimals",
        type=int,
        choices=range(0, 7),
        default=0,
        metavar="{0..6}",
        help="decimal places of the reporting score (its SE keeps one more)",
    )


def _add_score(sub: argparse._SubParsersAction) -> None:
    sc = _subparser(sub, "score", "score a response file with a published bundle")
    sc.add_argument("responses", type=Path, help="CSV or Parquet: an id column and item columns")
    sc.add_argument(
        "--bundle",
        required=True,
        help="NAME, NAME@VERSION or NAME@ALIAS (NAME: the production alias, else the newest version)",
    )
    sc.add_argument("--store", required=True, help="bundle store: a directory or a redis:// URL")
    sc.add_argument(
        "--out",
        required=True,
        type=Path,
        help="output CSV (written to a temporary name, then renamed); with --engine dask a name that does not end "
        "in .csv is a directory of Parquet parts",
    )
    sc.add_argument("--id-column", default="id", help="column holding the respondent ids")
    sc.add_argument("--method", choices=["eap", "map", "ml"], help="default: the bundle's scoring method")
    sc.add_argument("--ignore-columns", default="", help="comma-separated columns that are not items")
    sc.add_argument("--group-column", help="column naming each respondent's group (needed for bundles with groups)")
    sc.add_argument(
        "--unknown-group",
        choices=["error", "reference"],
        default="error",
        help="a group the bundle does not know: an error, or score with the reference group",
    )
    _add_dask_options(sc, "local: this process, batch by batch; dask: partition by partition on a Dask cluster")


def _add_dask_options(parser: argparse.ArgumentParser, engines: str) -> argparse._ArgumentGroup:
    """--engine, --scheduler and --dask-workers, shared by the commands that run on Dask."""
    dask = parser.add_argument_group("scale-out (the dask extra: pip install 'equitheta[dask]')")
    dask.add_argument("--engine", choices=["local", "dask"], default="local", help=engines)
    dask.add_argument(
        "--scheduler",
        metavar="ADDRESS",
        help="a running Dask scheduler (tcp://host:8786); its workers must see the input and output paths "
        "(default: a local cluster started for the job)",
    )
    dask.add_argument(
        "--dask-workers",
        type=_positive_int,
        help=f"worker processes of the local cluster, one thread each (default {DASK_WORKERS})",
    )
    return dask


DASK_WORKERS = 2
"""Worker processes of the local cluster that ``--engine dask`` starts when no ``--scheduler`` is given."""


def dask_workers(args: argparse.Namespace, *only_on_dask: tuple[str, object]) -> int:
    """The local cluster's size; options for Dask given without ``--engine dask`` (or ``--dask-workers`` beside
    ``--scheduler``, whose own workers run the job) are refused by name rather than ignored."""
    if args.engine == "dask":
        if args.scheduler is not None and args.dask_workers is not None:
            raise UsageError(
                "--dask-workers sizes the local cluster started for the job; with --scheduler the scheduler's own "
                "workers run it: leave one of them out"
            )
        return int(args.dask_workers or DASK_WORKERS)
    flags = (("--scheduler", args.scheduler), ("--dask-workers", args.dask_workers), *only_on_dask)
    given = [flag for flag, value in flags if value is not None]
    if given:
        raise UsageError(f"{', '.join(given)} appl{'ies' if len(given) == 1 else 'y'} only with --engine dask")
    return 0


def _add_bundle(sub: argparse._SubParsersAction) -> None:
    bun = _subparser(sub, "bundle", "list, show and manage published bundles")
    bsub = bun.add_subparsers(dest="bundle_command", required=True, metavar="{list,show,diff,alias,alias-back,schema}")
    bl = _subparser(bsub, "list", "bundles, versions and aliases in a store")
    bl.add_argument("--store", required=True, help="bundle store: a directory or a redis:// URL")
    bs = _subparser(
        bsub,
        "show",
        "summary of one bundle version: parameters, policy with all DIF evidence, quality (or --json for the document)",
    )
    bs.add_argument("reference", help="NAME, NAME@VERSION or NAME@ALIAS")
    bs.add_argument("--store", required=True, help="bundle store: a directory or a redis:// URL")
    bs.add_argument("--json", action="store_true", help="print the verified bundle document")
    bd = _subparser(
        bsub,
        "diff",
        "what changed between two versions: items, policy, anchors, group densities, and the expected change in "
        "scores for a respondent who answers the common items",
    )
    bd.add_argument("older", help="NAME@VERSION or NAME@ALIAS")
    bd.add_argument("newer", help="NAME@VERSION or NAME@ALIAS")
    bd.add_argument("--store", required=True, help="bundle store: a directory or a redis:// URL")
    bd.add_argument("--json", action="store_true", help="print the comparison as JSON")
    ba = _subparser(bsub, "alias", "point an alias at a version")
    ba.add_argument("reference", help="NAME@VERSION")
    ba.add_argument("alias", help="alias name, e.g. production")
    ba.add_argument("--store", required=True, help="bundle store: a directory or a redis:// URL")
    bb = _subparser(bsub, "alias-back", "move an alias back to the version it pointed to before")
    bb.add_argument("name", help="bundle name")
    bb.add_argument("alias", help="alias name")
    bb.add_argument("--store", required=True, help="bundle store: a directory or a redis:// URL")
    _subparser(bsub, "schema", "print the bundle JSON Schema")


def _percentiles(text: str) -> tuple[float, ...]:
    try:
        values = tuple(float(p) for p in text.split(",") if p.strip())
    except ValueError:
        raise argparse.ArgumentTypeError(f"{text!r} is not a comma-separated list of numbers") from None
    if any(not 0 < p < 100 for p in values):
        raise argparse.ArgumentTypeError(f"percentiles lie strictly between 0 and 100, got {text}")
    return values


def _add_summarize(sub: argparse._SubParsersAction) -> None:
    summ = _subparser(
        sub,
        "summarize",
        "compare groups (and cohorts) from a response file with plausible values: each group's mean and SD "
        "with SEs and intervals, and every difference of means (Rubin's rules)",
    )
    summ.add_argument("responses", type=Path, help="CSV or Parquet: an id column, the group column, item columns")
    summ.add_argument("--bundle", required=True, help="NAME, NAME@VERSION or NAME@ALIAS")
    summ.add_argument("--store", required=True, help="bundle store: a directory or a redis:// URL")
    summ.add_argument(
        "--group-column",
        required=True,
        help="the groups to compare (for a bundle with groups: its groups, whose item policy scores them)",
    )
    summ.add_argument("--cohort-column", help="a second breakdown (e.g. year or programme): cells are group x cohort")
    summ.add_argument(
        "--out",
        required=True,
        type=Path,
        help="CSV of the group summaries; the differences go to the same name with _differences",
    )
    summ.add_argument("--plausible-values", type=_positive_int, default=10, help="draws per respondent")
    summ.add_argument("--seed", type=int, default=20261202, help="seed of the draws (the same seed, the same output)")
    summ.add_argument("--percentiles", type=_percentiles, default=(), help="e.g. 10,50,90 (default: none)")
    summ.add_argument("--id-column", default="id", help="column holding the respondent ids")
    summ.add_argument("--ignore-columns", default="", help="comma-separated columns that are not items")


def _add_relate(sub: argparse._SubParsersAction) -> None:
    relate = _subparser(
        sub,
        "relate",
        "relate the scores to other measures by group: correlations with Fisher intervals, corrected for "
        "unreliability, equal across groups, and whether they agree with what the construct leads you to expect",
    )
    relate.add_argument("responses", type=Path, help="CSV or Parquet: an id column, item columns, measure columns")
    relate.add_argument("--bundle", required=True, help="NAME, NAME@VERSION or NAME@ALIAS")
    relate.add_argument("--store", required=True, help="bundle store: a directory or a redis:// URL")
    relate.add_argument(
        "--measure", action="append", required=True, metavar="COLUMN", help="a numeric column to relate (repeat)"
    )
    relate.add_argument("--group-column", help="groups to report (for a bundle with groups: its groups)")
    relate.add_argument(
        "--reliability",
        action="append",
        default=[],
        metavar="COLUMN=VALUE",
        help="a measure's reliability (0..1], for the corrected correlation (repeat)",
    )
    relate.add_argument(
        "--expect",
        action="append",
        default=[],
        metavar="COLUMN:positive|negative|none",
        help="the relation the construct leads you to expect (none: |r| under 0.3, discriminant evidence)",
    )
    relate.add_argument("--out", required=True, type=Path, help="CSV of the correlations; _groups.csv beside it")
    relate.add_argument("--id-column", default="id", help="column holding the respondent ids")
    relate.add_argument("--ignore-columns", default="", help="comma-separated columns that are not items")


def _add_review(sub: argparse._SubParsersAction) -> None:
    review = _subparser(
        sub,
        "review",
        "write a version's proposed policy cells (not invariant, or flagged by any method) as an editable CSV: "
        "change a status and write a note, then recalibrate with --policy-overrides FILE",
    )
    review.add_argument("reference", help="NAME@VERSION or NAME@ALIAS")
    review.add_argument("--store", required=True, help="bundle store: a directory or a redis:// URL")
    review.add_argument("--out", required=True, type=Path, help="the decisions file (CSV) to write")
    review.add_argument("--all", action="store_true", help="every item in every focal group, not only those for review")


def _add_report(sub: argparse._SubParsersAction) -> None:
    report = _subparser(
        sub,
        "report",
        "write a version's calibration report: one self-contained HTML page (plots inline, no network) for "
        "reviewers and evaluators",
    )
    report.add_argument("reference", help="NAME, NAME@VERSION or NAME@ALIAS")
    report.add_argument("--store", required=True, help="bundle store: a directory or a redis:// URL")
    report.add_argument("--out", required=True, type=Path, help="the HTML file to write")


def _add_drift(sub: argparse._SubParsersAction) -> None:
    drift = _subparser(
        sub,
        "drift",
        "how each item of a published version fits the responses the scoring service has scored with it "
        "(the drift watch: EQUITHETA_DRIFT_WATCH on the service; counts in the shared Redis store)",
    )
    drift.add_argument("reference", help="NAME@VERSION or NAME@ALIAS")
    drift.add_argument("--store", required=True, help="the shared store: a redis:// URL")
    drift.add_argument("--json", action="store_true", help="print the report as JSON")


def _add_serve(sub: argparse._SubParsersAction) -> None:
    srv = _subparser(sub, "serve", "run the scoring service (uvicorn) over a bundle store")
    srv.add_argument("--store", help="bundle directory or redis:// URL (default: EQUITHETA_STORE)")
    srv.add_argument("--redis-url", help="shared Redis store (overrides --store)")
    srv.add_argument("--host", help="address to bind (default: EQUITHETA_HOST, else 127.0.0.1)")
    srv.add_argument("--port", type=int, help="port to bind (default: EQUITHETA_PORT, else 8000)")
    srv.add_argument(
        "--workers", type=_positive_int, help="uvicorn worker processes (default: EQUITHETA_WORKERS, else 1)"
    )
    srv.add_argument(
        "--worker-healthcheck-timeout",
        type=_positive_float,
        help="seconds a busy worker may take to answer uvicorn's health check before it is restarted "
        "(default: EQUITHETA_WORKER_HEALTHCHECK_TIMEOUT, else 60)",
    )


def _add_demo(sub: argparse._SubParsersAction) -> None:
    demo = _subparser(sub, "demo", "invent a workforce-skills data set, calibrate, score and summarise it")
    demo.add_argument("--out", type=Path, default=Path("demo-output"), help="folder for the data, store and scores")
    demo.add_argument("--respondents", type=_positive_int, default=4500, help="number of invented respondents")
    demo.add_argument("--seed", type=int, default=20261201, help="random seed of the invented data")


def build_parser() -> argparse.ArgumentParser:
    """The ``equitheta`` argument parser (no numerical package is imported to build it)."""
    parser = argparse.ArgumentParser(
        prog="equitheta",
        formatter_class=_Formatter,
        description="Calibrate IRT item banks across groups, publish versioned calibration bundles and score "
        "responses.",
    )
    parser.add_argument("--version", action="version", version=f"equitheta {__version__}")
    sub = parser.add_subparsers(dest="command", required=True)
    commands = (
        _add_calibrate,
        _add_score,
        _add_summarize,
        _add_relate,
        _add_bundle,
        _add_review,
        _add_report,
        _add_drift,
    )
    for add in (*commands, _add_serve, _add_demo):
        add(sub)
    return parser


def main(argv: Sequence[str] | None = None) -> int:
    """Run one ``equitheta`` command; the exit status (0 ok, 1 input problem, 2 usage, 3 bundle or store)."""
    args = build_parser().parse_args(argv)
    from calibration.cli.console import error_console

    if args.command == "serve":  # needs no numerics: answer without importing them
        from calibration.cli.serve import run_serve

        try:
            return run_serve(args)
        except UsageError as exc:
            error_console().print(f"error: {exc}", style="bold", highlight=False)
            return EXIT_INPUT
    return _run(args)


def _run(args: argparse.Namespace) -> int:
    from calibration.bundle.canonical import BundleError
    from calibration.cli.console import error_console
    from calibration.errors import CalibrationInputError, InputError, UnknownGroup

    try:
        if args.command == "calibrate":
            from calibration.cli.calibrate import run_calibrate

            return run_calibrate(args)
        if args.command == "score":
            from calibration.cli.score import run_score

            return run_score(args)
        if args.command == "bundle":
            from calibration.cli.bundle import run_bundle

            return run_bundle(args)
        if args.command == "summarize":
            from calibration.cli.summarize import run_summarize

            return run_summarize(args)
        if args.command == "relate":
            from calibration.cli.relate import run_relate

            return run_relate(args)
        if args.command == "review":
            from calibration.cli.review import run_review

            return run_review(args)
        if args.command == "report":
            from calibration.cli.report import run_report

            return run_report(args)
        if args.command == "drift":
            from calibration.cli.drift import run_drift

            return run_drift(args)
        if args.command == "demo":
            from calibration.cli.demo import run_demo

            return run_demo(args)
    except (InputError, CalibrationInputError, UsageError, UnknownGroup) as exc:
        error_console().print(f"error: {exc}", style="bold", highlight=False)
        return EXIT_INPUT
    except BundleError as exc:
        where = getattr(exc, "location", None)
        error_console().print(f"bundle error: {exc}" + (f" ({where})" if where else ""), style="bold", highlight=False)
        return EXIT_BUNDLE
    return EXIT_UNEXPECTED


if __name__ == "__main__":
    sys.exit(main())
