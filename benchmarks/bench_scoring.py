"""EAP + posterior SD for 1,000,000 respondents x 40 items: respondents per second.

Baseline: girth ``ability_eap`` (which returns no SE) in the same process on the first 200,000
rows of the same data (its rate is per respondent, so a subset measures it fairly in less time).
Target (spine issue): at least 2,000,000 per second and 5x girth.
"""

from __future__ import annotations

import sys

import girth
import numpy as np

from benchmarks.common import machine, timed, two_pl_data
from calibration.irt.models import ItemParameters
from calibration.irt.scoring import eap_scores, map_scores, ml_scores


def run(n_persons: int = 1_000_000, n_items: int = 40, girth_rows: int = 200_000) -> dict[str, float]:
    x, a, b = two_pl_data(n_persons, n_items, seed=7)
    params = ItemParameters.from_thresholds(a, b)
    t_ours, scores = timed(lambda: eap_scores(params, x), repeat=3)
    t_one, _ = timed(lambda: eap_scores(params, x, workers=1), repeat=1)
    subset = x[:girth_rows].T.astype(int)
    t_girth, theirs = timed(lambda: girth.ability_eap(subset, b, a), repeat=1)
    t_map, _ = timed(lambda: map_scores(params, x[:100_000]))
    t_ml, _ = timed(lambda: ml_scores(params, x[:100_000]))
    return {
        "ours_rate": n_persons / t_ours,
        "ours_one_thread_rate": n_persons / t_one,
        "girth_rate": girth_rows / t_girth,
        "max_abs_theta_diff_vs_girth": float(np.max(np.abs(theirs - scores.theta[:girth_rows]))),
        "map_rate": 100_000 / t_map,
        "ml_rate": 100_000 / t_ml,
        "mean_psd": float(scores.se.mean()),
    }


def main() -> int:
    print(f"machine: {machine()}")
    r = run()
    print("EAP + PSD, 40 2PL items, 1,000,000 respondents (61-point grid on +-6)")
    print(f"  equitheta, 2 threads:      {r['ours_rate']:>12,.0f} respondents/s")
    print(f"  equitheta, 1 thread:       {r['ours_one_thread_rate']:>12,.0f} respondents/s")
    print(f"  girth ability_eap (no SE): {r['girth_rate']:>12,.0f} respondents/s")
    print(f"  ratio (2 threads / girth): {r['ours_rate'] / r['girth_rate']:>12.1f}x")
    print(
        f"  largest |theta difference| vs girth: {r['max_abs_theta_diff_vs_girth']:.4f} "
        "(girth integrates on its own grid)"
    )
    print(f"  MAP + SE: {r['map_rate']:,.0f} respondents/s; ML + SE: {r['ml_rate']:,.0f} respondents/s")
    return 0


if __name__ == "__main__":
    sys.exit(main())
