"""Score a response file on a Dask cluster, partition by partition, with the same rows as in-process scoring.

Every task reads its partition (``calibration.io.plan_partitions``: whole lines of a CSV file, whole
row groups of a Parquet file), validates it as ``equitheta score`` validates a file, scores it with
the bundle and writes its part under a temporary directory next to the output, by a temporary name
renamed into place (a task that Dask runs again after a worker died writes the same part again: no
row twice, none missing). The client gathers small outcomes: the problems found (named by file,
partition and row), a 64-bit hash of each id (for ids repeated across partitions; only the partitions
holding a repeated hash are read again for the ids themselves) and the figures of the closing summary.
Only when every partition is clean does the output appear: a directory of Parquet parts, or one CSV file
assembled in partition order. The workers must see the input and output paths (a local cluster, or a
shared file system).
"""

from __future__ import annotations

import functools
import os
import shutil
import tempfile
import uuid
from collections import Counter
from collections.abc import Callable
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

import numpy as np

from calibration.bundle import Bundle
from calibration.bundle.canonical import from_bytes, to_bytes
from calibration.bundle.scorer import BundleScorer, UnknownGroup
from calibration.distributed.cluster import dask_client, raise_repeated_ids
from calibration.errors import InputError
from calibration.io import MAX_PROBLEMS, Partition, ScoringInput, plan_partitions, row_label
from calibration.io.responses import id_hashes
from calibration.io.scores import SCORE_COLUMNS, score_rows, score_table
from calibration.io.tables import PARTITION_BYTES, PARTITION_ROWS
from calibration.io.write import atomic_output, csv_line


@dataclass(frozen=True)
class ScoreJob:
    """What every task needs: the file, the bundle (its canonical bytes), the options and where parts go."""

    path: Path
    bundle_bytes: bytes
    parts: Path
    csv: bool
    id_column: str = "id"
    group_column: str | None = None
    ignore_columns: tuple[str, ...] = ()
    method: str | None = None
    unknown_to_reference: bool = False


@dataclass
class PartOutcome:
    """One partition's result: rows scored, problems found, ids, and the summary's figures."""

    index: int
    n_rows: int = 0
    problems: list[str] = field(default_factory=list)
    total: int = 0
    notes: list[str] = field(default_factory=list)
    id_hashes: list[np.ndarray] = field(default_factory=list)  # a 64-bit hash per id, one array per batch
    theta: Any = None
    se: Any = None
    scale: Any = None
    flags: Counter[str] = field(default_factory=Counter)
    method: str = ""


@functools.lru_cache(maxsize=4)
def _scorer(bundle_bytes: bytes) -> BundleScorer:
    """One scorer per bundle per worker process (verified from its canonical bytes)."""
    return BundleScorer(from_bytes(bundle_bytes, source="the job's bundle"))


def part_name(index: int, *, csv: bool) -> str:
    """The file name of partition ``index``'s part."""
    return f"part-{index:05d}.{'csv' if csv else 'parquet'}"


def _opened(job: ScoreJob, scorer: BundleScorer, partition: Partition) -> ScoringInput:
    """The partition's rows, read and checked as ``equitheta score`` reads a file."""
    return ScoringInput(
        job.path,
        item_categories=scorer.item_categories,
        id_column=job.id_column,
        group_column=job.group_column,
        ignore_columns=job.ignore_columns,
        partition=partition,
    )


