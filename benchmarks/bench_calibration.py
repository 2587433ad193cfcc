"""2PL calibration, 40 items, N = 10,000 and 50,000: equitheta EM against girth twopl_mml.

Both estimators run in this process on the same seeded data; both parameter sets are judged by
the same marginal log-likelihood on a fine grid (121 points on +-8), so neither is favoured by its
own quadrature. Target (spine issue): at least 15x faster at an equal or higher log-likelihood.
"""

from __future__ import annotations

import sys
import warnings

import girth
import numpy as np

from benchmarks.common import machine, timed, two_pl_data
from calibration.estimation import EMSettings, calibrate_single_group, marginal_log_likelihood
from calibration.irt.likelihood import QuadratureGrid
from calibration.irt.models import ItemParameters


def run(sizes: tuple[int, ...] = (10_000, 50_000), n_items: int = 40) -> list[dict[str, float]]:
    grid = QuadratureGrid(121, -8.0, 8.0)
    rows = []
    for n in sizes:
        x, a, b = two_pl_data(n, n_items, seed=n)
        k = np.full(n_items, 2)
        t_ours, fit = timed(lambda x=x, k=k: calibrate_single_group(x, k, settings=EMSettings(standard_errors=False)))
        t_se, fit_se = timed(lambda x=x, k=k: calibrate_single_group(x, k))
        with warnings.catch_warnings():
            warnings.simplefilter("ignore")
            t_girth, ref = timed(lambda x=x: girth.twopl_mml(x.T.astype(int)))
        theirs = ItemParameters.from_thresholds(ref["Discrimination"], ref["Difficulty"])
        ll_ours = marginal_log_likelihood(fit.params, x, grid=grid)
        ll_girth = marginal_log_likelihood(theirs, x, grid=grid)
        rows.append(
            {
                "n": n,
                "ours_s": t_ours,
                "ours_with_se_s": t_se,
                "girth_s": t_girth,
                "speedup": t_girth / t_ours,
                "ll_ours": ll_ours,
                "ll_girth": ll_girth,
                "ll_diff": ll_ours - ll_girth,
                "iterations": fit.n_iter,
                "slope_rmse_ours": float(np.sqrt(np.mean((fit.params.slopes - a) ** 2))),
                "slope_rmse_girth": float(np.sqrt(np.mean((theirs.slopes - a) ** 2))),
            }
        )
    return rows


def main() -> int:
    print(f"machine: {machine()}")
    print("2PL calibration, 40 items (girth 0.8 twopl_mml as baseline, same process, same data)")
    header = (
        f"{'N':>7} {'ours s':>8} {'+SEs s':>8} {'girth s':>8} {'speed-up':>9} {'LL ours':>14} "
        f"{'LL girth':>14} {'LL diff':>9} {'EM iter':>8} {'a RMSE ours/girth':>18}"
    )
    print(header)
    for r in run():
        print(
            f"{r['n']:>7} {r['ours_s']:>8.2f} {r['ours_with_se_s']:>8.2f} {r['girth_s']:>8.2f} {r['speedup']:>8.1f}x "
            f"{r['ll_ours']:>14.3f} {r['ll_girth']:>14.3f} {r['ll_diff']:>9.3f} {r['iterations']:>8} "
            f"{r['slope_rmse_ours']:>8.4f}/{r['slope_rmse_girth']:.4f}"
        )
    return 0


if __name__ == "__main__":
    sys.exit(main())
