"""The ``equitheta`` command line.

Exit codes: 0 success, 2 bad input (data, spec or arguments), 3 bundle or store
problem (not found, conflict, damaged file), 1 anything unexpected.
"""

from __future__ import annotations

import argparse
import json
import sys
from collections.abc import Sequence
from pathlib import Path

import numpy as np
import pandas as pd
from rich.console import Console
from rich.progress import Progress, SpinnerColumn, TextColumn, TimeElapsedColumn
from rich.table import Table

from calibration import __version__
from calibration.bundle import Bundle, BundleError, open_store, resolve
from calibration.bundle.schema import ReportingScaleSettings
from calibration.bundle.scorer import BundleScorer, UnknownGroup
from calibration.bundle.store import parse_reference
from calibration.dif.irt import DifSettings
from calibration.estimation import EMSettings, SlopePrior
from calibration.io import (
    InputError,
    ResponseData,
    read_for_scoring,
    read_item_spec,
    read_policy_overrides,
    read_responses,
    write_csv_atomic,
)
from calibration.irt.scoring import METHODS
from calibration.pipeline import CalibrationInputError, PipelineSettings, PolicyOverride, calibrate_data

CAUTION = (
    "Every score carries measurement error: report the SE with it. Scores with low reliability or few "
    "answered items must not drive individual high-stakes decisions; follow the professional testing "
    "standards and local rules that govern the assessment."
)

console = Console(stderr=True)
out = Console()


class UsageError(Exception):
    """A command-line argument is unusable."""


def _positive_float(text: str) -> float:
    value = float(text)
    if not value > 0:
        raise argparse.ArgumentTypeError(f"{text} is not a positive number")
    return value


def _build_parser() -> argparse.ArgumentParser:
    parser = argparse.ArgumentParser(
        prog="equitheta",
        description="Calibrate IRT item banks, publish versioned calibration bundles and score responses.",
    )
    parser.add_argument("--version", action="version", version=f"equitheta {__version__}")
    sub = parser.add_subparsers(dest="command", required=True)

    cal = sub.add_parser("calibrate", help="calibrate a response file and publish the next bundle version")
    cal.add_argument("responses", type=Path, help="CSV or Parquet: one row per respondent, an id column, items")
    cal.add_argument("--name", required=True, help="bundle name (lower-case letters, digits, . _ -)")
    cal.add_argument("--store", required=True, help="bundle store directory")
    cal.add_argument("--id-column", default="id")
    cal.add_argument("--items", type=Path, help="item spec CSV (item, model, categories, include, label)")
    cal.add_argument("--model", choices=["2pl", "1pl"], default="2pl", help="model for right/wrong items")
    cal.add_argument("--slope-prior-sd", type=_positive_float, default=None,
                     help="log-normal slope prior, log a ~ N(0, SD^2) (default: none, pure marginal ML)")
    cal.add_argument("--max-iter", type=int, default=1000)
    cal.add_argument("--tolerance", type=_positive_float, default=1e-5,
                     help="largest parameter change that counts as converged")
    cal.add_argument("--alias", help="also point this alias (e.g. production) at the new version")
    cal.add_argument("--group-column", help="column naming each respondent's group: turns on DIF screening, "
                     "anchors and per-group policies")
    cal.add_argument("--reference-group", help="the group whose scale is N(0,1) (default: the largest group)")
    cal.add_argument("--dif-action", choices=["exclude", "free"], default="exclude",
                     help="what a DIF flag does for that group: leave the item out (default) or give it "
                          "group-specific parameters")
    cal.add_argument("--anchors", default="", help="comma-separated anchor items (default: chosen by screening)")
    cal.add_argument("--fdr", type=_positive_float, default=0.05, help="false discovery rate for DIF flags")
    cal.add_argument("--mh-z", type=_positive_float, default=1.645,
                     help="critical z of the 'greater than 1' test in the MH A/B/C rule (1.645 or 1.96)")
    cal.add_argument("--policy-overrides", type=Path,
                     help="CSV (item, group, status, note): reviewer decisions that override the proposed policy")
    _add_scale_options(cal)

    sc = sub.add_parser("score", help="score a response file with a published bundle")
    sc.add_argument("responses", type=Path)
    sc.add_argument("--bundle", required=True, help="NAME, NAME@VERSION or NAME@ALIAS")
    sc.add_argument("--store", required=True)
    sc.add_argument("--out", required=True, type=Path, help="output CSV")
    sc.add_argument("--id-column", default="id")
    sc.add_argument("--method", choices=METHODS, help="default: the bundle's scoring method")
    sc.add_argument("--ignore-columns", default="", help="comma-separated columns that are not items")
    sc.add_argument("--group-column", help="column naming each respondent's group (bundles with groups)")
    sc.add_argument("--unknown-group", choices=["error", "reference"], default="error",
                    help="a group the bundle does not know: an error (default) or score with the reference group")

    bun = sub.add_parser("bundle", help="list, show and manage published bundles")
    bsub = bun.add_subparsers(dest="bundle_command", required=True)
    bl = bsub.add_parser("list", help="bundles, versions and aliases in a store")
    bl.add_argument("--store", required=True)
    bs = bsub.add_parser("show", help="summary of one bundle version (or --json for the document)")
    bs.add_argument("reference", help="NAME, NAME@VERSION or NAME@ALIAS")
    bs.add_argument("--store", required=True)
    bs.add_argument("--json", action="store_true", help="print the verified bundle document")
    ba = bsub.add_parser("alias", help="point an alias at a version")
    ba.add_argument("reference", help="NAME@VERSION")
    ba.add_argument("alias")
    ba.add_argument("--store", required=True)
    bb = bsub.add_parser("alias-back", help="move an alias back to the version it pointed to before")
    bb.add_argument("name")
    bb.add_argument("alias")
    bb.add_argument("--store", required=True)
    bsub.add_parser("schema", help="print the bundle JSON Schema")

    srv = sub.add_parser("serve", help="run the scoring service (uvicorn) over a bundle store")
    srv.add_argument("--store", required=True, help="bundle directory (or a redis:// URL)")
    srv.add_argument("--redis-url", help="shared Redis store (overrides --store)")
    srv.add_argument("--host", default="127.0.0.1")
    srv.add_argument("--port", type=int, default=8000)
    srv.add_argument("--workers", type=int, default=1)

    demo = sub.add_parser("demo", help="invent a workforce-skills data set, calibrate, score and summarise it")
    demo.add_argument("--out", type=Path, default=Path("demo-output"))
    demo.add_argument("--respondents", type=int, default=4500)
    demo.add_argument("--seed", type=int, default=20261201)
    return parser


