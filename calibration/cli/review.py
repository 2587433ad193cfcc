"""`equitheta review`: a version's proposed policy cells as an editable decisions file for content reviewers."""

from __future__ import annotations

import argparse

import pandas as pd

from calibration.bundle import Bundle, resolve
from calibration.cli import store_from
from calibration.cli.console import out_console
from calibration.io import write_csv_atomic
from calibration.report.evidence import CellEvidence, cells_for_review, irt_text, logistic_text, observed_text

# The decisions file's columns: the first five are read back by --policy-overrides; the rest is context.
REVIEW_COLUMNS = (
    "item",
    "group",
    "proposed",
    "status",
    "note",
    "reason",
    "irt_g2_df",
    "fdr_p",
    "effect_theta",
    "observed_score",
    "logistic_delta_r2",
    "methods",
)


def _every_cell(bundle: Bundle) -> list[CellEvidence]:
    flagged = {(c.item, c.group): c for c in cells_for_review(bundle)}
    out = []
    for item in bundle.items:
        for group, policy in item.policy.items():
            if group != bundle.metric.reference_group:
                out.append(flagged.get((item.id, group), CellEvidence(item.id, group, policy, None, None)))
    return out


def run_review(args: argparse.Namespace) -> int:
    """``equitheta review NAME@V --out decisions.csv``: the cells to review, with their evidence."""
    bundle = resolve(store_from(args.store), args.reference)
    cells = _every_cell(bundle) if args.all else cells_for_review(bundle)
    rows = []
    for cell in cells:
        g2, p, effect = irt_text(cell.irt)
        proposed = cell.policy.proposed_status or cell.policy.status
        rows.append(
            {
                "item": cell.item,
                "group": cell.group,
                "proposed": proposed,
                "status": cell.policy.status,
                "note": cell.reviewer_note or "",
                "reason": cell.policy.reason,
                "irt_g2_df": g2,
                "fdr_p": p,
                "effect_theta": effect,
                "observed_score": observed_text(cell.observed),
                "logistic_delta_r2": logistic_text(cell.observed),
                "methods": cell.verdict,
            }
        )
    write_csv_atomic(pd.DataFrame(rows, columns=list(REVIEW_COLUMNS)), args.out)
    console = out_console()
    if not rows:
        console.print(
            f"{bundle.label}: no cell to review (a single group, or no method flags any item): {args.out} has the "
            "header only",
            highlight=False,
        )
        return 0
    console.print(
        f"{bundle.label}: {len(rows)} policy cells for review written to {args.out}. For each cell set status to "
        "invariant, group_specific or excluded and write a note for every decision (a cell left as proposed "
        f"with no note is no decision); then recalibrate with --policy-overrides {args.out}. The report shows "
        "every decision with its note.",
        highlight=False,
    )
    console.print(
        "  A DIF flag is statistical evidence, not a verdict: review the item's content and the group's context.",
        highlight=False,
    )
    return 0
