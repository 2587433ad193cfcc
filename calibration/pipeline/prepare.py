"""Data preparation: every check that needs no model fit, and the merging of sparse categories."""

from __future__ import annotations

from collections.abc import Mapping, Sequence
from dataclasses import dataclass
from functools import cached_property

import numpy as np

from calibration.bundle.schema import ExcludedItem
from calibration.errors import CalibrationInputError
from calibration.io import ResponseData
from calibration.irt.models import recode_in_place
from calibration.pipeline.policy import check_overrides
from calibration.pipeline.settings import (
    HARD_MIN_PER_GROUP,
    HARD_MIN_RESPONDENTS,
    MIN_CATEGORY_COUNT,
    RECOMMENDED_MIN_RESPONDENTS,
    SINGLE_GROUP,
    PipelineSettings,
    PolicyOverride,
)
from calibration.vocabulary import DIF_ACTIONS


def _group_setup(data: ResponseData, reference_group: str | None) -> tuple[list[str], np.ndarray]:
    """Group names with the reference first, and each row's group index."""
    if data.groups is None:
        return [SINGLE_GROUP], np.zeros(data.n_persons, dtype=np.int64)
    labels = np.asarray(data.groups, dtype=object)
    names, counts = np.unique(labels, return_counts=True)
    names = [str(n) for n in names]
    if reference_group is None:
        # Default reference: the largest group (ties: alphabetical).
        reference_group = names[int(np.argmax(counts))]
    if reference_group not in names:
        raise CalibrationInputError(
            f"reference group {reference_group!r} is not in the data (groups: {', '.join(names)})"
        )
    ordered = [reference_group] + [n for n in names if n != reference_group]
    lookup = {n: i for i, n in enumerate(ordered)}
    return ordered, np.array([lookup[str(g)] for g in labels], dtype=np.int64)


@dataclass(frozen=True)
class PreparedData:
    """The checked data a calibration runs on: group order, items kept, categories merged."""

    group_names: list[str]  # reference first
    group_index: np.ndarray  # each row's group position
    x: np.ndarray  # (n_persons, n_items kept), merged categories applied
    item_ids: tuple[str, ...]
    k: np.ndarray
    models: tuple[str, ...]
    category_maps: dict[int, list[int]]
    excluded_items: list[ExcludedItem]
    no_variance_cells: dict[tuple[int, int], str]
    notes: list[str]
    held_guessing: tuple[float, ...] = ()  # per kept item: a 3PL asymptote the item spec holds, else NaN

    @property
    def n_groups(self) -> int:
        """Number of groups (1 without a group column)."""
        return len(self.group_names)

    @property
    def n_items(self) -> int:
        """Number of items kept for the calibration."""
        return len(self.item_ids)

    @cached_property
    def model_responses(self) -> np.ndarray:
        """The responses every model fits, built once and read-only.

        Cells without variance in a group count as not administered there.
        """
        x_model = self.x.copy()
        for j, g in self.no_variance_cells:
            x_model[self.group_index == g, j] = np.nan
        x_model.flags.writeable = False
        return x_model