def _add_scale_options(parser: argparse.ArgumentParser) -> None:
    parser.add_argument("--scale-location", type=float, default=500.0, help="reporting score at theta = 0")
    parser.add_argument("--scale-unit", type=_positive_float, default=100.0, help="reporting points per theta unit")
    parser.add_argument("--scale-min", type=float, default=100.0)
    parser.add_argument("--scale-max", type=float, default=900.0)
    parser.add_argument("--scale-decimals", type=int, default=0)


def main(argv: Sequence[str] | None = None) -> int:
    args = _build_parser().parse_args(argv)
    try:
        if args.command == "calibrate":
            return _calibrate(args)
        if args.command == "score":
            return _score(args)
        if args.command == "bundle":
            return _bundle(args)
        if args.command == "demo":
            return _demo(args)
        if args.command == "serve":
            return _serve(args)
    except (InputError, CalibrationInputError, UsageError) as exc:
        console.print(f"[bold red]error:[/] {exc}", highlight=False)
        return 2
    except UnknownGroup as exc:
        console.print(f"[bold red]error:[/] {exc} (or pass --unknown-group reference)", highlight=False)
        return 2
    except BundleError as exc:
        console.print(f"[bold red]bundle error:[/] {exc}", highlight=False)
        return 3
    return 1


def _calibrate(args: argparse.Namespace) -> int:
    spec = read_item_spec(args.items) if args.items else None
    data = read_responses(args.responses, id_column=args.id_column, item_spec=spec, dichotomous_model=args.model,
                          group_column=args.group_column)
    overrides = [PolicyOverride(*row) for row in read_policy_overrides(args.policy_overrides)] \
        if args.policy_overrides else []
    anchors = tuple(a.strip() for a in args.anchors.split(",") if a.strip())
    settings = PipelineSettings(
        dif=DifSettings(alpha=args.fdr, anchors=anchors),
        dif_action=args.dif_action,
        mh_greater_than_one_z=args.mh_z,
        em=EMSettings(
            max_iter=args.max_iter,
            tolerance=args.tolerance,
            slope_prior=None if args.slope_prior_sd is None else SlopePrior(0.0, args.slope_prior_sd),
        ),
        reporting_scale=ReportingScaleSettings(
            location=args.scale_location, scale=args.scale_unit, decimals=args.scale_decimals,
            minimum=args.scale_min, maximum=args.scale_max,
        ),
    )
    store = open_store(args.store)
    parse_reference(args.name)  # a bad name fails before the work, not after
    bundle = _run_calibration(data, args.name, settings, args.reference_group, overrides)
    published = store.publish(bundle)
    if args.alias:
        store.set_alias(published.name, args.alias, published.version)
    _print_calibration_summary(published)
    out.print(f"published [bold]{published.label}[/] (sha256 {published.hash[:16]}...) in {args.store}"
              + (f"; alias {args.alias} -> {published.version}" if args.alias else ""), highlight=False)
    return 0


