"""The calibration's sums over respondents on Dask: partitions read and held by the workers.

Every worker reads its partitions of the response file once (``calibration.io`` partitions), checks
their codes and keeps them prepared for the E-step (:class:`~calibration.estimation.estep.GroupData`
per group, patterns compressed). The client runs the EM of
:func:`~calibration.estimation.calibrate_groups` with a :class:`DaskGroups` source: each E-step sends
the current item parameters to every partition and adds up their expected counts, posterior mass and
log-likelihood; the observed information for the SEs is added up the same way (each respondent's
terms are a sum over respondents; the priors are added once on the client). Starting values come from
additive sums too (:class:`~calibration.estimation.start.StartStatistics`). So the client holds a few
(items x categories x points) tables, never the response table, and the estimates equal in-process
ones to rounding.
"""

from __future__ import annotations

from collections.abc import Sequence
from dataclasses import dataclass
from pathlib import Path
from typing import Any

import numpy as np

from calibration.errors import InputError
from calibration.estimation import EMSettings, LatentSpec, MultiGroupFit, calibrate_groups
from calibration.estimation.estep import ExpectedCounts, GroupData, expected_counts, prepare_groups
from calibration.estimation.information import observed_information
from calibration.estimation.layout import GroupLayout, slot_table
from calibration.estimation.start import StartStatistics
from calibration.io import MAX_PROBLEMS, Partition, parse_codes, plan_partitions, read_header
from calibration.io.tables import PARTITION_BYTES, PARTITION_ROWS, iter_tables
from calibration.irt.models import FloatArray, IntArray, ItemParameters

READ_ROWS = 65_536
"""Rows per batch when a worker reads its partition."""


@dataclass(frozen=True)
class PartitionRows:
    """One partition's answers and group labels, as a worker holds them."""

    responses: FloatArray
    groups: list[str] | None


def read_partition(
    partition: Partition, *, path: Path, item_ids: Sequence[str], id_column: str, group_column: str | None
) -> PartitionRows:
    """Read and check one partition (codes only: the categories are judged over all partitions)."""
    include = [id_column, *([group_column] if group_column else []), *item_ids]
    blocks, labels, problems, total = [], [], [], 0
    for table in iter_tables(path, READ_ROWS, include=include, partition=partition):
        codes, found, bad = parse_codes(table, list(item_ids))
        blocks.append(codes)
        problems.extend(found[: max(0, MAX_PROBLEMS - len(problems))])
        total += bad
        if group_column:
            texts = table.text(group_column)
            labels.extend(texts)
            empty = [i for i, g in enumerate(texts) if not g]
            total += len(empty)
            problems.extend(
                f"{table.label(i)}, column {group_column!r}: no group given"
                for i in empty[: MAX_PROBLEMS - len(problems)]
            )
    if total:
        where = partition.describe(path)
        raise InputError(path.name, [f"{where}: {p}" for p in problems], total=total)
    responses = np.concatenate(blocks) if blocks else np.zeros((0, len(item_ids)))
    return PartitionRows(responses, labels if group_column else None)


def partition_summary(rows: PartitionRows) -> tuple[int, FloatArray, dict[str, int]]:
    """Rows, each item's highest code (NaN: none answered) and the count of each group."""
    with np.errstate(all="ignore"):
        top = np.nanmax(rows.responses, axis=0) if rows.responses.shape[0] else np.full(rows.responses.shape[1], np.nan)
    counts: dict[str, int] = {}
    for g in rows.groups or ():
        counts[g] = counts.get(g, 0) + 1
    return rows.responses.shape[0], top, counts


def prepare_partition(
    rows: PartitionRows, *, n_categories: IntArray, group_names: Sequence[str], compress: bool
) -> list[GroupData]:
    """The partition's rows prepared for the E-step, one :class:`GroupData` per group (empty where none)."""
    position = {g: i for i, g in enumerate(group_names)}
    index = np.zeros(rows.responses.shape[0], dtype=np.int64)
    if rows.groups is not None:
        index = np.fromiter((position[g] for g in rows.groups), dtype=np.int64, count=len(rows.groups))
    return prepare_groups(rows.responses, n_categories, index, len(group_names), compress=compress)


def partition_start(rows: PartitionRows, *, n_categories: IntArray) -> StartStatistics:
    """The partition's sums for the starting values."""
    return StartStatistics.of(rows.responses, n_categories)


def partition_expected(
    groups: list[GroupData], *, params: Sequence[ItemParameters], points: FloatArray, log_priors: Sequence[FloatArray]
) -> list[ExpectedCounts | None]:
    """The partition's E-step sums per group (None for a group with no rows here)."""
    return [
        None if d.n_persons == 0 else expected_counts(params[g], d.design, points, log_priors[g], d.weights)
        for g, d in enumerate(groups)
    ]


def partition_information(  # noqa: PLR0913 - the partition and the fit's state
    groups: list[GroupData],
    *,
    tables: FloatArray,
    template: ItemParameters,
    points: FloatArray,
    latent: LatentSpec,
    layout: GroupLayout,
) -> FloatArray:
    """The partition's share of the observed information (no priors)."""
    return observed_information(tables, template, groups, points, latent, layout, None, with_priors=False)


