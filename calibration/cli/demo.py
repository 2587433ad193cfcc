"""`equitheta demo`: invent the Tidewater data set, calibrate it by site, score it, then link the next intake."""

from __future__ import annotations

import argparse
from pathlib import Path

import pandas as pd

from calibration.cli.console import new_table, out_console
from calibration.demo import make_demo_responses
from calibration.io import write_csv_atomic


def run_demo(args: argparse.Namespace) -> int:
    """``equitheta demo``: invented workforce-skills data, calibrated and scored end to end."""
    from calibration.cli import main

    console = out_console()
    root: Path = args.out
    root.mkdir(parents=True, exist_ok=True)
    data_path = root / "tidewater_skills_responses.csv"
    write_csv_atomic(make_demo_responses(args.respondents, seed=args.seed), data_path)
    console.print("equitheta demo: Tidewater Regional Skills Check (invented data)", highlight=False)
    console.print(
        f"1. invented {args.respondents} respondents at three sites x 24 items -> {data_path}", highlight=False
    )
    store_dir = root / "store"
    console.print(
        f"2. calibrating by site (DIF screening, anchors, item policy) and publishing to {store_dir}", highlight=False
    )
    code = main(
        [
            "calibrate",
            str(data_path),
            "--name",
            "tidewater-skills",
            "--store",
            str(store_dir),
            "--group-column",
            "site",
            "--reference-group",
            "port-ellery",
            "--alias",
            "production",
            "--report-mean",
            "250",
            "--report-sd",
            "50",
            "--report-min",
            "0",
            "--report-max",
            "500",
        ]
    )
    if code != 0:
        return code
    scores_path = root / "tidewater_skills_scores.csv"
    console.print("3. scoring every respondent with tidewater-skills@production", highlight=False)
    code = main(
        [
            "score",
            str(data_path),
            "--bundle",
            "tidewater-skills@production",
            "--store",
            str(store_dir),
            "--group-column",
            "site",
            "--out",
            str(scores_path),
        ]
    )
    if code != 0:
        return code
    preview = pd.read_csv(scores_path, dtype={"scale_score": str, "scale_se": str}, keep_default_na=False).head(5)
    columns = ["id", "group", "theta", "se", "scale_score", "scale_se", "items_answered", "excluded_items"]
    table = new_table("first rows of the score file", columns)
    for _, row in preview.iterrows():
        table.add_row(
            str(row["id"]),
            str(row["group"]),
            f"{row['theta']:.3f}",
            f"{row['se']:.3f}",
            str(row["scale_score"]),
            str(row["scale_se"]),
            str(row["items_answered"]),
            str(row["excluded_items"]),
        )
    console.print(table)
    return _second_cycle(args, root, store_dir)


def _second_cycle(args: argparse.Namespace, root: Path, store_dir: Path) -> int:
    """The next year's intake, linked to the first calibration's scale, and what changed between the two."""
    from calibration.cli import main

    console = out_console()
    second_path = root / "tidewater_skills_responses_cycle2.csv"
    write_csv_atomic(make_demo_responses(args.respondents, seed=args.seed + 1, cycle=2), second_path)
    console.print(
        f"4. the next intake (invented): {args.respondents} respondents, two new tasks -> {second_path}; "
        "calibrating it on the scale of tidewater-skills@1 (drift screening of the common tasks)",
        highlight=False,
    )
    base = ["--store", str(store_dir)]
    code = main(
        ["calibrate", str(second_path), "--name", "tidewater-skills", *base, "--group-column", "site", "--link-to"]
        + ["tidewater-skills@1"]
    )
    if code != 0:
        return code
    console.print("5. what changed from version 1 to version 2", highlight=False)
    code = main(["bundle", "diff", "tidewater-skills@1", "tidewater-skills@2", *base])
    if code != 0:
        return code
    report = root / "tidewater_skills_report.html"
    console.print("6. the calibration report of version 2 for reviewers and evaluators", highlight=False)
    code = main(["report", "tidewater-skills@2", *base, "--out", str(report)])
    if code != 0:
        return code
    summaries = root / "tidewater_skills_site_summaries.csv"
    console.print(
        "7. for evaluators: the sites of the new intake compared with plausible values (version 2)", highlight=False
    )
    code = main(
        ["summarize", str(second_path), "--bundle", "tidewater-skills@2", *base, "--group-column", "site"]
        + ["--percentiles", "10,50,90", "--out", str(summaries)]
    )
    if code != 0:
        return code
    console.print(
        f"done. Open {report} in a browser. Try: equitheta review tidewater-skills@2 --store {store_dir} --out "
        f"decisions.csv (the cells for content review); move the production alias to the new version with: "
        f"equitheta bundle alias tidewater-skills@2 production --store {store_dir}",
        highlight=False,
    )
    return 0
