"""A large Parquet file scored, and a large table calibrated, in process and on a 2-worker Dask LocalCluster.

A 2PL bundle of 40 items scores N respondents (default 5,000,000) from one Parquet file (row groups of
250,000). In process: ``equitheta score`` as its own process, measured by GNU time (CPU, wall, peak
RSS). On Dask: the same command with ``--engine dask --scheduler`` against a LocalCluster of two
single-threaded worker processes started here; the client process is measured by GNU time and each
worker's CPU seconds and peak RSS are read from the worker itself (``resource.getrusage``) before and
after. Both runs twice. The outputs are compared row for row (theta and SE).

Calibration: a 2PL calibration (with SEs) of M respondents x 40 items (default 2,000,000) from one
Parquet file: in process, the table read whole and ``calibrate_groups``; on Dask,
``calibrate_file_on_dask`` with the file's row groups held by the workers. Each as its own process
measured by GNU time (the Dask client's workers read with ``resource.getrusage``); estimates compared.
Then the whole command on the same file: ``equitheta calibrate`` in process against ``equitheta calibrate
--engine dask --scheduler`` (its checks and quality evidence on a sample of 50,000 respondents, the final
fit on all), the published bundles' item parameters compared.

    .venv/bin/python -m benchmarks.bench_dask [--rows N] [--calibration-rows M] [--skip-scoring | --skip-calibration]
"""

from __future__ import annotations

import argparse
import resource
import sys
import tempfile
from pathlib import Path
from typing import Any

import numpy as np
import pandas as pd

from benchmarks.bench_score_file import BIN, child, publish_bundle
from benchmarks.common import machine
from calibration.irt.simulate import simulate_responses


def write_parquet(path: Path, n_rows: int, n_items: int, block: int = 250_000) -> None:
    import pyarrow as pa
    import pyarrow.parquet as pq

    rng = np.random.default_rng(5)
    a = rng.uniform(0.8, 2.0, n_items)
    b = rng.normal(0.0, 1.0, n_items)
    writer = None
    for start in range(0, n_rows, block):
        n = min(block, n_rows - start)
        x = simulate_responses(a, b, rng.normal(size=n), rng).astype(np.int8)
        frame = pd.DataFrame(x, columns=[f"Q{j + 1:02d}" for j in range(n_items)])
        frame.insert(0, "id", [f"R{i:08d}" for i in range(start, start + n)])
        table = pa.Table.from_pandas(frame, preserve_index=False)
        writer = writer or pq.ParquetWriter(path, table.schema)
        writer.write_table(table, row_group_size=block)
    assert writer is not None
    writer.close()


def worker_usage() -> tuple[float, float]:
    """CPU seconds and peak RSS (MB) of the calling process (run on each worker)."""
    usage = resource.getrusage(resource.RUSAGE_SELF)
    return usage.ru_utime + usage.ru_stime, usage.ru_maxrss / 1024


def compare_pass(client: Any, attempt: int, local: list[str], on_dask: list[str], suffix: str = "") -> None:
    """One pass: ``local`` in process, then ``on_dask`` against the cluster; the client and the workers measured."""
    cpu, wall, rss = child(local)
    print(f"pass {attempt}: in process: {cpu:.1f} CPU s, {wall:.1f} s wall, peak RSS {rss:.0f} MB")
    before = client.run(worker_usage)
    d_cpu, d_wall, d_rss = child(on_dask)
    after = client.run(worker_usage)
    workers_cpu = sum(after[w][0] - before[w][0] for w in after)
    peaks = ", ".join(f"{after[w][1]:.0f}" for w in sorted(after))
    print(
        f"pass {attempt}: 2-worker Dask: {d_wall:.1f} s wall ({wall / d_wall:.2f}x in-process speed); client "
        f"{d_cpu:.1f} CPU s, peak RSS {d_rss:.0f} MB; workers {workers_cpu:.1f} CPU s, peak RSS {peaks} MB{suffix}"
    )