STAGES = {
    "screen": "observed-score and all-other-anchor DIF screening",
    "scalar": "scalar model (all items equal across groups)",
    "test": "anchored DIF tests and the invariance ladder",
    "final": "final calibration under the item policy",
    "quality": "quality checks and conversion tables",
}


def _run_calibration(
    data: ResponseData, name: str, settings: PipelineSettings, reference_group: str | None,
    overrides: list[PolicyOverride],
) -> Bundle:
    with Progress(SpinnerColumn(), TextColumn("{task.description}"), TimeElapsedColumn(), console=console,
                  transient=True) as progress:
        task = progress.add_task(f"calibrating {data.n_items} items, {data.n_persons} respondents", total=None)

        def report(stage: str, step: int, value: float) -> None:
            label = STAGES.get(stage, stage)
            if stage in ("scalar", "final") and step:
                label += f": EM iteration {step}, log-likelihood {value:,.3f}"
            elif stage in ("screen", "test") and step:
                label += f": {step} of {int(value)} item x group tests"
            progress.update(task, description=label)

        # Non-convergence is reported in the bundle's warnings (the pipeline's fits do not warn).
        outcome = calibrate_data(data, name=name, settings=settings, reference_group=reference_group,
                                 overrides=overrides, progress=report)
    return outcome.bundle


def _print_calibration_summary(bundle: Bundle) -> None:
    fit = bundle.fit
    group = bundle.quality.by_group[bundle.metric.reference_group]
    out.print(f"[bold]{bundle.name}[/]: {len(bundle.items)} items, {bundle.provenance.n_respondents} respondents "
              f"({bundle.provenance.data_source})", highlight=False)
    out.print(f"  log-likelihood {fit.log_likelihood:,.3f}  AIC {fit.aic:,.1f}  BIC {fit.bic:,.1f}  "
              f"{'converged' if fit.converged else 'NOT converged'} after {fit.n_iter} EM iterations", highlight=False)
    alpha = "n/a" if group.alpha is None else f"{group.alpha:.3f}"
    rel = "n/a" if group.marginal_reliability is None else f"{group.marginal_reliability:.3f}"
    out.print(f"  alpha {alpha}  marginal reliability {rel}", highlight=False)
    table = Table(title="item parameters (slope-threshold form; SE in brackets)", show_lines=False)
    for col in ("item", "model", "slope", "thresholds", "item-rest r"):
        table.add_column(col, justify="right" if col != "item" else "left")
    for item in bundle.items:
        se = "" if item.slope_se is None else f" ({item.slope_se:.3f})"
        thresholds = "  ".join(
            f"{b:.2f}" + ("" if s is None else f" ({s:.2f})")
            for b, s in zip(item.thresholds, item.threshold_se, strict=True)
        )
        r = "n/a" if item.item_rest_correlation is None else f"{item.item_rest_correlation:.2f}"
        table.add_row(item.id, item.model, f"{item.slope:.3f}{se}", thresholds, r)
    out.print(table)
    for item in bundle.excluded_items:
        out.print(f"  [yellow]left out[/] {item.id}: {item.reason}", highlight=False)
    if len(bundle.metric.groups) > 1:
        _print_group_summary(bundle)
    for warning in bundle.quality.warnings:
        out.print(f"  [yellow]warning:[/] {warning}", highlight=False)


