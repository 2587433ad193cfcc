"""3PL and partial-credit items: parameter recovery over seeded replications, and speed against girth.

Recovery: a mixed test of 12 3PL, 6 four-category GPCM, 4 three-category PCM and 4 four-category graded
items, N respondents from N(0, 1), drawn from the test's own parameters every replication. Per parameter
type: bias and RMSE of the estimates (slopes, locations, asymptotes), and the ratio of the empirical SD
over replications to the mean reported SE on the estimator's own scale (slope, intercept, logit of the
asymptote; near 1 when the observed-information SEs are right). EAPs of the replication's respondents
under the estimated parameters against their EAPs under the true ones (mean absolute difference and
correlation), which is what the estimation error costs a score.

Speed: girth's ``pcm_mml`` (item discrimination and steps: the GPCM) against ``calibrate_single_group``
with SEs on the same seeded data, CPU seconds of this process, twice; log-likelihoods on one grid.
girth's ``threepl_mml`` does not run with this numpy (see the tests), so the 3PL has no speed baseline.

    .venv/bin/python -m benchmarks.bench_item_models [--replications R] [--n N]
"""

from __future__ import annotations

import argparse
import sys

import girth
import numpy as np

from benchmarks.common import machine, measured
from calibration.estimation import calibrate_groups, calibrate_single_group
from calibration.irt.likelihood import marginal_log_likelihood
from calibration.irt.models import ItemParameters
from calibration.irt.scoring import eap_scores
from calibration.irt.simulate import simulate_items


def mixed_test(rng: np.random.Generator) -> ItemParameters:
    rows: list[tuple[float, list[float], str, float | None]] = []
    for _ in range(12):
        a = float(rng.uniform(1.0, 2.0))
        rows.append((a, [float(-a * rng.normal(0.0, 0.8))], "3pl", float(rng.uniform(0.12, 0.28))))
    for _ in range(6):
        a = float(rng.uniform(0.8, 1.6))
        rows.append((a, [float(v) for v in -a * rng.normal(0.0, 0.9, 3)], "gpcm", None))
    for _ in range(4):
        rows.append((1.1, [float(v) for v in -1.1 * rng.normal(0.0, 0.9, 2)], "pcm", None))
    for _ in range(4):
        a = float(rng.uniform(0.8, 1.8))
        rows.append((a, [float(v) for v in -a * (np.array([-1.0, 0.0, 1.0]) + rng.normal(0.0, 0.3))], "grm", None))
    return ItemParameters.stack(rows)