def score_partition(job: ScoreJob, partition: Partition) -> PartOutcome:
    """Validate and score one partition, write its part; problems come back as data, not as an exception."""
    scorer = _scorer(job.bundle_bytes)
    outcome = PartOutcome(partition.index)
    try:
        opened = _opened(job, scorer, partition)
        outcome.notes = list(opened.notes)
        pieces, unknown = [], []
        for batch in opened.batches():
            try:
                groups = scorer.resolve_groups(
                    batch.groups, len(batch.ids), unknown_to_reference=job.unknown_to_reference
                )
            except UnknownGroup as exc:
                unknown.extend((batch.first_row + i, batch.ids[i].as_py(), g) for i, g in exc.problems)
                continue
            result = scorer.score(batch.responses, groups, method=job.method)
            pieces.append(
                score_rows(scorer, batch.ids, groups, result)
                if job.csv
                else score_table(scorer, batch.ids, groups, result)
            )
            outcome.id_hashes.append(id_hashes(batch.ids))
            ok = np.isfinite(result.theta)
            outcome.theta = _append(outcome.theta, result.theta[ok])
            outcome.se = _append(outcome.se, result.se[ok])
            outcome.scale = _append(outcome.scale, result.scale_score[ok])
            outcome.flags.update(f for flags in result.flags for f in flags)
            outcome.method = result.method
            outcome.n_rows += len(result.theta)
    except InputError as exc:
        where = partition.describe(job.path)
        outcome.problems = [p if p.startswith(where) else f"{where}: {p}" for p in exc.problems]
        outcome.total = exc.total
        return outcome
    if unknown:
        outcome.problems = [_unknown_line(partition, job, scorer, *u) for u in unknown[:MAX_PROBLEMS]]
        outcome.total = len(unknown)
        return outcome
    _write_part(job, partition, pieces)
    return outcome


def ids_with_hashes(job: ScoreJob, partition: Partition, *, hashes: np.ndarray) -> tuple[np.ndarray, Any]:
    """The partition's rows (positions in it) whose id hashes to one of ``hashes``, and those ids: the
    partition read again, only when some hash repeats (the ids themselves never travel otherwise)."""
    import pyarrow as pa

    scorer = _scorer(job.bundle_bytes)
    opened = _opened(job, scorer, partition)
    positions, ids = [], []
    for batch in opened.batches():
        at = np.flatnonzero(np.isin(id_hashes(batch.ids), hashes))
        positions.append(at + (batch.first_row - partition.first_row))
        ids.append(batch.ids.take(pa.array(at, type=pa.int64())))
    return np.concatenate(positions) if positions else np.zeros(0, dtype=np.int64), pa.concat_arrays(ids)


def _append(current: Any, values: np.ndarray) -> np.ndarray:
    values = values.astype(np.float32)
    return values if current is None else np.concatenate([current, values])


def _unknown_line(
    partition: Partition, job: ScoreJob, scorer: BundleScorer, row: int, respondent: str, group: str | None
) -> str:
    where = f"{partition.describe(job.path)}: {row_label(row, 0)}, id {respondent!r}"
    if group:
        return f"{where}, column {job.group_column!r}: group {group!r} is not in bundle {scorer.bundle.label}"
    return f"{where}: no group given"


def _write_part(job: ScoreJob, partition: Partition, pieces: list[Any]) -> None:
    """The partition's part, written by a temporary name and renamed into place (a rerun replaces it)."""
    target = job.parts / part_name(partition.index, csv=job.csv)
    temporary = job.parts / f".{target.name}.{uuid.uuid4().hex}"
    if job.csv:
        temporary.write_bytes(b"".join(pieces))
    else:
        import pyarrow as pa
        import pyarrow.parquet as pq

        pq.write_table(pa.concat_tables(pieces) if pieces else _empty_table(), temporary)
    os.replace(temporary, target)


def _empty_table() -> Any:
    import pyarrow as pa

    return pa.table({c: pa.array([], type=pa.string()) for c in SCORE_COLUMNS})


@dataclass(frozen=True)
class DaskScoreResult:
    """What a distributed scoring run produced: the output, the partitions, and the figures of its summary."""

    out: Path
    n_partitions: int
    n_rows: int
    theta: np.ndarray
    se: np.ndarray
    scale: np.ndarray
    flags: Counter[str]
    method: str
    notes: list[str]


