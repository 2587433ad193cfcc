"""Calibration of a response file held by Dask workers: the sums over respondents added up on the client.

Every worker reads its partitions of the file once (``calibration.io`` partitions), checks them as
``read_responses`` checks a file (codes, ids, groups) and keeps them. The client gathers small
results only: each partition's problems, a 64-bit hash of each id (the ids themselves only where hashes
repeat: for repeats across partitions), group sizes and answers
per item and category, from which it judges every item's categories as the in-process reader does
(:class:`DaskTable`).

A fit runs the EM of :func:`~calibration.estimation.calibrate_groups` with a :class:`DaskGroups`
source: each E-step sends the current item parameters to every partition and adds up their expected
counts, posterior mass and log-likelihood; the observed information for the SEs is added up the same
way (the priors are added once on the client); starting values come from additive sums too
(:class:`~calibration.estimation.start.StartStatistics`). The estimates equal in-process ones to
rounding.

The rest of a calibration (checks, DIF screening and tests, anchors, the invariance ladder, quality)
runs in the client's process on a random sample of at most ``per_group`` respondents of each group
(:meth:`DaskTable.sample`); the final calibration under the resulting policy runs on every respondent
(:meth:`DaskTable.final_fit`, the pipeline's :class:`~calibration.pipeline.fits.WholeTable`). A sample
that holds every respondent makes the whole calibration equal to the in-process one.
"""

from __future__ import annotations

from collections.abc import Sequence
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

import numpy as np

from calibration.distributed.cluster import raise_repeated_ids
from calibration.errors import InputError
from calibration.estimation import EMSettings, LatentSpec, MultiGroupFit, calibrate_groups
from calibration.estimation.estep import ExpectedCounts, GroupData, expected_counts, prepare_groups
from calibration.estimation.information import observed_information
from calibration.estimation.layout import GroupLayout, slot_table
from calibration.estimation.start import StartStatistics
from calibration.io import MAX_PROBLEMS, ItemSpec, Partition, ResponseData, file_sha256, parse_codes, plan_partitions
from calibration.io.responses import (
    categories_and_models,
    category_counts,
    id_hashes,
    select_items,
    trimmed_ids,
)
from calibration.io.tables import PARTITION_BYTES, PARTITION_ROWS, check_required_columns, iter_tables, read_header
from calibration.irt.models import MODEL_2PL, MODEL_GRM, FloatArray, IntArray, ItemParameters, recode_in_place
from calibration.pipeline.fits import ProgressCallback
from calibration.pipeline.policy import PolicyTable
from calibration.pipeline.prepare import PreparedData
from calibration.pipeline.settings import SINGLE_GROUP

READ_ROWS = 65_536
"""Rows per batch when a worker reads its partition."""


@dataclass(frozen=True)
class PartitionRows:
    """One partition's answers, group labels and ids as a worker holds them, with the problems found.

    The answers are held as small integers (-1: not administered), a float table made from them only
    while a fit's rows are prepared.
    """

    codes: np.ndarray  # (rows, items), int8 or int16; -1 = not administered
    groups: list[str] | None
    ids: Any  # Arrow string array, trimmed
    problems: list[str] = field(default_factory=list)
    total: int = 0

    @property
    def n_rows(self) -> int:
        """Rows in the partition."""
        return int(self.codes.shape[0])

    def responses(self, columns: IntArray | None = None) -> FloatArray:
        """The answers of ``columns`` (default: all) as codes with NaN for not administered (a new array)."""
        codes = self.codes if columns is None else self.codes[:, columns]
        out = codes.astype(np.float64)
        out[codes < 0] = np.nan
        return out


def _small_codes(responses: FloatArray) -> np.ndarray:
    """Codes as int8 (int16, int32 when a code is larger), -1 for NaN."""
    top = np.nanmax(responses) if responses.size and not np.isnan(responses).all() else 0
    kind = np.int8 if top < 127 else (np.int16 if top < 32_767 else np.int32)
    return np.where(np.isnan(responses), -1, responses).astype(kind)


@dataclass(frozen=True)
class Census:
    """What the client gathers of a partition: rows, problems, id hashes, group sizes and answers per code."""

    n_rows: int
    problems: list[str]
    total: int
    id_hashes: np.ndarray  # uint64, one per row
    sizes: dict[str, int]
    counts: IntArray  # (n_items, highest code + 1)


