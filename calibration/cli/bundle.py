"""`equitheta bundle list|show|diff|alias|alias-back|schema`."""

from __future__ import annotations

import argparse
import json

from calibration.bundle import Bundle, parse_reference, resolve
from calibration.cli import UsageError, command_line_mover, store_from
from calibration.cli.console import new_table, out_console
from calibration.cli.render import (
    print_alias_history,
    print_bundle_details,
    print_bundle_diff,
    print_calibration_summary,
)
from calibration.errors import BundleIntegrityError


def run_bundle(args: argparse.Namespace) -> int:
    """``equitheta bundle``: list, show or alias published bundles."""
    console = out_console()
    if args.bundle_command == "schema":
        console.print_json(json.dumps(Bundle.model_json_schema()))
        return 0
    store = store_from(args.store)
    if args.bundle_command == "list":
        names = store.names()
        if not names:
            console.print("no bundles in this store", highlight=False)
            return 0
        table = new_table("bundles", ["name", "versions", "aliases"])
        damaged: list[str] = []
        for name in names:
            aliases = ", ".join(f"{a} -> {r.version}" for a, r in sorted(store.aliases(name).items()))
            versions = []
            for version in store.versions(name):
                try:
                    store.get(name, version)  # verifies the hash: a damaged version is marked, not hidden
                    versions.append(str(version))
                except BundleIntegrityError as exc:
                    versions.append(f"{version} (DAMAGED)")
                    damaged.append(f"{name}@{version}: {exc}" + (f" ({exc.location})" if exc.location else ""))
            table.add_row(name, ", ".join(versions), aliases or "-")
        console.print(table)
        for line in damaged:
            console.print(f"  damaged: {line}", highlight=False)
        return 0
    if args.bundle_command == "show":
        bundle = resolve(store, args.reference)
        if args.json:
            console.print_json(bundle.model_dump_json())
        else:
            print_calibration_summary(bundle)
            print_bundle_details(bundle)
            print_alias_history(bundle.name, store.aliases(bundle.name))
        return 0
    if args.bundle_command == "diff":
        from calibration.bundle.compare import compare_versions

        diff = compare_versions(resolve(store, args.older), resolve(store, args.newer), store.get)
        if args.json:
            console.print_json(diff.model_dump_json())
        else:
            print_bundle_diff(diff)
        return 0
    if args.bundle_command == "alias":
        name, ref = parse_reference(args.reference)
        if not isinstance(ref, int):
            raise UsageError("bundle alias needs NAME@VERSION, e.g. skills@3")
        record = store.set_alias(name, args.alias, ref, by=command_line_mover())
        console.print(f"{name}: alias {record.alias} -> {record.version}", highlight=False)
        return 0
    if args.bundle_command == "alias-back":
        record = store.alias_back(args.name, args.alias, by=command_line_mover())
        console.print(f"{args.name}: alias {record.alias} moved back -> {record.version}", highlight=False)
        return 0
    return 1
