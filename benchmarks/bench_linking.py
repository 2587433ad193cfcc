"""Linking accuracy over seeded replications: two cycles, a known population shift, with and without drift.

Cycle 1: 24 right/wrong items, 1,500 respondents from N(0, 1), calibrated and published. Cycle 2: the
same items plus 4 new ones, 1,500 respondents from N(0.5, 1.2^2); in the drift condition 4 of the common
items are 0.6 harder (b + 0.6). Every replication links cycle 2 to cycle 1 by each method (the drift
screening is the same for all) and records the recovered constants against the truth (B = 0.5, A = 1.2:
the parent's own estimation error included, as in practice), the SEs the link reports, and which items
were flagged. Prints bias, RMSE and the mean reported SE of A and B per method and condition, the
detection rate of drifted items and the false-alarm rate of stable ones (Wald test with both cycles'
errors, FDR .05, effect >= 0.20), and CPU seconds. Simulation only (no real respondents).

    .venv/bin/python -m benchmarks.bench_linking [--replications 100]
"""

from __future__ import annotations

import argparse
import sys
import time
import warnings

import numpy as np

from benchmarks.common import machine
from calibration.io import ResponseData
from calibration.irt.simulate import simulate_responses
from calibration.pipeline import calibrate_data
from calibration.pipeline.link import LinkRequest

N_COMMON, N_NEW, N_PERSONS = 24, 4, 1500
SHIFT, SPREAD, DRIFT = 0.5, 1.2, 0.6
DRIFTED = (3, 9, 15, 21)
METHODS = ("fixed-parameter", "stocking-lord", "haebara")


def _data(x: np.ndarray, ids: list[str], name: str) -> ResponseData:
    return ResponseData(
        ids=tuple(f"{name}{i}" for i in range(x.shape[0])),
        item_ids=tuple(ids),
        responses=x,
        n_categories=np.full(len(ids), 2),
        models=("2pl",) * len(ids),
        source=f"{name}.csv",
    )


def replication(seed: int) -> list[dict[str, object]]:
    rng = np.random.default_rng(seed)
    n = N_COMMON + N_NEW
    ids = [f"I{j:02d}" for j in range(n)]
    slopes, b = rng.uniform(0.8, 2.0, n), rng.normal(0.0, 1.0, n)
    first = simulate_responses(slopes[:N_COMMON], b[:N_COMMON], rng.normal(size=N_PERSONS), rng)
    parent = calibrate_data(_data(first, ids[:N_COMMON], "c1"), name="study").bundle.model_copy(
        update={"version": 1, "hash": "benchmark"}
    )
    out = []
    for condition in ("no drift", "drift"):
        moved = b.copy()
        if condition == "drift":
            moved[list(DRIFTED)] += DRIFT
        second = simulate_responses(slopes, moved, rng.normal(SHIFT, SPREAD, N_PERSONS), rng)
        data = _data(second, ids, "c2")
        for method in METHODS:
            link = calibrate_data(data, name="study", link=LinkRequest(parent, method)).bundle.link  # type: ignore[arg-type]
            assert link is not None
            flagged = {ids.index(item) for item in link.drifted_items}
            drifted = set(DRIFTED) if condition == "drift" else set()
            out.append(
                {
                    "condition": condition,
                    "method": method,
                    "A": link.constants.slope,
                    "B": link.constants.intercept,
                    "A_se": link.constants.slope_se,
                    "B_se": link.constants.intercept_se,
                    "detected": len(flagged & drifted),
                    "false_alarms": len(flagged - drifted),
                    "n_drifted": len(drifted),
                    "n_stable": N_COMMON - len(drifted),
                }
            )
    return out


def main() -> int:
    parser = argparse.ArgumentParser(description="linking accuracy over seeded replications")
    parser.add_argument("--replications", type=int, default=100)
    args = parser.parse_args()
    print(f"machine: {machine()}")
    rows: list[dict[str, object]] = []
    cpu, wall = time.process_time(), time.perf_counter()
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        for seed in range(args.replications):
            rows.extend(replication(1000 + seed))
    cpu, wall = time.process_time() - cpu, time.perf_counter() - wall
    print(
        f"{args.replications} replications, 2 conditions x {len(METHODS)} methods; {cpu:.1f} CPU s, {wall:.1f} wall s "
        f"(truth: B = {SHIFT}, A = {SPREAD}; {len(DRIFTED)} of {N_COMMON} common items {DRIFT} harder in the drift "
        f"condition; {N_PERSONS} respondents per cycle)"
    )
    header = f"{'condition':<9} {'method':<16} {'bias B':>7} {'RMSE B':>7} {'mean SE B':>9} {'bias A':>7} "
    print(header + f"{'RMSE A':>7} {'mean SE A':>9} {'detected':>9} {'false alarms':>12}")
    for condition in ("no drift", "drift"):
        for method in METHODS:
            group = [r for r in rows if r["condition"] == condition and r["method"] == method]
            b_err = np.array([float(r["B"]) - SHIFT for r in group])
            a_err = np.array([float(r["A"]) - SPREAD for r in group])
            b_se = np.mean([float(r["B_se"] or np.nan) for r in group])
            a_se = np.mean([float(r["A_se"] or np.nan) for r in group])
            drifted = sum(int(r["n_drifted"]) for r in group)
            detected = sum(int(r["detected"]) for r in group) / drifted if drifted else float("nan")
            false_rate = sum(int(r["false_alarms"]) for r in group) / sum(int(r["n_stable"]) for r in group)
            print(
                f"{condition:<9} {method:<16} {b_err.mean():7.3f} {np.sqrt((b_err**2).mean()):7.3f} {b_se:9.3f} "
                f"{a_err.mean():7.3f} {np.sqrt((a_err**2).mean()):7.3f} {a_se:9.3f} {detected:9.3f} {false_rate:12.4f}"
            )
    return 0


if __name__ == "__main__":
    sys.exit(main())
