"""Calibration with and without item SEs: equitheta EM against girth's MML (2PL and graded).

Both estimators run in this process on the same seeded data, twice (the second pass shows the
noise); CPU seconds count every thread of the process. Both parameter sets are judged by the same
marginal log-likelihood on a fine grid (121 points on +-8), so neither is favoured by its own
quadrature. girth gives no SEs; ours are the analytic observed information (Louis 1982).
Targets (speed issue): SEs cost at most 1.5x a fit without them; with SEs, 2PL at least 10x and
graded at least 5x girth in CPU.
"""

from __future__ import annotations

import sys
import warnings

import girth
import numpy as np

from benchmarks.common import machine, measured, two_pl_data
from calibration.estimation import EMSettings, calibrate_single_group, marginal_log_likelihood
from calibration.irt.likelihood import QuadratureGrid
from calibration.irt.models import ItemParameters
from calibration.irt.simulate import simulate_responses

FINE = QuadratureGrid(121, -8.0, 8.0)


def graded_data(n_persons: int, n_items: int, n_categories: int, seed: int) -> np.ndarray:
    """Seeded graded responses (simulation only)."""
    rng = np.random.default_rng(seed)
    a = rng.uniform(0.8, 2.0, n_items)
    b = np.sort(rng.normal(0.0, 1.0, (n_items, n_categories - 1)), axis=1)
    return simulate_responses(a, b, rng.normal(size=n_persons), rng)


def one_case(label: str, x: np.ndarray, n_categories: int) -> dict[str, object]:
    k = np.full(x.shape[1], n_categories)
    t_fit, fit = measured(lambda: calibrate_single_group(x, k, settings=EMSettings(standard_errors=False)))
    t_se, fit_se = measured(lambda: calibrate_single_group(x, k))
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        if n_categories == 2:
            t_girth, ref = measured(lambda: girth.twopl_mml(x.T.astype(int)))
        else:
            t_girth, ref = measured(lambda: girth.grm_mml((x.T + 1).astype(int)))
    theirs = ItemParameters.from_thresholds(ref["Discrimination"], ref["Difficulty"])
    return {
        "label": label,
        "fit": t_fit,
        "se": t_se,
        "girth": t_girth,
        "ll_diff": marginal_log_likelihood(fit.params, x, grid=FINE) - marginal_log_likelihood(theirs, x, grid=FINE),
        "same_estimates": float(np.max(np.abs(fit.params.slopes - fit_se.params.slopes))),
        "iterations": fit.n_iter,
    }


def cases() -> list[tuple[str, np.ndarray, int]]:
    out = []
    for n in (10_000, 50_000):
        out.append((f"2PL 40 items N={n:,}", two_pl_data(n, 40, seed=n)[0], 2))
    out.append(("graded 20x5 N=50,000", graded_data(50_000, 20, 5, seed=5), 5))
    out.append(("graded 40x3 N=10,000", graded_data(10_000, 40, 3, seed=6), 3))
    return out


def main() -> int:
    print(f"machine: {machine()}")
    print("calibration (girth 0.8 twopl_mml / grm_mml as baseline, same process, same data; CPU s = all threads)")
    print(
        f"{'case':<22} {'no SEs CPU/wall':>16} {'with SEs CPU/wall':>18} {'girth CPU/wall':>16} "
        f"{'SE cost':>8} {'girth/ours':>11} {'girth/ours+SE':>14} {'LL - girth':>11} {'iter':>5}"
    )
    data = cases()
    for run in (1, 2):
        print(f"-- pass {run}")
        for label, x, n_categories in data:
            r = one_case(label, x, n_categories)
            fit, se, ref = r["fit"], r["se"], r["girth"]
            print(
                f"{label:<22} {fit.cpu:7.2f}/{fit.wall:<8.2f} {se.cpu:8.2f}/{se.wall:<9.2f} "
                f"{ref.cpu:7.2f}/{ref.wall:<8.2f} {se.cpu / fit.cpu:7.2f}x {ref.cpu / fit.cpu:10.1f}x "
                f"{ref.cpu / se.cpu:13.1f}x {r['ll_diff']:11.3f} {r['iterations']:5d}"
            )
    return 0


if __name__ == "__main__":
    sys.exit(main())