def prepare_data(
    data: ResponseData,
    *,
    settings: PipelineSettings,
    reference_group: str | None = None,
    overrides: Sequence[PolicyOverride] = (),
    whole_sizes: Mapping[str, int] | None = None,
) -> PreparedData:
    """Every check that needs no model fit: sizes, variance, sparse categories, overrides, anchors.

    ``whole_sizes``: respondents per group in the whole table when ``data`` is a random sample of it
    (the notes on small groups then say which evidence rests on the sample and which on everyone).

    Raises :class:`CalibrationInputError` naming what is wrong; cheap enough to run before a
    progress display starts (the command line does).
    """
    if settings.dif_action not in DIF_ACTIONS:
        raise CalibrationInputError(f"dif action {settings.dif_action!r} is not one of {', '.join(DIF_ACTIONS)}")
    group_names, group_index = _group_setup(data, reference_group)
    n_groups = len(group_names)
    notes: list[str] = []
    if data.n_persons < HARD_MIN_RESPONDENTS:
        raise CalibrationInputError(
            f"{data.source}: {data.n_persons} respondents; a calibration needs at least {HARD_MIN_RESPONDENTS} "
            f"(about {RECOMMENDED_MIN_RESPONDENTS} per group is a common floor for 2PL and graded items)"
        )
    sizes = np.bincount(group_index, minlength=n_groups)
    if settings.min_group_size < HARD_MIN_PER_GROUP:
        raise CalibrationInputError(
            f"the minimum group size cannot be set below {HARD_MIN_PER_GROUP} (the hard floor; see the "
            f"documentation of HARD_MIN_PER_GROUP), got {settings.min_group_size}"
        )
    if n_groups > 1:
        small = [f"{group_names[g]} ({sizes[g]})" for g in range(n_groups) if sizes[g] < settings.min_group_size]
        if small:
            raise CalibrationInputError(
                f"{data.source}: groups with fewer than {settings.min_group_size} respondents cannot be calibrated "
                f"or screened for DIF: {', '.join(small)}; merge or drop them"
            )
    notes.extend(small_group_notes(group_names, sizes, multiple=n_groups > 1, whole_sizes=whole_sizes))

    # Items without variance: out of the calibration if so in the reference group, else out for that group.
    x_all = data.responses
    excluded_items: list[ExcludedItem] = []
    no_variance_cells: dict[tuple[int, int], str] = {}
    keep: list[int] = []
    for j, item in enumerate(data.item_ids):
        ref_values = np.unique(x_all[(group_index == 0) & ~np.isnan(x_all[:, j]), j])
        all_values = np.unique(x_all[~np.isnan(x_all[:, j]), j])
        if all_values.size <= 1 or ref_values.size <= 1:
            where = "" if n_groups == 1 else f" in the reference group {group_names[0]!r}"
            answered = int(np.sum(~np.isnan(x_all[group_index == 0, j]) if n_groups > 1 else ~np.isnan(x_all[:, j])))
            value = int(ref_values[0]) if ref_values.size else None
            reason = f"no variance{where}: all {answered} respondents who answered gave category {value}"
            excluded_items.append(ExcludedItem(id=item, reason=reason))
            notes.append(f"item {item!r} left out of the calibration: {reason}")
            continue
        keep.append(j)
        for g in range(1, n_groups):
            values = np.unique(x_all[(group_index == g) & ~np.isnan(x_all[:, j]), j])
            if values.size <= 1:
                no_variance_cells[(len(keep) - 1, g)] = (
                    f"no variance in group {group_names[g]!r}: every answer was category "
                    f"{int(values[0]) if values.size else 'none'}"
                )
    if len(keep) < 2:
        raise CalibrationInputError(f"{data.source}: fewer than two items with variance; nothing to calibrate")
    # Every item kept: a read-only view of the data's own table, copied only if a category merge changes it.
    shared = len(keep) == x_all.shape[1]
    x = x_all.view() if shared else x_all[:, keep]
    x.flags.writeable = not shared
    item_ids = tuple(data.item_ids[j] for j in keep)
    k = data.n_categories[keep].copy()
    category_maps: dict[int, list[int]] = {}
    for j in range(len(keep)):
        merged = collapse_sparse_categories(x[:, j], int(k[j]), group_index, group_names)
        if merged is not None:
            mapping, note = merged
            if shared:
                x, shared = x_all.copy(), False
            recode_in_place(x, {j: mapping})
            category_maps[j] = mapping
            k[j] = max(mapping) + 1
            notes.append(f"item {item_ids[j]!r}: {note}; scoring applies the same recoding")
    # Reviewer overrides and named anchors are checked now, before the long steps.
    check_overrides(overrides, item_ids, group_names)
    _check_anchors(settings.dif.anchors, item_ids, data.item_ids, excluded_items, n_groups)
    # An item merged down to two categories becomes a 2PL item.
    models = tuple("2pl" if k[pos] == 2 and data.models[j] == "grm" else data.models[j] for pos, j in enumerate(keep))
    held = tuple(data.held_guessing.get(item, float("nan")) for item in item_ids)
    return PreparedData(
        group_names,
        group_index,
        x,
        item_ids,
        k,
        models,
        category_maps,
        excluded_items,
        no_variance_cells,
        notes,
        held if data.held_guessing else (),
    )


