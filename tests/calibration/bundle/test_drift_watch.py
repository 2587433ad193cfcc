"""Drift-watch counts against a posterior written out respondent by respondent, and the RMSD formula."""

from __future__ import annotations

import math

import numpy as np

from calibration.bundle.drift_watch import BIN_CENTRES, batch_counts
from calibration.bundle.scorer import BundleScorer
from tests.helpers import example_bundle


def test_counts_equal_the_posterior_summed_by_hand() -> None:
    # Three respondents of the example bundle (2PL items; T4 left out for tablet): each respondent's
    # posterior on the scoring grid with math.exp, summed into the bins item by item.
    bundle = example_bundle()
    scorer = BundleScorer(bundle)
    x = np.array([[1, 0, 1, 1, 0, np.nan], [0, 0, 1, np.nan, 1, 1], [1, 1, 1, 1, 1, 0]], dtype=float)
    groups = ["paper", "tablet", "paper"]
    counts = batch_counts(scorer, x, groups)
    points = scorer.grid.points
    centre = [int(np.clip(round((t - BIN_CENTRES[0]) / 0.5), 0, BIN_CENTRES.size - 1)) for t in points]
    items = {item.id: item for item in bundle.items}
    for group in ("paper", "tablet"):
        kept = [item.id for item in bundle.items if item.policy[group].status != "excluded"]
        observed = np.zeros((len(kept), BIN_CENTRES.size, 2))
        model = np.zeros((len(kept), BIN_CENTRES.size))
        for row, g in zip(x, groups, strict=True):
            if g != group:
                continue
            weights = []
            for t in points:
                log_w = -0.5 * t * t  # the bundle's prior N(0, 1)
                for j, item in enumerate(bundle.items):
                    if item.id in kept and not math.isnan(row[j]):
                        p = 1.0 / (1.0 + math.exp(-(item.slope * t + item.intercepts[0])))
                        log_w += math.log(p if row[j] == 1 else 1.0 - p)
                weights.append(math.exp(log_w))
            total = sum(weights)
            for q, t in enumerate(points):
                w = weights[q] / total
                for position, item_id in enumerate(kept):
                    answer = row[[i.id for i in bundle.items].index(item_id)]
                    if math.isnan(answer):
                        continue
                    observed[position, centre[q], int(answer)] += w
                    item = items[item_id]
                    model[position, centre[q]] += w / (1.0 + math.exp(-(item.slope * t + item.intercepts[0])))
        assert counts[group].items == tuple(kept)
        np.testing.assert_allclose(counts[group].observed, observed, atol=1e-12)
        np.testing.assert_allclose(counts[group].model, model, atol=1e-12)
    assert counts["paper"].respondents == 2 and counts["tablet"].respondents == 1