def _print_group_summary(bundle: Bundle) -> None:
    groups = Table(title=f"groups (reference: {bundle.metric.reference_group})")
    for col in ("group", "n", "latent mean (SE)", "latent SD (SE)", "alpha", "marginal reliability", "items left out"):
        groups.add_column(col, justify="right" if col != "group" else "left")
    for g in bundle.metric.groups:
        q = bundle.quality.by_group[g.name]
        left_out = sum(1 for item in bundle.items if item.policy[g.name].status == "excluded")
        groups.add_row(
            g.name, str(g.n_respondents),
            f"{g.latent_mean:.3f}" + ("" if g.latent_mean_se is None else f" ({g.latent_mean_se:.3f})"),
            f"{g.latent_sd:.3f}" + ("" if g.latent_sd_se is None else f" ({g.latent_sd_se:.3f})"),
            "n/a" if q.alpha is None else f"{q.alpha:.3f}",
            "n/a" if q.marginal_reliability is None else f"{q.marginal_reliability:.3f}", str(left_out),
        )
    out.print(groups)
    out.print(f"  anchors: {', '.join(bundle.anchors.items)} ({bundle.anchors.method})", highlight=False)
    cells = Table(title="item policy where it is not invariant (proposals: content experts review them)")
    for col in ("item", "group", "status", "reason"):
        cells.add_column(col)
    for item in bundle.items:
        for group, policy in item.policy.items():
            if policy.status != "invariant":
                cells.add_row(item.id, group, policy.status, policy.reason)
    if cells.row_count:
        out.print(cells)
    else:
        out.print("  no item was flagged for DIF in any group")
    ladder = Table(title="invariance ladder")
    for col in ("model", "log-likelihood", "parameters", "AIC", "BIC", "LR test"):
        ladder.add_column(col, justify="right" if col != "model" else "left")
    for row in bundle.invariance:
        test = "" if row.lr_statistic is None else \
            f"vs {row.compared_with}: {row.lr_statistic:.1f} on {row.df} df, p = {row.p_value:.3g}"
        ladder.add_row(row.model, f"{row.log_likelihood:,.1f}", str(row.n_parameters), f"{row.aic:,.1f}",
                       f"{row.bic:,.1f}", test)
    out.print(ladder)


def _score(args: argparse.Namespace) -> int:
    store = open_store(args.store)
    bundle = resolve(store, args.bundle)
    scorer = BundleScorer(bundle)
    ignore = [c.strip() for c in args.ignore_columns.split(",") if c.strip()]
    data = read_for_scoring(args.responses, item_categories=scorer.item_categories, id_column=args.id_column,
                            group_column=args.group_column, ignore_columns=ignore)
    if data.groups is None and scorer.default_group is None:
        raise UsageError(f"bundle {bundle.label} has groups ({', '.join(scorer.plans)}); "
                         "name the group column with --group-column")
    groups = None if data.groups is None else list(data.groups)
    frame = score_frame(scorer, data.responses, list(data.ids), groups, method=args.method,
                        unknown_to_reference=args.unknown_group == "reference")
    write_csv_atomic(frame, args.out)
    for note in data.notes:
        console.print(f"note: {note}", highlight=False)
    _print_score_summary(frame, bundle, args.out)
    return 0


def score_frame(
    scorer: BundleScorer, responses: np.ndarray, ids: list[str], groups: list[str] | None, *, method: str | None,
    unknown_to_reference: bool = False,
) -> pd.DataFrame:
    """The scored output table (the column names are an interface: keep them)."""
    resolved = scorer.resolve_groups(groups, len(ids), unknown_to_reference=unknown_to_reference)
    result = scorer.score(responses, resolved, method=method)
    excluded = {g: ";".join(item for item, _ in scorer.excluded_for(g)) for g in scorer.plans}
    return pd.DataFrame(
        {
            "id": ids,
            "group": resolved,
            "theta": result.theta,
            "se": result.se,
            "scale_score": result.scale_score,
            "scale_se": result.scale_se,
            "items_answered": result.n_answered,
            "method": result.method,
            "flags": [";".join(f) for f in result.flags],
            "excluded_items": [excluded[g] for g in resolved],
            "bundle": scorer.bundle.label,
        }
    )


def _print_score_summary(frame: pd.DataFrame, bundle: Bundle, path: Path) -> None:
    ok = frame["theta"].notna()
    out.print(f"scored {len(frame)} respondents with {bundle.label} ({frame['method'].iloc[0]}) -> {path}",
              highlight=False)
    out.print(f"  theta mean {frame.loc[ok, 'theta'].mean():.3f}, SD {frame.loc[ok, 'theta'].std():.3f}; "
              f"median SE {frame.loc[ok, 'se'].median():.3f}; "
              f"scale score mean {frame.loc[ok, 'scale_score'].mean():.1f}", highlight=False)
    flagged = frame["flags"].str.len() > 0
    if flagged.any():
        counts = frame.loc[flagged, "flags"].str.split(";").explode().value_counts()
        out.print("  flags: " + ", ".join(f"{k} {v}" for k, v in counts.items()), highlight=False)
    out.print(f"  [dim]{CAUTION}[/]", highlight=False)