def main() -> int:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--rows", type=int, default=5_000_000)
    parser.add_argument("--calibration-rows", type=int, default=2_000_000)
    parser.add_argument("--skip-scoring", action="store_true", help="only the calibration part")
    parser.add_argument("--skip-calibration", action="store_true", help="only the scoring part")
    args = parser.parse_args()
    from dask.distributed import Client, LocalCluster

    print(f"machine: {machine()}")
    if args.skip_scoring:
        with tempfile.TemporaryDirectory() as tmp:
            calibration(Path(tmp), args.calibration_rows)
        return 0
    with tempfile.TemporaryDirectory() as tmp:
        folder = Path(tmp)
        store = publish_bundle(folder, 40)
        data = folder / "population.parquet"
        write_parquet(data, args.rows, 40)
        print(f"{args.rows:,} respondents x 40 items, {data.stat().st_size / 1e6:.0f} MB of Parquet")
        base = [str(BIN / "equitheta"), "score", str(data), "--bundle", "bench", "--store", str(store)]
        with LocalCluster(n_workers=2, threads_per_worker=1, dashboard_address=None) as cluster, Client(cluster) as c:
            for attempt in (1, 2):
                on_dask = [*base, "--out", str(folder / "dask"), "--engine", "dask", "--scheduler"]
                local_run = [*base, "--out", str(folder / "local.csv")]
                compare_pass(
                    c, attempt, local_run, [*on_dask, cluster.scheduler_address], " (since the worker started)"
                )
        local = pd.read_csv(folder / "local.csv", usecols=["id", "theta", "se"])
        parts = sorted((folder / "dask").glob("part-*.parquet"))
        dask = pd.concat([pd.read_parquet(p, columns=["id", "theta", "se"]) for p in parts], ignore_index=True)
        same = (local["id"] == dask["id"]).all()
        gap = float(np.max(np.abs(local["theta"] - dask["theta"])))
        print(f"outputs: ids in the same order {same}; largest theta difference {gap:.1e} (the CSV prints 6 decimals)")
        if not args.skip_calibration:
            calibration(folder, args.calibration_rows)
    return 0


IN_PROCESS = """
import sys, numpy as np, pandas as pd
from calibration.estimation import calibrate_groups
x = pd.read_parquet(sys.argv[1]).drop(columns="id").to_numpy(dtype=np.float64)
fit = calibrate_groups(x, np.full(x.shape[1], 2), np.zeros(x.shape[0], dtype=np.int64), 1)
np.save(sys.argv[2], np.stack([fit.tables[0], fit.slot_se[0]]))
"""
ON_DASK = """
import sys, numpy as np
from dask.distributed import Client
from calibration.distributed.calibration import calibrate_file_on_dask
with Client(sys.argv[3]) as client:
    result = calibrate_file_on_dask(client, sys.argv[1])
np.save(sys.argv[2], np.stack([result.fit.tables[0], result.fit.slot_se[0]]))
"""


def calibration(folder: Path, n_rows: int) -> None:
    from dask.distributed import Client, LocalCluster

    data = folder / "calibration.parquet"
    write_parquet(data, n_rows, 40)
    print(f"calibration: {n_rows:,} respondents x 40 right/wrong items, 2PL with SEs")
    python = str(BIN / "python")
    with LocalCluster(n_workers=2, threads_per_worker=1, dashboard_address=None) as cluster, Client(cluster) as c:
        for attempt in (1, 2):
            local_run = [python, "-c", IN_PROCESS, str(data), str(folder / "local.npy")]
            compare_pass(
                c,
                attempt,
                local_run,
                [python, "-c", ON_DASK, str(data), str(folder / "dask.npy"), cluster.scheduler_address],
            )
    local, dask = np.load(folder / "local.npy"), np.load(folder / "dask.npy")
    print(f"largest difference: estimates {np.nanmax(np.abs(local[0] - dask[0])):.1e}, SEs "
          f"{np.nanmax(np.abs(local[1] - dask[1])):.1e}")  # fmt: skip
    calibration_command(folder, data, n_rows)


def calibration_command(folder: Path, data: Path, n_rows: int) -> None:
    """``equitheta calibrate`` on the whole file in process, then with ``--engine dask``: time, memory, estimates."""
    from dask.distributed import Client, LocalCluster

    from calibration.bundle import DirectoryStore

    print(f"command: equitheta calibrate, {n_rows:,} x 40, one group (in process: every check on every row)")
    base = [str(BIN / "equitheta"), "calibrate", str(data), "--name", "bench", "--republish"]
    with LocalCluster(n_workers=2, threads_per_worker=1, dashboard_address=None) as cluster, Client(cluster) as c:
        for attempt in (1, 2):
            on_dask = [*base, "--store", str(folder / "there"), "--engine", "dask", "--scheduler"]
            compare_pass(c, attempt, [*base, "--store", str(folder / "here")], [*on_dask, cluster.scheduler_address])
    here, there = DirectoryStore(folder / "here").get("bench", 2), DirectoryStore(folder / "there").get("bench", 2)
    gap = max(
        max(abs(a.slope - b.slope), *(abs(u - v) for u, v in zip(a.intercepts, b.intercepts, strict=True)))
        for a, b in zip(here.items, there.items, strict=True)
    )
    print(f"published bundles: largest difference of an item parameter {gap:.1e}")


if __name__ == "__main__":
    sys.exit(main())
