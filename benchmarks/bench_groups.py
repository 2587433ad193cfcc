"""Group-fair pipeline figures.

1. Full pipeline, 40 2PL items x 3 groups x 10,000 respondents: CPU and wall time per stage,
   twice (targets: < 30 s wall on 2 cores; the speed issue's >= 4x less CPU).
2. Seeded replications (default 200) at N = 1,000 per group, 20 items, 2 focal groups,
   two items with 0.6-logit uniform DIF per focal group: Type I error of the final item
   flags on DIF-free cells (target .03-.07 at FDR .05), power for the DIF cells (target
   >= .90) and the anchor contamination rate (share of replications whose anchors hold a
   DIF item).

"0.6-logit uniform DIF" here is a shift of 0.6 in the item's intercept (logit) for the
focal group, i.e. a threshold shift of 0.6 / a.
"""

from __future__ import annotations

import argparse
import sys
import time
import warnings

import numpy as np

from benchmarks.common import machine
from calibration.dif.irt import run_irt_dif
from calibration.dif.settings import DifSettings
from calibration.estimation import ConvergenceWarning, EMSettings, calibrate_groups
from calibration.io import ResponseData
from calibration.irt.simulate import simulate_responses
from calibration.pipeline import calibrate_data


def simulate(
    rng: np.random.Generator,
    n_items: int,
    n_per_group: int,
    dif: dict[tuple[int, int], float],
    means: tuple[float, ...] = (0.0, 0.3, -0.3),
    sds: tuple[float, ...] = (1.0, 1.1, 0.9),
) -> tuple[np.ndarray, np.ndarray]:
    a = rng.uniform(0.8, 2.0, n_items)
    c = -a * rng.normal(0.0, 1.0, n_items)
    blocks, labels = [], []
    for g, (mean, sd) in enumerate(zip(means, sds, strict=True)):
        cg = c.copy()
        for (j, gg), shift in dif.items():
            if gg == g:
                cg[j] -= shift  # lower intercept: harder for the focal group
        theta = rng.normal(mean, sd, n_per_group)
        blocks.append(simulate_responses(a, -cg / a, theta, rng))  # threshold b = -c / a
        labels.append(np.full(n_per_group, g))
    return np.vstack(blocks), np.concatenate(labels)


def pipeline_timing() -> dict[str, list[float]]:
    rng = np.random.default_rng(40)
    dif = {(3, 1): 0.6, (11, 1): 0.6, (20, 2): 0.6, (31, 2): 0.6}
    x, groups = simulate(rng, 40, 10_000, dif)
    names = np.array(["ref", "focal-a", "focal-b"])[groups]
    data = ResponseData(
        ids=tuple(map(str, range(x.shape[0]))),
        item_ids=tuple(f"I{j:02d}" for j in range(40)),
        responses=x,
        n_categories=np.full(40, 2),
        models=("2pl",) * 40,
        groups=tuple(names),
        source="simulated",
    )
    stamps: dict[str, list[float]] = {}
    state: dict[str, object] = {"stage": None, "wall": time.perf_counter(), "cpu": time.process_time()}

    def close_stage() -> None:
        wall, cpu = time.perf_counter(), time.process_time()
        if state["stage"] is not None:
            spent = stamps.setdefault(str(state["stage"]), [0.0, 0.0])
            spent[0] += cpu - float(state["cpu"])  # type: ignore[arg-type]
            spent[1] += wall - float(state["wall"])  # type: ignore[arg-type]
        state["wall"], state["cpu"] = wall, cpu

    def progress(stage: str, _step: int, _value: float) -> None:
        if stage != state["stage"]:
            close_stage()
            state["stage"] = stage

    start, start_cpu = time.perf_counter(), time.process_time()
    outcome = calibrate_data(data, name="bench", reference_group="ref", progress=progress)
    close_stage()
    flagged = {(i.id, g) for i in outcome.bundle.items for g, p in i.policy.items() if p.status != "invariant"}
    stamps["total"] = [time.process_time() - start_cpu, time.perf_counter() - start]
    stamps["flagged_cells"] = [float(len(flagged)), 0.0]
    return stamps