def score_file_on_dask(  # noqa: PLR0913 - the file, the bundle, the output and keyword-only options
    path: Path,
    bundle: Bundle,
    out: Path,
    *,
    scheduler: str | None = None,
    n_workers: int = 2,
    progress: Callable[[int, int], None] | None = None,
    partition_bytes: int = PARTITION_BYTES,
    partition_rows: int = PARTITION_ROWS,
    **options: Any,
) -> DaskScoreResult:
    """Score ``path`` with ``bundle`` on a Dask cluster (``scheduler`` address, or a local cluster of
    ``n_workers`` single-threaded processes) and write ``out``: one CSV when it ends in ``.csv``, else a
    directory of Parquet parts. ``options`` are :class:`ScoreJob`'s (id and group columns, ignored
    columns, method, unknown groups to the reference). Raises :class:`InputError` with every problem
    of every partition (the output untouched), as the in-process command does for the whole file.
    """
    from dask.distributed import as_completed

    path, out = Path(path), Path(out)
    scorer = BundleScorer(bundle)
    ScoringInput(  # the header is checked once, before any work
        path,
        item_categories=scorer.item_categories,
        id_column=options.get("id_column", "id"),
        group_column=options.get("group_column"),
        ignore_columns=options.get("ignore_columns", ()),
    )
    partitions = plan_partitions(path, partition_bytes=partition_bytes, partition_rows=partition_rows)
    csv = out.suffix.lower() == ".csv"
    out.parent.mkdir(parents=True, exist_ok=True)
    parts = Path(tempfile.mkdtemp(prefix=f".{out.name}.", suffix=".parts", dir=out.parent))
    job = ScoreJob(path=path.resolve(), bundle_bytes=to_bytes(bundle), parts=parts.resolve(), csv=csv, **options)
    try:
        with dask_client(scheduler, n_workers) as client:  # a local cluster of our own is closed however it ends
            token = uuid.uuid4().hex[:8]
            futures = [
                client.submit(score_partition, job, p, key=f"equitheta-score-{token}-{p.index}", pure=False)
                for p in partitions
            ]
            for done, _ in enumerate(as_completed(futures), start=1):
                if progress is not None:
                    progress(done, len(partitions))
            outcomes = sorted(client.gather(futures), key=lambda o: o.index)
            _raise_problems(client, job, partitions, outcomes)
        _finish(out, parts, len(partitions), csv=csv)
    finally:
        shutil.rmtree(parts, ignore_errors=True)
    return _result(out, outcomes)


def _raise_problems(client: Any, job: ScoreJob, partitions: list[Partition], outcomes: list[PartOutcome]) -> None:
    """Every partition's problems; once they are clean, ids that repeat across partitions: found by their
    hashes, named from the ids of the rows whose hash repeats (a hash shared by different ids is no repeat)."""
    path = job.path
    problems = [p for o in outcomes for p in o.problems]
    total = sum(o.total for o in outcomes)
    if total:
        raise InputError(path.name, problems[:MAX_PROBLEMS], total=total)
    scored = [partitions[o.index] for o in outcomes]
    hashes = [np.concatenate(o.id_hashes) if o.id_hashes else np.zeros(0, dtype=np.uint64) for o in outcomes]
    raise_repeated_ids(client, path, scored, hashes, functools.partial(ids_with_hashes, job), scored)


def _finish(out: Path, parts: Path, count: int, *, csv: bool) -> None:
    """Put the output in place: one CSV in partition order, or the directory of parts (replacing an old one)."""
    names = [parts / part_name(i, csv=csv) for i in range(count)]
    missing = [n.name for n in names if not n.exists()]
    if missing:
        raise RuntimeError(f"parts missing after the job: {', '.join(missing)}")
    if csv:
        with atomic_output(out) as handle:
            handle.write(csv_line(SCORE_COLUMNS))
            for name in names:
                with name.open("rb") as part:
                    shutil.copyfileobj(part, handle)
        return
    for stray in parts.iterdir():  # temporaries of tasks that a dead worker left behind
        if stray.name.startswith("."):
            stray.unlink()
    old = None
    if out.exists():
        old = out.with_name(f".{out.name}.old-{uuid.uuid4().hex[:8]}")
        os.replace(out, old)
    os.replace(parts, out)
    if old is not None:
        shutil.rmtree(old, ignore_errors=True) if old.is_dir() else old.unlink()


def _result(out: Path, outcomes: list[PartOutcome]) -> DaskScoreResult:
    def joined(name: str) -> np.ndarray:
        arrays = [getattr(o, name) for o in outcomes if getattr(o, name) is not None]
        return np.concatenate(arrays) if arrays else np.zeros(0, dtype=np.float32)

    flags: Counter[str] = Counter()
    for o in outcomes:
        flags.update(o.flags)
    notes = list(dict.fromkeys(n for o in outcomes for n in o.notes))
    method = next((o.method for o in outcomes if o.method), "")
    return DaskScoreResult(
        out,
        len(outcomes),
        sum(o.n_rows for o in outcomes),
        joined("theta"),
        joined("se"),
        joined("scale"),
        flags,
        method,
        notes,
    )
