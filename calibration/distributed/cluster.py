"""What every distributed job shares: the client (a scheduler's, or a local cluster of our own) and the
check for ids repeated across partitions."""

from __future__ import annotations

import contextlib
from collections.abc import Callable, Iterator, Sequence
from pathlib import Path
from typing import Any

import numpy as np

from calibration.errors import InputError
from calibration.io import MAX_PROBLEMS, Partition, row_label
from calibration.io.responses import repeated_hashes


@contextlib.contextmanager
def dask_client(scheduler: str | None, n_workers: int) -> Iterator[Any]:
    """A client of the scheduler at ``scheduler``, or of a local cluster of ``n_workers`` single-threaded
    processes started here and closed however the job ends."""
    from dask.distributed import Client, LocalCluster

    with contextlib.ExitStack() as stack:
        cluster = None
        if not scheduler:
            cluster = stack.enter_context(
                LocalCluster(n_workers=n_workers, threads_per_worker=1, dashboard_address=None)
            )
        yield stack.enter_context(Client(scheduler or cluster))


def repeated_ids(
    path: Path,
    partitions: Sequence[Partition],
    ids: Sequence[Sequence[Any]],
    positions: Sequence[np.ndarray] | None = None,
) -> tuple[list[str], int]:
    """Ids that occur more than once in the file, each named with two of its places (file, partition, row),
    and how many ids repeat. ``ids[i]`` are partition ``partitions[i]``'s trimmed ids, as Arrow string
    arrays in row order: all of them, or those at the rows ``positions[i]`` of the partition."""
    import pyarrow as pa
    import pyarrow.compute as pc

    chunks = [chunk for part in ids for chunk in part]
    if not chunks:
        return [], 0
    every = pa.chunked_array(chunks, type=pa.string())
    counts = pc.value_counts(every)
    repeated = counts.filter(pc.greater(counts.field("counts"), 1)).field("values")
    if len(repeated) == 0:
        return [], 0
    starts = np.cumsum([0] + [sum(len(c) for c in part) for part in ids])
    problems = []
    for respondent in repeated.to_pylist()[:MAX_PROBLEMS]:
        places = np.flatnonzero(pc.equal(every, respondent).to_numpy(zero_copy_only=False))
        where = []
        for at in places[:2]:
            o = int(np.searchsorted(starts, at, side="right") - 1)
            part, offset = partitions[o], int(at - starts[o])
            row = offset if positions is None else int(positions[o][offset])
            where.append(f"{part.describe(path)}, {row_label(part.first_row + row, 0)}")
        problems.append(f"id {respondent!r} appears {len(places)} times: {' and '.join(where)}")
    return problems, len(repeated)


def raise_repeated_ids(  # noqa: PLR0913 - the cluster, the file and what each partition sent and holds
    client: Any,
    path: Path,
    partitions: Sequence[Partition],
    hashes: Sequence[np.ndarray],
    find: Callable[..., tuple[np.ndarray, Any]],
    targets: Sequence[Any],
) -> None:
    """Raise :class:`InputError` naming the ids that occur more than once in the file.

    ``hashes[i]`` holds a 64-bit hash of each id of partition ``partitions[i]`` (what its worker sent). Only
    for a partition holding a repeated hash does ``find(targets[i], hashes=repeats)`` run on the cluster,
    returning the positions (in the partition) and ids of its rows with those hashes; the ids then decide
    (a hash shared by different ids is no repeat) and name the rows.
    """
    repeats = repeated_hashes(hashes)
    if repeats.size == 0:
        return
    holding = [i for i, h in enumerate(hashes) if np.isin(h, repeats).any()]
    found = client.gather(client.map(find, [targets[i] for i in holding], hashes=repeats, pure=False))
    problems, total = repeated_ids(
        path, [partitions[i] for i in holding], [[ids] for _, ids in found], [at for at, _ in found]
    )
    if total:
        raise InputError(path.name, problems, total=total)