def read_partition(
    partition: Partition, *, path: Path, item_ids: Sequence[str], id_column: str, group_column: str | None
) -> PartitionRows:
    """Read and check one partition: codes, ids and groups (the categories are judged over all partitions)."""
    include = [id_column, *([group_column] if group_column else []), *item_ids]
    blocks, labels, ids, problems, total = [], [], [], [], 0
    for table in iter_tables(path, READ_ROWS, include=include, partition=partition):
        codes, found, bad = parse_codes(table, list(item_ids))
        blocks.append(codes)
        trimmed, empty_ids = trimmed_ids(table, id_column)
        ids.append(trimmed)
        found = empty_ids + found
        total += bad + len(empty_ids)
        if group_column:
            texts = table.text(group_column)
            labels.extend(texts)
            empty = [f"{table.label(i)}, column {group_column!r}: no group given" for i, g in enumerate(texts) if not g]
            total += len(empty)
            found += empty
        problems.extend(found[: max(0, MAX_PROBLEMS - len(problems))])
    import pyarrow as pa

    where = partition.describe(path)
    return PartitionRows(
        _small_codes(np.concatenate(blocks)) if blocks else np.zeros((0, len(item_ids)), dtype=np.int8),
        labels if group_column else None,
        pa.chunked_array(ids, type=pa.string()).combine_chunks(),
        [f"{where}: {p}" for p in problems],
        total,
    )


def census(rows: PartitionRows) -> Census:
    """The partition's problems, id hashes, group sizes and answers per item and code."""
    sizes: dict[str, int] = {}
    for g in rows.groups or ():
        sizes[g] = sizes.get(g, 0) + 1
    counts = category_counts(rows.responses()) if not rows.total else np.zeros((rows.codes.shape[1], 1), np.int64)
    return Census(rows.n_rows, rows.problems, rows.total, id_hashes(rows.ids), sizes, counts)


def ids_with_hashes(rows: PartitionRows, *, hashes: np.ndarray) -> tuple[np.ndarray, Any]:
    """The partition's rows (positions) whose id hashes to one of ``hashes``, and those ids."""
    import pyarrow as pa

    at = np.flatnonzero(np.isin(id_hashes(rows.ids), hashes))
    return at, rows.ids.take(pa.array(at, type=pa.int64()))


def draw_sample(rows: PartitionRows, *, rates: dict[str, float], seed: int, index: int) -> PartitionRows:
    """The partition's rows kept with their group's probability (one stream per partition and seed)."""
    if all(r >= 1.0 for r in rates.values()):
        return rows
    n = rows.n_rows
    rate = (
        np.full(n, rates.get(SINGLE_GROUP, 1.0)) if rows.groups is None else np.array([rates[g] for g in rows.groups])
    )
    keep = np.random.default_rng([seed, index]).random(n) < rate
    at = np.flatnonzero(keep)
    import pyarrow as pa

    return PartitionRows(
        rows.codes[at],
        None if rows.groups is None else [rows.groups[i] for i in at],
        rows.ids.take(pa.array(at, type=pa.int64())),
    )


@dataclass(frozen=True)
class Recoding:
    """How a partition becomes the rows a fit reads: items kept, categories merged, cells not administered."""

    columns: IntArray  # positions of the kept items among the file's items
    category_maps: dict[int, list[int]]  # kept position -> answer code -> merged code
    group_names: tuple[str, ...]  # fit order (reference first); one name without a group column
    policy: PolicyTable | None = None  # excluded cells are not administered for their group


def recode_partition(rows: PartitionRows, recoding: Recoding) -> tuple[FloatArray, IntArray]:
    """The partition's responses as the fit reads them (a new float table), and each row's group position."""
    x = rows.responses(recoding.columns)
    recode_in_place(x, recoding.category_maps)
    index = np.zeros(x.shape[0], dtype=np.int64)
    if rows.groups is not None:
        position = {g: i for i, g in enumerate(recoding.group_names)}
        index = np.fromiter((position[g] for g in rows.groups), dtype=np.int64, count=len(rows.groups))
    if recoding.policy is not None:
        x = recoding.policy.administered(x, index, copy=False)  # x is this call's own table
    return x, index


def prepare_partition(
    rows: PartitionRows, *, recoding: Recoding, n_categories: IntArray, compress: bool
) -> list[GroupData]:
    """The partition's rows recoded and prepared for the E-step, one :class:`GroupData` per group (empty
    where none); the float table lives only while this runs."""
    x, index = recode_partition(rows, recoding)
    return prepare_groups(x, n_categories, index, len(recoding.group_names), compress=compress)


def partition_start(rows: PartitionRows, *, recoding: Recoding, n_categories: IntArray) -> StartStatistics:
    """The partition's recoded rows' sums for the starting values."""
    return StartStatistics.of(recode_partition(rows, recoding)[0], n_categories)


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