def replications(n_reps: int, n_per_group: int = 1000, n_items: int = 20, fdr: float = 0.05) -> dict[str, float]:
    dif = {(2, 1): 0.6, (9, 1): 0.6, (5, 2): 0.6, (14, 2): 0.6}
    false_flags = tests_clean = hits = contaminated = raw_false = bh_false = raw_hits = 0
    for rep in range(n_reps):
        rng = np.random.default_rng(10_000 + rep)
        x, groups = simulate(rng, n_items, n_per_group, dif)
        k = np.full(n_items, 2)
        with warnings.catch_warnings():
            warnings.simplefilter("ignore", ConvergenceWarning)
            scalar = calibrate_groups(x, k, groups, 3, settings=EMSettings(standard_errors=False))
            outcome = run_irt_dif(
                x,
                k,
                groups,
                3,
                scalar,
                item_ids=tuple(f"I{j}" for j in range(n_items)),
                models=("2pl",) * n_items,
                settings=DifSettings(fdr_level=fdr),
                em_settings=EMSettings(),
            )
        if set(outcome.anchors) & {j for j, _ in dif}:
            contaminated += 1
        for j in range(n_items):
            for g in (1, 2):
                test = outcome.tests.get((j, g))
                flagged = test is not None and test.flagged(outcome.settings)
                raw = test is not None and test.p_omnibus < 0.05
                bh = test is not None and test.p_adjusted < fdr
                if (j, g) in dif:
                    hits += flagged
                    raw_hits += raw
                else:
                    tests_clean += 1
                    false_flags += flagged
                    raw_false += raw
                    bh_false += bh
    return {
        "replications": n_reps,
        "type_one_error": false_flags / tests_clean,
        "power": hits / (n_reps * len(dif)),
        "raw_type_one_error": raw_false / tests_clean,
        "bh_type_one_error": bh_false / tests_clean,
        "raw_power": raw_hits / (n_reps * len(dif)),
        "anchor_contamination": contaminated / n_reps,
    }


def main(argv: list[str] | None = None) -> int:
    parser = argparse.ArgumentParser()
    parser.add_argument("--replications", type=int, default=200)
    parser.add_argument("--skip-timing", action="store_true")
    parser.add_argument("--fdr", type=float, default=0.05, help="false discovery rate of the flags")
    args = parser.parse_args(argv)
    print(f"machine: {machine()}")
    if not args.skip_timing:
        for run in (1, 2):
            t = pipeline_timing()
            print(f"full pipeline, 40 2PL items x 3 groups x 10,000 (4 DIF cells), pass {run}: CPU s / wall s")
            for stage in ("screen", "scalar", "test", "final", "quality"):
                cpu, wall = t.get(stage, [0.0, 0.0])
                print(f"  {stage:>8}: {cpu:6.2f} / {wall:6.2f}")
            cpu, wall = t["total"]
            print(f"  {'total':>8}: {cpu:6.2f} / {wall:6.2f}; cells not invariant: {int(t['flagged_cells'][0])}")
    start = time.perf_counter()
    r = replications(args.replications, fdr=args.fdr)
    print(
        f"{r['replications']} replications, N = 1,000 per group, 20 items, 2 focal groups, "
        f"0.6-logit uniform DIF in 2 items per focal group, FDR {args.fdr} ({time.perf_counter() - start:.0f} s):"
    )
    print(f"  Type I error of final flags (clean cells): {r['type_one_error']:.4f}")
    print(f"  power (DIF cells flagged):                 {r['power']:.4f}")
    print(f"  anchor contamination rate:                 {r['anchor_contamination']:.4f}")
    print(f"  clean cells with unadjusted p < .05:       {r['raw_type_one_error']:.4f} (calibration of the LR test)")
    print(f"  clean cells with BH-adjusted p < FDR:      {r['bh_type_one_error']:.4f}")
    print(f"  DIF cells with unadjusted p < .05:         {r['raw_power']:.4f}")
    return 0


if __name__ == "__main__":
    sys.exit(main())
