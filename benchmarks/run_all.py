"""Run every benchmark and print its figures (minutes on 2 cores). Not part of the test suite."""

from __future__ import annotations

import sys

from benchmarks import bench_calibration, bench_recovery, bench_scoring


def main() -> int:
    for module in (bench_calibration, bench_scoring, bench_recovery):
        print(f"\n=== {module.__name__} ===")
        module.main()
    return 0


if __name__ == "__main__":
    sys.exit(main())