def recovery(replications: int, n: int) -> None:
    rng = np.random.default_rng(2026)
    truth = mixed_test(rng)
    located = ~np.isnan(truth.thresholds())
    three = truth.has_guessing
    kinds = {m: np.array([mm == m for mm in truth.models]) for m in ("3pl", "gpcm", "pcm", "grm")}
    slopes, locations, asymptotes, slot_values, slot_ses = [], [], [], [], []
    eap_gap, eap_r = [], []
    for _ in range(replications):
        theta = rng.normal(size=n)
        x = simulate_items(truth, theta, rng)
        fit = calibrate_groups(x, truth.n_categories, np.zeros(n, dtype=np.int64), 1, models=truth.models, warn=False)
        est = fit.group_params(0)
        slopes.append(est.slopes)
        locations.append(est.thresholds()[located])
        asymptotes.append(est.guessing[three])
        free = fit.layout.index[0] >= 0
        slot_values.append(fit.tables[0][free])
        slot_ses.append(fit.slot_se[0][free])
        true_eap = eap_scores(truth, x).theta
        own_eap = eap_scores(est, x).theta
        eap_gap.append(float(np.mean(np.abs(own_eap - true_eap))))
        eap_r.append(float(np.corrcoef(own_eap, true_eap)[0, 1]))
    s, loc, g = np.array(slopes), np.array(locations), np.array(asymptotes)
    values, ses = np.array(slot_values), np.array(slot_ses)
    free = fit.layout.index[0] >= 0
    slot_of = np.broadcast_to(np.arange(truth.max_slots), free.shape)[free]
    asymptote_slot = (slot_of == 2) & np.broadcast_to(three[:, None], free.shape)[free]
    slot_kind = np.where(slot_of == 0, 0, np.where(asymptote_slot, 2, 1))
    print(f"recovery: {truth.n_items} items (12 3PL, 6 GPCM, 4 PCM, 4 graded), N = {n:,}, {replications} replications")
    print("| parameters | bias | RMSE |")
    print("| --- | --- | --- |")
    for model, mask in kinds.items():
        print(f"| slopes, {model} | {np.mean(s[:, mask] - truth.slopes[mask]):+.4f} | "
              f"{np.sqrt(np.mean((s[:, mask] - truth.slopes[mask]) ** 2)):.4f} |")  # fmt: skip
    b = truth.thresholds()[located]
    print(f"| locations (thresholds, steps) | {np.mean(loc - b):+.4f} | {np.sqrt(np.mean((loc - b) ** 2)):.4f} |")
    print(f"| asymptotes | {np.mean(g - truth.guessing[three]):+.4f} | "
          f"{np.sqrt(np.mean((g - truth.guessing[three]) ** 2)):.4f} |")  # fmt: skip
    ratio = values.std(axis=0, ddof=1) / np.nanmean(ses, axis=0)
    for slot, name in ((0, "slopes"), (1, "intercepts"), (2, "logits of the asymptotes")):
        picked = ratio[slot_kind == slot]
        spread = f"range {picked.min():.2f}-{picked.max():.2f}"
        print(f"  empirical SD / mean SE, {name}: mean {np.mean(picked):.3f} ({spread})")
    print(f"  EAP under the estimates vs under the truth: mean |difference| {np.mean(eap_gap):.4f}, "
          f"correlation {np.mean(eap_r):.5f}")  # fmt: skip


def speed(n: int) -> None:
    rng = np.random.default_rng(6)
    n_items, k = 8, 4
    a = rng.uniform(0.7, 1.8, n_items)
    steps = rng.normal(0.0, 1.0, (n_items, k - 1))
    truth = ItemParameters(a, -a[:, None] * steps, np.full(n_items, k), models=("gpcm",) * n_items)
    x = simulate_items(truth, rng.normal(size=n), rng)
    for attempt in (1, 2):
        theirs_time, result = measured(lambda: girth.pcm_mml(x.T.astype(int)))
        ours_time, fit = measured(lambda: calibrate_single_group(x, np.full(n_items, k), models=("gpcm",) * n_items))
        girth_cpu, girth_wall, cpu, wall = theirs_time.cpu, theirs_time.wall, ours_time.cpu, ours_time.wall
        theirs = ItemParameters(
            np.asarray(result["Discrimination"]),
            -np.asarray(result["Discrimination"])[:, None] * np.asarray(result["Difficulty"]),
            np.full(n_items, k),
            models=("gpcm",) * n_items,
        )
        gap = marginal_log_likelihood(fit.params, x) - marginal_log_likelihood(theirs, x)
        print(
            f"pass {attempt}: GPCM {n_items} items x {k} categories, N = {n:,}: equitheta with SEs {cpu:.2f} CPU s "
            f"({wall:.2f} s wall), girth pcm_mml {girth_cpu:.2f} CPU s ({girth_wall:.2f} s wall): "
            f"{girth_cpu / cpu:.1f}x; log-likelihood ours minus girth's {gap:+.3f}"
        )


def main() -> int:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--replications", type=int, default=100)
    parser.add_argument("--n", type=int, default=3000)
    args = parser.parse_args()
    print(f"machine: {machine()}")
    speed(2000)
    speed(10000)
    recovery(args.replications, args.n)
    return 0


if __name__ == "__main__":
    sys.exit(main())
