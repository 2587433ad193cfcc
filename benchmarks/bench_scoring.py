"""Person scoring throughput: EAP + PSD for 1,000,000 x 40 items, MAP and ML against EAP, girth as baseline.

MAP and ML are measured on four tests: 2PL 40 items, graded 20 x 5, 20 3PL with 10 GPCM items, 10 GPCM items.

CPU seconds count every thread of the process; each figure is measured twice in the same
process. Baselines: girth ``ability_eap`` (no SE) on the first 200,000 rows of the same data
(its rate is per respondent, so a subset measures it fairly in less time), and equitheta's own
EAP for MAP and ML (speed issue target: MAP and ML at least 0.3x EAP throughput).
"""

from __future__ import annotations

import sys

import girth
import numpy as np

from benchmarks.bench_calibration import graded_data
from benchmarks.common import machine, measured, two_pl_data
from calibration.irt.models import ItemParameters
from calibration.irt.scoring import eap_scores, map_scores, ml_scores
from calibration.irt.simulate import simulate_items


def graded_items(seed: int = 5) -> ItemParameters:
    rng = np.random.default_rng(seed)
    return ItemParameters.from_thresholds(rng.uniform(0.8, 2.0, 20), np.sort(rng.normal(0, 1, (20, 4)), axis=1))


def mixed_items(seed: int = 9) -> ItemParameters:
    """20 3PL items (asymptotes 0.1-0.3) and 10 generalized partial credit items of 4 categories."""
    rng = np.random.default_rng(seed)
    intercepts = np.full((30, 3), np.nan)
    intercepts[:20, 0] = rng.normal(0, 1, 20)
    intercepts[20:] = rng.normal(0, 1, (10, 3))
    guessing = np.zeros(30)
    guessing[:20] = rng.uniform(0.1, 0.3, 20)
    return ItemParameters(
        slopes=rng.uniform(0.8, 2.0, 30),
        intercepts=intercepts,
        n_categories=np.array([2] * 20 + [4] * 10),
        models=("3pl",) * 20 + ("gpcm",) * 10,
        guessing=guessing,
    )


def main() -> int:
    print(f"machine: {machine()}")
    x, a, b = two_pl_data(1_000_000, 40, seed=7)
    params = ItemParameters.from_thresholds(a, b)
    girth_rows = 200_000
    subset = x[:girth_rows].T.astype(int)
    graded = graded_items()
    xg = graded_data(200_000, 20, 5, seed=5)
    mixed = mixed_items()
    xm = simulate_items(mixed, np.random.default_rng(3).normal(size=100_000), np.random.default_rng(4))
    partial = mixed.subset(list(range(20, 30)))
    print("rates in respondents per CPU second (per wall second in brackets)")
    for run in (1, 2):
        t_eap, scores = measured(lambda: eap_scores(params, x))
        t_one, _ = measured(lambda: eap_scores(params, x, workers=1))
        t_girth, theirs = measured(lambda: girth.ability_eap(subset, b, a))
        print(f"-- pass {run}: 2PL, 40 items")
        print(f"  EAP + PSD, 1,000,000 rows, 2 threads: {1e6 / t_eap.cpu:>12,.0f} ({1e6 / t_eap.wall:,.0f})")
        print(f"  EAP + PSD, 1 thread:                 {1e6 / t_one.cpu:>12,.0f} ({1e6 / t_one.wall:,.0f})")
        rate_girth = girth_rows / t_girth.cpu
        print(f"  girth ability_eap (no SE):           {rate_girth:>12,.0f} ({girth_rows / t_girth.wall:,.0f})")
        print(f"  EAP / girth in CPU:                  {1e6 / t_eap.cpu / rate_girth:>12.1f}x")
        worst = float(np.max(np.abs(theirs - scores.theta[:girth_rows])))
        print(f"  largest |theta difference| vs girth: {worst:.4f} (girth integrates on its own grid)")
        cases = (
            ("2PL 40 items", params, x[:200_000]),
            ("graded 20x5", graded, xg),
            ("3PL 20 + GPCM 10", mixed, xm),
            ("GPCM 10x4", partial, xm[:, 20:]),
        )
        for label, items, data in cases:
            t_base, _ = measured(lambda items=items, data=data: eap_scores(items, data))
            t_map, _ = measured(lambda items=items, data=data: map_scores(items, data))
            t_ml, _ = measured(lambda items=items, data=data: ml_scores(items, data))
            n = data.shape[0]
            print(
                f"  {label}, {n:,} rows: EAP {n / t_base.cpu:,.0f}; MAP {n / t_map.cpu:,.0f} "
                f"({t_base.cpu / t_map.cpu:.2f}x EAP); ML {n / t_ml.cpu:,.0f} ({t_base.cpu / t_ml.cpu:.2f}x EAP)"
            )
    return 0


if __name__ == "__main__":
    sys.exit(main())