def small_group_notes(
    group_names: list[str], sizes: np.ndarray, *, multiple: bool, whole_sizes: Mapping[str, int] | None = None
) -> list[str]:
    """What a group below the recommended size means for its evidence, in words.

    ``whole_sizes``: each group's respondents in the whole table when ``sizes`` count a random sample of it.
    """
    out = []
    for name, n in zip(group_names, sizes, strict=True):
        everyone = int(n) if whole_sizes is None else int(whole_sizes[name])
        if n < RECOMMENDED_MIN_RESPONDENTS <= everyone:
            out.append(
                f"group {name!r}: the evidence sample holds {int(n):,} of its {everyone:,} respondents, below the "
                f"common floor of about {RECOMMENDED_MIN_RESPONDENTS}: the item fit (S-X2), the residual PCA"
                + (", the DIF tests and Mantel-Haenszel strata and the effect sizes" if multiple else "")
                + f" rest on those {int(n):,} and are imprecise; the item parameters, their SEs"
                + (" and the group's latent mean and SD" if multiple else "")
                + f" use all {everyone:,}; a larger evidence sample strengthens the evidence"
            )
            continue
        n = everyone
        if n >= RECOMMENDED_MIN_RESPONDENTS:
            continue
        what = "item-parameter SEs are wide; the S-X2 item fit and the residual PCA rest on sparse cells"
        if multiple:
            what += (
                "; its latent mean and SD and any group-specific parameters are imprecise; DIF tests have low "
                "power, so the absence of a flag is weak evidence of invariance; Mantel-Haenszel strata are "
                "sparse; effect sizes carry wide intervals (effect_theta_se)"
            )
        out.append(
            f"group {name!r}: {int(n)} respondents is below the common floor of about {RECOMMENDED_MIN_RESPONDENTS} "
            f"for 2PL/graded calibration (Jiang, Wang & Weiss 2016): {what}"
        )
    return out


def _check_anchors(
    anchors: Sequence[str],
    item_ids: tuple[str, ...],
    all_items: tuple[str, ...],
    excluded_items: list[ExcludedItem],
    n_groups: int,
) -> None:
    """Named anchors must be calibrated items of a multiple-group calibration."""
    if not anchors:
        return
    if n_groups == 1:
        raise CalibrationInputError("anchors apply only to a multiple-group calibration (give a group column)")
    dropped = {e.id: e.reason for e in excluded_items}
    problems = []
    for anchor in anchors:
        if anchor in dropped:
            problems.append(f"anchor {anchor!r} was left out of the calibration ({dropped[anchor]})")
        elif anchor not in item_ids:
            near = [i for i in all_items if i.lower() == anchor.lower()]
            hint = f" (did you mean {near[0]!r}?)" if near else ""
            problems.append(f"anchor {anchor!r} is not an item of the data{hint}")
    if problems:
        raise CalibrationInputError("; ".join(problems))


def collapse_sparse_categories(
    column: np.ndarray, n_categories: int, group_index: np.ndarray, group_names: list[str]
) -> tuple[list[int], str] | None:
    """Merge graded categories with fewer than MIN_CATEGORY_COUNT answers in any group into a neighbour.

    The sparsest category goes into its smaller neighbour (the end categories into
    their only neighbour) until every category is well filled or two remain.
    Returns (answer code -> new code, a note naming what was merged and why) or None.
    """
    if n_categories < 3:
        return None
    n_groups = len(group_names)
    mapping = list(range(n_categories))
    merged_notes = []
    while max(mapping) >= 2:
        k_now = max(mapping) + 1
        counts = np.zeros((n_groups, k_now))
        for g in range(n_groups):
            values = column[(group_index == g) & ~np.isnan(column)].astype(np.int64)
            counts[g] = np.bincount(np.asarray(mapping)[values], minlength=k_now)
        worst = counts.min(axis=0)
        c = int(np.argmin(worst))
        if worst[c] >= MIN_CATEGORY_COUNT:
            break
        group = int(np.argmin(counts[:, c]))
        if c == 0:
            into = 1
        elif c == k_now - 1:
            into = k_now - 2
        else:
            into = c - 1 if counts[:, c - 1].min() <= counts[:, c + 1].min() else c + 1
        low, high = min(c, into), max(c, into)
        raw = [code for code, m in enumerate(mapping) if m in (low, high)]
        where = "" if n_groups == 1 else f" in group {group_names[group]!r}"
        merged_notes.append(
            f"answer codes {', '.join(map(str, raw))} merged (a category had {int(counts[group, c])} "
            f"answers{where}, below {MIN_CATEGORY_COUNT})"
        )
        mapping = [m if m <= low else m - 1 for m in mapping]
    if not merged_notes:
        return None
    return mapping, "; ".join(merged_notes)