def _bundle(args: argparse.Namespace) -> int:
    if args.bundle_command == "schema":
        out.print_json(json.dumps(Bundle.model_json_schema()))
        return 0
    store = open_store(args.store)
    if args.bundle_command == "list":
        names = store.names()
        if not names:
            out.print(f"no bundles in {args.store}")
            return 0
        table = Table(title=f"bundles in {args.store}")
        for col in ("name", "versions", "aliases"):
            table.add_column(col)
        for name in names:
            aliases = ", ".join(f"{a} -> {r.version}" for a, r in sorted(store.aliases(name).items()))
            table.add_row(name, ", ".join(map(str, store.versions(name))), aliases or "-")
        out.print(table)
        return 0
    if args.bundle_command == "show":
        bundle = resolve(store, args.reference)
        if args.json:
            out.print_json(bundle.model_dump_json())
        else:
            _print_calibration_summary(bundle)
            out.print(f"  version {bundle.version}, created {bundle.created_at}, sha256 {bundle.hash}", highlight=False)
        return 0
    if args.bundle_command == "alias":
        name, ref = parse_reference(args.reference)
        if not isinstance(ref, int):
            raise UsageError("bundle alias needs NAME@VERSION, e.g. skills@3")
        record = store.set_alias(name, args.alias, ref)
        out.print(f"{name}: alias {record.alias} -> {record.version}")
        return 0
    if args.bundle_command == "alias-back":
        record = store.alias_back(args.name, args.alias)
        out.print(f"{args.name}: alias {record.alias} moved back -> {record.version}")
        return 0
    return 1


def _serve(args: argparse.Namespace) -> int:
    """Hand over to the service in a process of its own (calibration never imports the service)."""
    import os

    argv = [sys.executable, "-m", "service.main", "--store", str(args.store), "--host", args.host,
            "--port", str(args.port), "--workers", str(args.workers)]
    if args.redis_url:
        argv += ["--redis-url", args.redis_url]
    os.execv(sys.executable, argv)
    return 1  # not reached


def _demo(args: argparse.Namespace) -> int:
    from calibration.demo import make_demo_responses

    root: Path = args.out
    root.mkdir(parents=True, exist_ok=True)
    data_path = root / "tidewater_skills_responses.csv"
    write_csv_atomic(make_demo_responses(args.respondents, seed=args.seed), data_path)
    out.rule("[bold]equitheta demo: Tidewater Regional Skills Check (invented data)")
    out.print(f"1. invented {args.respondents} respondents at three sites x 24 items -> {data_path}",
              highlight=False)
    store_dir = root / "store"
    out.print(f"2. calibrating by site (DIF screening, anchors, item policy) and publishing to {store_dir}",
              highlight=False)
    code = main(["calibrate", str(data_path), "--name", "tidewater-skills", "--store", str(store_dir),
                 "--group-column", "site", "--reference-group", "port-ellery",
                 "--alias", "production", "--scale-location", "250", "--scale-unit", "50",
                 "--scale-min", "0", "--scale-max", "500"])
    if code != 0:
        return code
    scores_path = root / "tidewater_skills_scores.csv"
    out.print("3. scoring every respondent with tidewater-skills@production", highlight=False)
    code = main(["score", str(data_path), "--bundle", "tidewater-skills@production", "--store", str(store_dir),
                 "--group-column", "site", "--out", str(scores_path)])
    if code != 0:
        return code
    preview = pd.read_csv(scores_path).head(5)
    table = Table(title="first rows of the score file")
    for col in ("id", "group", "theta", "se", "scale_score", "scale_se", "items_answered", "excluded_items"):
        table.add_column(col)
    for _, row in preview.iterrows():
        table.add_row(str(row["id"]), str(row["group"]), f"{row['theta']:.3f}", f"{row['se']:.3f}",
                      f"{row['scale_score']:.0f}", f"{row['scale_se']:.1f}", str(row["items_answered"]),
                      "" if pd.isna(row["excluded_items"]) else str(row["excluded_items"]))
    out.print(table)
    out.print(f"done. Try: equitheta bundle list --store {store_dir}", highlight=False)
    return 0


if __name__ == "__main__":
    sys.exit(main())