class DaskTable:
    """A response file read and checked by a cluster's workers, which keep its partitions.

    :meth:`open` reads and checks it (every problem of every partition in one :class:`InputError`);
    :meth:`sample` draws the rows the client's evidence rests on; :meth:`final_fit` (the pipeline's
    ``WholeTable``) and :meth:`fit` calibrate on every row. Call :meth:`release` when done.
    """

    def __init__(  # noqa: PLR0913 - what open() found, kept together
        self,
        client: Any,
        path: Path,
        rows: list[Any],
        partitions: list[Partition],
        item_ids: tuple[str, ...],
        data: ResponseData,
        sizes: dict[str, int],
        answered: dict[str, int],
    ) -> None:
        self.client, self.path, self.rows, self.partitions = client, path, rows, partitions
        self.item_ids, self.template, self._sizes = item_ids, data, sizes
        self.answered = answered  # answers to each item in the whole file
        self._sample_record: str | None = None

    @classmethod
    def open(  # noqa: PLR0913 - the cluster, the file and keyword-only options of the reader
        cls,
        client: Any,
        path: Path | str,
        *,
        id_column: str = "id",
        group_column: str | None = None,
        item_spec: Sequence[ItemSpec] | None = None,
        dichotomous_model: str = MODEL_2PL,
        polytomous_model: str = MODEL_GRM,
        partition_bytes: int = PARTITION_BYTES,
        partition_rows: int = PARTITION_ROWS,
    ) -> DaskTable:
        """Read and check ``path`` on the cluster as ``read_responses`` reads a file in this process."""
        path = Path(path)
        columns = read_header(path)
        check_required_columns(path, columns, id_column, group_column)
        item_ids, declared, notes = select_items(columns, path.name, id_column, group_column, item_spec)
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
        found: list[Census] = client.gather(client.map(census, rows, pure=False))
        total = sum(c.total for c in found)
        if total:
            problems = [p for c in found for p in c.problems]
            raise InputError(path.name, problems[:MAX_PROBLEMS], total=total)
        if not any(c.n_rows for c in found):
            raise InputError(path.name, ["the file has a header but no respondents"])
        raise_repeated_ids(client, path, partitions, [c.id_hashes for c in found], ids_with_hashes, rows)
        width = max(c.counts.shape[1] for c in found)
        counts = sum(np.pad(c.counts, ((0, 0), (0, width - c.counts.shape[1]))) for c in found)

        def locate(j: int, codes: Sequence[int]) -> tuple[list[tuple[str, int]], int]:
            places = [
                (p.describe(path), next(code for code in codes if code < c.counts.shape[1] and c.counts[j, code]))
                for p, c in zip(partitions, found, strict=True)
                if any(code < c.counts.shape[1] and c.counts[j, code] for code in codes)
            ]
            return places[:3], int(sum(counts[j, code] for code in codes))

        n_categories, models, category_problems = categories_and_models(
            counts, item_ids, declared, (dichotomous_model, polytomous_model), locate
        )
        if category_problems:
            raise InputError(path.name, category_problems[:MAX_PROBLEMS], total=len(category_problems))
        sizes: dict[str, int] = {}
        for c in found:
            for g, n in c.sizes.items():
                sizes[g] = sizes.get(g, 0) + n
        template = ResponseData(
            ids=(),
            item_ids=tuple(item_ids),
            responses=np.zeros((0, len(item_ids))),
            n_categories=n_categories,
            models=models,
            groups=() if group_column else None,
            source=path.name,
            source_sha256=file_sha256(path),
            notes=tuple(notes),
            header_lines=0,
            held_guessing={i: s.guessing for i, s in declared.items() if s.guessing is not None},
        )
        n_rows = sum(c.n_rows for c in found)
        answered = {item: int(n) for item, n in zip(item_ids, counts.sum(axis=1), strict=True)}
        return cls(client, path, rows, partitions, tuple(item_ids), template, sizes or {SINGLE_GROUP: n_rows}, answered)

    @property
    def n_persons(self) -> int:
        """Respondents in the file."""
        return sum(self._sizes.values())

    @property
    def group_sizes(self) -> dict[str, int]:
        """Respondents per group (one group named as the pipeline names it without a group column)."""
        return dict(self._sizes)

    @property
    def sample_record(self) -> str | None:
        """How the last :meth:`sample` was drawn (None: it held every respondent)."""
        return self._sample_record

    def largest_group(self) -> str:
        """The group with most respondents (ties: alphabetical), the default reference."""
        return max(sorted(self._sizes), key=lambda g: self._sizes[g])

    def sample(self, per_group: int | None, *, seed: int = 0) -> ResponseData:
        """Every row of a group with at most ``per_group`` respondents (None: no limit), else a random
        sample of about ``per_group`` of them (each row kept with probability ``per_group / size``), in
        file order, as one in-memory :class:`ResponseData`."""
        rates = {g: 1.0 if per_group is None else min(1.0, per_group / n) for g, n in self._sizes.items()}
        parts: list[PartitionRows] = self.client.gather(
            [
                self.client.submit(draw_sample, rows, rates=rates, seed=seed, index=p.index, pure=False)
                for rows, p in zip(self.rows, self.partitions, strict=True)
            ]
        )
        import pyarrow as pa

        ids = pa.chunked_array([p.ids for p in parts], type=pa.string())
        data = self.template
        sampled = any(r < 1.0 for r in rates.values())
        self._sample_record = (
            f"at most about {per_group:,} respondents per group, each group's rows drawn with probability "
            f"{per_group:,} / its size, seed {seed}"
            if sampled
            else None
        )
        return ResponseData(
            ids=tuple(ids.to_pylist()),
            item_ids=data.item_ids,
            responses=np.concatenate([p.responses() for p in parts]),
            n_categories=data.n_categories,
            models=data.models,
            groups=None if data.groups is None else tuple(g for p in parts for g in p.groups or ()),
            source=data.source,
            source_sha256=data.source_sha256,
            notes=data.notes,
            header_lines=0,
            held_guessing=data.held_guessing,
        )

    def final_fit(  # noqa: PLR0913 - the prepared sample, the policy and the fit's options
        self,
        prepared: PreparedData,
        policy: PolicyTable,
        *,
        settings: EMSettings,
        group_free: np.ndarray,
        start: np.ndarray | None,
        progress: ProgressCallback | None,
    ) -> MultiGroupFit:
        """The calibration under ``policy`` on every row, recoded as ``prepared`` recoded the sample."""
        recoding = Recoding(
            columns=np.array([self.item_ids.index(i) for i in prepared.item_ids], dtype=np.int64),
            category_maps=prepared.category_maps,
            group_names=tuple(prepared.group_names),
            policy=policy,
        )
        return self.fit(
            recoding,
            prepared.k,
            prepared.models,
            settings=settings,
            group_free=group_free,
            start=start,
            progress=None if progress is None else (lambda it, ll: progress("final", it, ll)),
        )

    def fit(  # noqa: PLR0913 - the recoding and keyword-only options of calibrate_groups
        self,
        recoding: Recoding,
        n_categories: IntArray,
        models: Sequence[str],
        *,
        settings: EMSettings,
        group_free: np.ndarray | None = None,
        start: np.ndarray | None = None,
        progress: Any = None,
    ) -> MultiGroupFit:
        """Multiple-group marginal ML of the recoded rows, the E-step and the SEs summed on the cluster."""
        from dask.distributed import wait

        client, n_groups = self.client, len(recoding.group_names)
        if start is None:
            stats = client.gather(
                client.map(partition_start, self.rows, recoding=recoding, n_categories=n_categories, pure=False)
            )
            merged = stats[0]
            for more in stats[1:]:
                merged = merged.merge(more)
            table = slot_table(merged.values(n_categories, tuple(models)))
            start = np.broadcast_to(table, (n_groups, *table.shape)).copy()
        prepared = client.map(
            prepare_partition,
            self.rows,
            recoding=recoding,
            n_categories=n_categories,
            compress=settings.compress_patterns,
            pure=False,
        )
        wait(prepared)  # held on the workers from here (not gathered)
        try:
            return calibrate_groups(
                np.zeros((0, len(n_categories))),
                n_categories,
                np.zeros(0, dtype=np.int64),
                n_groups,
                models=tuple(models),
                settings=settings,
                group_free=group_free,
                start=start,
                progress=progress,
                warn=False,
                source=DaskGroups(client, prepared, n_groups, self.n_persons),
            )
        finally:
            del prepared

    def release(self) -> None:
        """Let the workers drop the partitions."""
        self.rows = []


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

    Items, categories and models as ``read_responses`` judges them (``models`` overrides the models).
    Groups: the reference (default: the largest) first, then the others in sorted order. With no group
    column, one group. No checks beyond the file's (see the pipeline for those).
    """
    settings = settings or EMSettings()
    table = DaskTable.open(
        client,
        path,
        id_column=id_column,
        group_column=group_column,
        partition_bytes=partition_bytes,
        partition_rows=partition_rows,
    )
    try:
        names = sorted(table.group_sizes)
        reference = reference_group or table.largest_group()
        if reference not in names:
            raise InputError(
                table.path.name, [f"reference group {reference!r} is not among the groups {', '.join(names)}"]
            )
        group_names = (reference, *(g for g in names if g != reference))
        k = table.template.n_categories
        recoding = Recoding(np.arange(len(table.item_ids)), {}, group_names)
        fit = table.fit(recoding, k, tuple(models) if models else table.template.models, settings=settings)
    finally:
        table.release()
    return DaskCalibration(fit, table.item_ids, group_names, k, len(table.partitions))
