"""`equitheta calibrate`: read, check, calibrate, then publish (the summary is rendered before the store is touched)."""

from __future__ import annotations

import argparse
from typing import TYPE_CHECKING, Any

from calibration.bundle import Bundle, parse_reference, resolve
from calibration.bundle.store import find_identical
from calibration.cli import (
    EVIDENCE_SAMPLE_PER_GROUP,
    UsageError,
    command_line_mover,
    dask_workers,
    require_dask,
    store_from,
)
from calibration.cli.console import ProgressReporter, out_console
from calibration.cli.render import print_calibration_summary
from calibration.io import ResponseData, read_item_spec, read_policy_overrides, read_responses

if TYPE_CHECKING:  # the numerical packages load only once the inputs have been read and checked
    from calibration.distributed.calibration import DaskTable
    from calibration.pipeline import PipelineSettings, PolicyOverride
    from calibration.pipeline.link import LinkRequest

STAGES = {
    "screen": "observed-score and all-other-anchor DIF screening",
    "scalar": "scalar model (all items equal across groups)",
    "test": "anchored DIF tests and the invariance ladder",
    "final": "final calibration under the item policy",
    "link": "link to the earlier version: drift screening and the fit on its scale",
    "quality": "quality checks and conversion tables",
}


def settings_from_args(args: argparse.Namespace) -> PipelineSettings:
    """Pipeline settings from the command line (options left out keep the library's defaults)."""
    from calibration.bundle.schema import ReportingScaleSettings
    from calibration.dif.settings import DifSettings
    from calibration.estimation import EMSettings, SlopePrior
    from calibration.pipeline import PipelineSettings

    anchors = tuple(a.strip() for a in args.anchors.split(",") if a.strip())
    return PipelineSettings(
        dif=DifSettings(fdr_level=args.fdr, anchors=anchors),
        dif_action=args.dif_action,
        mh_greater_than_one_z=args.mh_z,
        min_group_size=args.min_group_size,
        em=EMSettings(
            max_iter=args.max_iter,
            tolerance=args.tolerance,
            slope_prior=None if args.slope_prior_sd is None else SlopePrior(0.0, args.slope_prior_sd),
        ),
        reporting_scale=ReportingScaleSettings(
            location=args.report_mean,
            scale=args.report_sd,
            decimals=args.report_decimals,
            minimum=args.report_min,
            maximum=args.report_max,
        ),
    )


def run_calibrate(args: argparse.Namespace) -> int:
    """``equitheta calibrate``: check, calibrate, publish and summarise."""
    parse_reference(args.name)  # a bad name fails before the work, not after
    spec = read_item_spec(args.items) if args.items else None
    options = {
        "id_column": args.id_column,
        "item_spec": spec,
        "dichotomous_model": args.model,
        "polytomous_model": args.polytomous_model,
        "group_column": args.group_column,
    }
    workers = dask_workers(args, ("--evidence-sample", args.evidence_sample), ("--sample-seed", args.sample_seed))
    if args.engine == "dask":
        return _run_on_dask(args, options, workers)
    return _check_calibrate_publish(args, read_responses(args.responses, **options))


def _run_on_dask(args: argparse.Namespace, options: dict[str, Any], workers: int) -> int:
    """``calibrate --engine dask``: the file held by the cluster, the evidence on a sample of it."""
    if args.link_to:
        raise UsageError(
            "--link-to needs the whole file in this process: leave out --engine dask, or calibrate on Dask "
            "and link the versions in a later cycle"
        )
    require_dask()
    from calibration.distributed.calibration import DaskTable
    from calibration.distributed.cluster import dask_client

    store_from(args.store)  # an unusable store fails before the cluster starts
    where = args.scheduler or f"a local cluster of {workers} worker processes"
    with dask_client(args.scheduler, workers) as client:
        with ProgressReporter(f"reading and checking {args.responses.name} on {where}"):
            table = DaskTable.open(client, args.responses, **options)
            data = table.sample(args.evidence_sample or EVIDENCE_SAMPLE_PER_GROUP, seed=args.sample_seed or 0)
        try:
            return _check_calibrate_publish(args, data, whole=table)
        finally:
            table.release()


def _check_calibrate_publish(args: argparse.Namespace, data: ResponseData, whole: DaskTable | None = None) -> int:
    """The checks that need no fit, the calibration, then the summary and the publication."""
    rows = read_policy_overrides(args.policy_overrides) if args.policy_overrides else []
    store = store_from(args.store)
    from calibration.pipeline import PolicyOverride, prepare_data
    from calibration.pipeline.link import LinkRequest, check_link_request, link_reference_group

    settings = settings_from_args(args)
    overrides = [PolicyOverride(*row) for row in rows]
    link = LinkRequest(resolve(store, args.link_to), args.link_method) if args.link_to else None
    reference_group = link_reference_group(data, link, args.reference_group)
    if whole is not None and reference_group is None and data.groups is not None:
        reference_group = whole.largest_group()  # of the whole file, not of the sample
    # Every check that needs no fit (sizes, overrides, named anchors, the link) answers before any work starts.
    if link is not None:
        check_link_request(link, settings)
    prepare_data(data, settings=settings, reference_group=reference_group, overrides=overrides)
    bundle = _run_calibration(data, args.name, settings, reference_group, overrides, link, whole)
    console = out_console()
    # Render first: once the store holds the version, nothing may fail any more.
    with console.capture() as captured:
        print_calibration_summary(bundle)
    summary = captured.get()
    identical = None if args.republish else find_identical(store, bundle)
    if identical is not None:
        console.file.write(summary)
        console.print(
            f"identical to the published {identical.label} (same data, settings and results; "
            f"sha256 {identical.hash[:16]}...): nothing published"
            + (f", alias {args.alias} not moved (use `equitheta bundle alias`)" if args.alias else "")
            + "; pass --republish to publish a new version anyway",
            highlight=False,
        )
        return 0
    published = store.publish(bundle)
    alias = (
        store.set_alias(published.name, args.alias, published.version, by=command_line_mover()) if args.alias else None
    )
    console.file.write(summary)
    console.print(
        f"published {published.label} (sha256 {published.hash[:16]}...)"
        + (f"; alias {alias.alias} -> {alias.version}" if alias else ""),
        highlight=False,
    )
    return 0


def _run_calibration(  # noqa: PLR0913 - run_calibrate's checked inputs, passed on
    data: ResponseData,
    name: str,
    settings: PipelineSettings,
    reference_group: str | None,
    overrides: list[PolicyOverride],
    link: LinkRequest | None,
    whole: DaskTable | None = None,
) -> Bundle:
    from calibration.pipeline import calibrate_data

    title = f"calibrating {data.n_items} items, {data.n_persons} respondents"
    if whole is not None:
        title = f"calibrating {data.n_items} items, {whole.n_persons} respondents on Dask"
        if whole.sample_record is not None:
            title += f" (evidence on a sample of {data.n_persons})"
    with ProgressReporter(title) as progress:

        def report(stage: str, step: int, value: float) -> None:
            label = STAGES.get(stage, stage)
            if stage in ("scalar", "final", "link") and step:
                label += f": EM iteration {step}, log-likelihood {value:,.3f}"
            elif stage in ("screen", "test") and step:
                label += f": {step} of {int(value)} item x group tests"
            progress.update(stage, label)

        # Non-convergence is reported in the bundle's warnings (the pipeline's fits do not warn).
        outcome = calibrate_data(
            data,
            name=name,
            settings=settings,
            reference_group=reference_group,
            overrides=overrides,
            progress=report,
            link=link,
            whole=whole,
        )
    return outcome.bundle