class DaskGroups:
    """A :class:`~calibration.estimation.sources.GroupSource` whose rows are partitions held by Dask workers."""

    def __init__(self, client: Any, partitions: list[Any], n_groups: int, n_persons: int) -> None:
        self.client, self.partitions, self.n_groups, self._n_persons = client, partitions, n_groups, n_persons

    @property
    def n_persons(self) -> int:
        """Respondents in all groups."""
        return self._n_persons

    def expected(
        self, params: Sequence[ItemParameters], points: FloatArray, log_priors: Sequence[FloatArray]
    ) -> list[ExpectedCounts]:
        """Every partition's E-step sums, added up per group."""
        parts = self.client.gather(
            self.client.map(
                partition_expected, self.partitions, params=params, points=points, log_priors=log_priors, pure=False
            )
        )
        out = []
        for g in range(self.n_groups):
            mine = [p[g] for p in parts if p[g] is not None]
            out.append(
                ExpectedCounts(
                    counts=sum(m.counts for m in mine),
                    point_mass=sum(m.point_mass for m in mine),
                    log_likelihood=float(sum(m.log_likelihood for m in mine)),
                )
            )
        return out

    def information(
        self, tables: FloatArray, template: ItemParameters, points: FloatArray, latent: LatentSpec, layout: GroupLayout
    ) -> FloatArray:
        """Every partition's share of the observed information, added up."""
        shares = self.client.map(
            partition_information,
            self.partitions,
            tables=tables,
            template=template,
            points=points,
            latent=latent,
            layout=layout,
            pure=False,
        )
        return sum(self.client.gather(shares))


@dataclass(frozen=True)
class DaskCalibration:
    """A calibration fitted on Dask: the fit, the items and groups in its order, and the partitions read."""

    fit: MultiGroupFit
    item_ids: tuple[str, ...]
    group_names: tuple[str, ...]
    n_categories: IntArray
    n_partitions: int


def calibrate_file_on_dask(  # noqa: PLR0913 - the cluster, the file and keyword-only options
    client: Any,
    path: Path,
    *,
    id_column: str = "id",
    group_column: str | None = None,
    reference_group: str | None = None,
    models: Sequence[str] | None = None,
    settings: EMSettings | None = None,
    partition_bytes: int = PARTITION_BYTES,
    partition_rows: int = PARTITION_ROWS,
) -> DaskCalibration:
    """Multiple-group marginal ML of every item column of ``path`` with the E-step on ``client``'s cluster.

    Categories are each item's highest code + 1 over the whole file; ``models`` default to 2PL for two
    categories and graded otherwise. Groups: the reference (default: the largest) first, then the others
    in sorted order. With no group column, one group.
    """
    path = Path(path)
    settings = settings or EMSettings()
    item_ids = tuple(c for c in read_header(path) if c not in (id_column, group_column))
    partitions = plan_partitions(path, partition_bytes=partition_bytes, partition_rows=partition_rows)
    rows = client.map(
        read_partition,
        partitions,
        path=path.resolve(),
        item_ids=item_ids,
        id_column=id_column,
        group_column=group_column,
        pure=False,
    )
    summaries = client.gather(client.map(partition_summary, rows, pure=False), errors="raise")
    n_persons = sum(s[0] for s in summaries)
    with np.errstate(all="ignore"):
        top = np.nanmax(np.stack([s[1] for s in summaries]), axis=0)
    if np.isnan(top).any():
        empty = [i for i, t in zip(item_ids, top, strict=True) if np.isnan(t)]
        raise InputError(path.name, [f"item {i!r}: no respondent answered it" for i in empty])
    k = np.maximum(top.astype(np.int64) + 1, 2)
    sizes: dict[str, int] = {}
    for s in summaries:
        for g, n in s[2].items():
            sizes[g] = sizes.get(g, 0) + n
    names = sorted(sizes) or ["all"]
    reference = reference_group or (max(sorted(sizes), key=lambda g: sizes[g]) if sizes else "all")
    if reference not in names:
        raise InputError(path.name, [f"reference group {reference!r} is not among the groups {', '.join(names)}"])
    group_names = (reference, *(g for g in names if g != reference))
    models = tuple(models) if models else tuple("2pl" if kk == 2 else "grm" for kk in k)
    prepared = client.map(
        prepare_partition,
        rows,
        n_categories=k,
        group_names=group_names if group_column else ("all",),
        compress=settings.compress_patterns,
        pure=False,
    )
    stats = client.gather(client.map(partition_start, rows, n_categories=k, pure=False))
    merged = stats[0]
    for more in stats[1:]:
        merged = merged.merge(more)
    start = slot_table(merged.values(k, models))
    from dask.distributed import wait

    wait(prepared)  # held on the workers from here (not gathered); the raw partitions can go
    del rows
    n_groups = len(group_names) if group_column else 1
    fit = calibrate_groups(
        np.zeros((0, len(item_ids))),
        k,
        np.zeros(0, dtype=np.int64),
        n_groups,
        models=models,
        settings=settings,
        start=np.broadcast_to(start, (n_groups, *start.shape)).copy(),
        source=DaskGroups(client, prepared, n_groups, n_persons),
    )
    return DaskCalibration(fit, item_ids, group_names if group_column else ("all",), k, len(partitions))
