"""Plausible-value group summaries over seeded replications: bias and 95% interval coverage, beside EAP averages.

One bundle (20 right/wrong items calibrated on 3,000 simulated respondents) scores, in every replication,
three fresh groups of 500 from N(0, 1), N(0.5, 0.8^2) and N(-0.4, 1.3^2), their answers simulated from the
bundle's own item parameters (so the truth is exact on its scale and the calibration's own error is not
counted as the summaries' bias). Printed per group: the bias and
RMSE of the plausible-value mean and SD, the coverage of their 95% intervals of the true mean and of the
true differences of means; and, as the baseline, the same for the mean and SD of EAP scores with the naive
interval mean +- 1.96 SD / sqrt(n). Simulation only.

    .venv/bin/python -m benchmarks.bench_plausible_values [--replications 200]
"""

from __future__ import annotations

import argparse
import itertools
import sys
import time

import numpy as np

from benchmarks.common import machine
from calibration.bundle.scorer import BundleScorer
from calibration.bundle.summaries import summarize_groups
from calibration.io import ResponseData
from calibration.irt.scoring import eap_scores
from calibration.irt.simulate import simulate_responses
from calibration.pipeline import calibrate_data

GROUPS = {"A": (0.0, 1.0), "B": (0.5, 0.8), "C": (-0.4, 1.3)}
N_PER_GROUP = 500


def main() -> int:
    parser = argparse.ArgumentParser(description="plausible-value summaries over seeded replications")
    parser.add_argument("--replications", type=int, default=200)
    args = parser.parse_args()
    print(f"machine: {machine()}")
    rng = np.random.default_rng(2026)
    a, b = rng.uniform(0.8, 2.0, 20), rng.normal(0.0, 1.0, 20)
    x = simulate_responses(a, b, rng.normal(size=3000), rng)
    data = ResponseData(
        ids=tuple(map(str, range(3000))),
        item_ids=tuple(f"I{j}" for j in range(20)),
        responses=x,
        n_categories=np.full(20, 2),
        models=("2pl",) * 20,
        source="simulated.csv",
    )
    scorer = BundleScorer(calibrate_data(data, name="pv-study").bundle)
    params = scorer.plans["all"].params
    a, b = params.slopes, params.thresholds()[:, 0]  # the bundle's own items generate every replication
    names = list(GROUPS)
    pv = {g: {"mean": [], "sd": [], "cover": 0} for g in names}
    eap = {g: {"mean": [], "sd": [], "cover": 0} for g in names}
    diff_cover = {pair: [0, 0] for pair in itertools.combinations(names, 2)}  # PV, EAP
    cpu, wall = time.process_time(), time.perf_counter()
    for rep in range(args.replications):
        rep_rng = np.random.default_rng(10_000 + rep)
        blocks, labels = [], []
        for g, (mean, sd) in GROUPS.items():
            blocks.append(simulate_responses(a, b, rep_rng.normal(mean, sd, N_PER_GROUP), rep_rng))
            labels += [g] * N_PER_GROUP
        responses = np.vstack(blocks)
        result = summarize_groups(scorer, responses, labels, scored_as=["all"] * len(labels), seed=rep)
        cells = {c.group: c for c in result.cells}
        theta = eap_scores(params, responses).theta
        for g, (mean, sd) in GROUPS.items():
            cell = cells[g]
            pv[g]["mean"].append(cell.mean - mean)
            pv[g]["sd"].append(cell.sd - sd)
            pv[g]["cover"] += cell.ci_low <= mean <= cell.ci_high
            scores = theta[np.asarray(labels) == g]
            half = 1.959963984540054 * scores.std(ddof=1) / np.sqrt(scores.size)
            eap[g]["mean"].append(scores.mean() - mean)
            eap[g]["sd"].append(scores.std(ddof=1) - sd)
            eap[g]["cover"] += abs(scores.mean() - mean) <= half
        for d in result.differences:
            pair = (d.group, d.versus_group)
            truth = GROUPS[pair[0]][0] - GROUPS[pair[1]][0]
            diff_cover[pair][0] += d.ci_low <= truth <= d.ci_high
            first, second = theta[np.asarray(labels) == pair[0]], theta[np.asarray(labels) == pair[1]]
            gap = first.mean() - second.mean()
            half = 1.959963984540054 * np.sqrt(first.var(ddof=1) / first.size + second.var(ddof=1) / second.size)
            diff_cover[pair][1] += abs(gap - truth) <= half
    cpu, wall = time.process_time() - cpu, time.perf_counter() - wall
    n = args.replications
    print(f"{n} replications of 3 groups x {N_PER_GROUP}; {cpu:.1f} CPU s, {wall:.1f} wall s")
    print(f"{'group':<6} {'truth':>12} {'':>4} {'bias mean':>9} {'RMSE mean':>9} {'bias SD':>8} {'cover 95%':>9}")
    for g, (mean, sd) in GROUPS.items():
        for label, table in (("PV", pv), ("EAP", eap)):
            m, s = np.array(table[g]["mean"]), np.array(table[g]["sd"])
            print(
                f"{g:<6} {f'N({mean}, {sd}^2)':>12} {label:>4} {m.mean():9.3f} {np.sqrt((m**2).mean()):9.3f} "
                f"{s.mean():8.3f} {table[g]['cover'] / n:9.3f}"
            )
    for (first, second), (pv_cover, eap_cover) in diff_cover.items():
        truth = GROUPS[first][0] - GROUPS[second][0]
        print(
            f"difference {first}-{second} ({truth:+.1f}): 95% coverage PV {pv_cover / n:.3f}, EAP {eap_cover / n:.3f}"
        )
    return 0


if __name__ == "__main__":
    sys.exit(main())
