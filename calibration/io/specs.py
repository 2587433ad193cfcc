"""Side files: the item spec (models, keys, inclusion) and a reviewer's policy overrides."""

from __future__ import annotations

from pathlib import Path
from typing import TYPE_CHECKING

from calibration.errors import InputError

if TYPE_CHECKING:
    pass

from calibration.io.responses import ItemSpec
from calibration.io.tables import MAX_PROBLEMS, read_table, row_label, table_rows
from calibration.irt.models import MODEL_3PL, MODELS, RIGHT_WRONG_MODELS


def read_item_spec(path: Path) -> list[ItemSpec]:
    """Read an item spec CSV: columns ``item`` (required), ``model``, ``categories``, ``include``, ``label`` and
    ``guessing`` (a 3PL item's lower asymptote held at that value; empty: estimated)."""
    table = read_table(path)
    columns, header = table.columns, table.header_lines
    if "item" not in columns:
        raise InputError(path.name, [f"the item spec needs an 'item' column; found {', '.join(columns)}"])
    known = {"item", "model", "categories", "include", "label", "guessing"}
    problems = [f"unknown column {c!r} (known: {', '.join(sorted(known))})" for c in columns if c not in known]
    specs: list[ItemSpec] = []
    seen: set[str] = set()
    for i, row in enumerate(table_rows(table, list(known))):
        where = row_label(i, header)
        item = row["item"]
        if not item:
            problems.append(f"{where}: empty item id")
            continue
        if item in seen:
            problems.append(f"{where}: item {item!r} is listed twice")
        seen.add(item)
        model = row["model"].lower() or None
        if model is not None and model not in MODELS:
            problems.append(f"{where}, column 'model': {model!r} is not one of {', '.join(MODELS)}")
        raw_k = row["categories"]
        n_categories = None
        if raw_k:
            if not raw_k.isdigit() or int(raw_k) < 2:
                problems.append(f"{where}, column 'categories': {raw_k!r} is not a whole number >= 2")
            else:
                n_categories = int(raw_k)
        if model in RIGHT_WRONG_MODELS and n_categories not in (None, 2):
            problems.append(f"{where}: model {model} needs 2 categories, the spec says {n_categories}")
        guessing = None
        raw_g = row["guessing"]
        if raw_g:
            try:
                guessing = float(raw_g)
            except ValueError:
                guessing = float("nan")
            if not 0.0 <= guessing < 1.0:
                problems.append(f"{where}, column 'guessing': {raw_g!r} is not a number in [0, 1)")
                guessing = None
            elif model != MODEL_3PL:
                problems.append(f"{where}, column 'guessing': only a 3pl item has a lower asymptote (model {model})")
                guessing = None
        include_raw = row["include"].lower()
        if include_raw not in ("", "yes", "no", "true", "false", "1", "0"):
            problems.append(f"{where}, column 'include': {include_raw!r} is not yes/no")
        include = include_raw not in ("no", "false", "0")
        specs.append(ItemSpec(item, model, n_categories, include, row["label"], guessing))
    if problems:
        raise InputError(path.name, problems[:MAX_PROBLEMS], total=len(problems))
    return specs


def read_policy_overrides(path: Path) -> list[tuple[str, str, str, str]]:
    """Reviewer decisions: CSV columns ``item``, ``group``, ``status`` and ``note`` (all required).

    Returns (item, group, status, note) tuples; statuses and names are checked
    against the calibration by the pipeline, which knows the items and groups. A file written by
    ``equitheta review`` also has a ``proposed`` column: a row whose status is still the proposed one
    and has no note is no decision and is skipped; every other column is context and ignored.
    """
    table = read_table(path)
    needed = ["item", "group", "status", "note"]
    missing = [c for c in needed if c not in table.columns]
    if missing:
        raise InputError(
            path.name, [f"the policy override file needs columns {', '.join(needed)}; missing: {', '.join(missing)}"]
        )
    columns = needed + (["proposed"] if "proposed" in table.columns else [])
    out, problems = [], []
    for i, row in enumerate(table_rows(table, columns)):
        values = [row[c] for c in needed]
        if row.get("proposed") and values[2].lower() == row["proposed"].lower() and not values[3]:
            continue  # the proposal kept: no decision to record
        empty = [c for c, v in zip(needed, values, strict=True) if not v]
        if empty:
            problems.append(f"{row_label(i, table.header_lines)}: empty {', '.join(empty)}")
            continue
        out.append((values[0], values[1], values[2].lower(), values[3]))
    if problems:
        raise InputError(path.name, problems[:MAX_PROBLEMS], total=len(problems))
    return out
