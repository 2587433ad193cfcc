"""`equitheta score` on a response file (1,000,000 x 40 items, CSV and Parquet) against pandas.read_csv.

Each command runs as its own process, twice, and is measured from outside: CPU seconds (user +
system of the child), wall seconds and peak resident memory. The baseline is a plain
``pandas.read_csv`` of the same CSV file in a fresh interpreter (start-up included). Targets
(speed issue): end to end within 4x of that baseline; peak RSS <= 1 GB at 1M x 40 and flat in N.
Usage: ``python -m benchmarks.bench_score_file [--rows N ...]``.
"""

from __future__ import annotations

import argparse
import os
import subprocess
import sys
import tempfile
from pathlib import Path

import numpy as np
import pandas as pd

from benchmarks.common import machine, two_pl_data

BIN = Path(sys.executable).parent


def child(cmd: list[str]) -> tuple[float, float, float]:
    """CPU s (user + system), wall s and peak RSS (MB) of one child process, read by GNU time."""
    with tempfile.NamedTemporaryFile("r", suffix=".time") as report:
        out = subprocess.run(
            ["/usr/bin/time", "-o", report.name, "-f", "%U %S %e %M", *cmd], capture_output=True, text=True, check=False
        )
        if out.returncode != 0:
            raise SystemExit(f"{' '.join(cmd)} failed:\n{out.stdout}\n{out.stderr}")
        user, system, wall, rss_kb = report.read().split()
    return float(user) + float(system), float(wall), int(rss_kb) / 1024


def write_files(folder: Path, n_rows: int, n_items: int) -> tuple[Path, Path]:
    x, _, _ = two_pl_data(n_rows, n_items, seed=11)
    frame = pd.DataFrame(x.astype(np.int8), columns=[f"Q{j + 1:02d}" for j in range(n_items)])
    frame.insert(0, "id", [f"R{i:07d}" for i in range(n_rows)])
    csv, parquet = folder / f"resp_{n_rows}.csv", folder / f"resp_{n_rows}.parquet"
    frame.to_csv(csv, index=False)
    frame.to_parquet(parquet, index=False)
    return csv, parquet


def publish_bundle(folder: Path, n_items: int) -> Path:
    csv, _ = write_files(folder, 5_000, n_items)
    store = folder / "store"
    subprocess.run(
        [str(BIN / "equitheta"), "calibrate", str(csv), "--name", "bench", "--store", str(store)],
        check=True,
        capture_output=True,
    )
    return store


def main() -> int:
    parser = argparse.ArgumentParser()
    parser.add_argument("--rows", type=int, nargs="*", default=[250_000, 1_000_000])
    args = parser.parse_args()
    print(f"machine: {machine()}")
    n_items = 40
    with tempfile.TemporaryDirectory() as tmp:
        folder = Path(tmp)
        store = publish_bundle(folder, n_items)
        print(f"{'rows':>9} {'command':<28} {'CPU s':>7} {'wall s':>7} {'peak MB':>8} {'CPU / read_csv':>15}")
        for n in args.rows:
            csv, parquet = write_files(folder, n, n_items)
            for run in (1, 2):
                base_cmd = [sys.executable, "-c", f"import pandas; pandas.read_csv({str(csv)!r})"]
                base_cpu, base_wall, base_rss = child(base_cmd)
                rows = [("pandas.read_csv (baseline)", base_cpu, base_wall, base_rss)]
                for label, path in (("equitheta score CSV", csv), ("equitheta score Parquet", parquet)):
                    cmd = [str(BIN / "equitheta"), "score", str(path), "--bundle", "bench", "--store", str(store)]
                    cmd += ["--out", str(folder / "scores.csv")]
                    rows.append((label, *child(cmd)))
                for label, cpu, wall, rss in rows:
                    ratio = cpu / base_cpu
                    print(f"{n:>9,} {label:<28} {cpu:7.2f} {wall:7.2f} {rss:8.0f} {ratio:14.1f}x  (pass {run})")
        os.sync()
    return 0


if __name__ == "__main__":
    sys.exit(main())
