"""`equitheta report`: a version's calibration report as one self-contained HTML page."""

from __future__ import annotations

import argparse

from calibration.bundle import resolve
from calibration.cli import store_from
from calibration.cli.console import out_console
from calibration.io.write import atomic_output


def run_report(args: argparse.Namespace) -> int:
    """``equitheta report NAME@V --out report.html``: written whole, then renamed into place."""
    from calibration.report.page import render_report

    store = store_from(args.store)
    bundle = resolve(store, args.reference)
    page = render_report(bundle, aliases=store.aliases(bundle.name))
    with atomic_output(args.out) as handle:
        handle.write(page.encode("utf-8"))
    out_console().print(
        f"report of {bundle.label} written to {args.out} ({len(page) / 1024:,.0f} KB; opens in any browser, no "
        "network needed)",
        highlight=False,
    )
    return 0
