"""Group summaries from plausible values: a seeded simulation with known group means and SDs (the truth
of the simulation is the reference), Rubin's intervals, and the warning for groups scored on different items."""

from __future__ import annotations

import numpy as np
import pytest

from calibration.bundle.scorer import BundleScorer
from calibration.bundle.summaries import summarize_groups
from calibration.io import ResponseData
from calibration.irt.scoring import eap_scores
from calibration.pipeline import calibrate_data
from tests.helpers import example_bundle, simulate_responses

TRUTH = {"north": (0.0, 1.0), "south": (0.6, 0.8), "west": (-0.4, 1.3)}


@pytest.fixture(scope="module")
def simulated() -> tuple[BundleScorer, np.ndarray, list[str], np.ndarray, np.ndarray]:
    rng = np.random.default_rng(21)
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
    scorer = BundleScorer(calibrate_data(data, name="summaries").bundle)
    blocks, cohorts = [], []
    for region, (mean, sd) in TRUTH.items():
        blocks.append(simulate_responses(a, b, rng.normal(mean, sd, 2000), rng))
        cohorts += [region] * 2000
    return scorer, np.vstack(blocks), cohorts, a, b


def test_plausible_values_recover_group_means_and_sds_where_eap_averages_shrink(simulated) -> None:  # noqa: ANN001
    scorer, x, regions, _, _ = simulated
    result = summarize_groups(scorer, x, ["all"] * len(regions), cohorts=regions, percentiles=(50,))
    cells = {c.cohort: c for c in result.cells}
    eap = eap_scores(scorer.plans["all"].params, x).theta
    for region, (mean, sd) in TRUTH.items():
        cell = cells[region]
        # 2,000 respondents per group and a calibration of 3,000: the parent's scale error (~0.03) and the
        # sampling error (~0.03) make 0.1 about three SEs for the mean, 0.08 for the SD.
        assert cell.mean == pytest.approx(mean, abs=0.1) and cell.sd == pytest.approx(sd, abs=0.08)
        assert cell.ci_low < cell.mean < cell.ci_high and cell.se > cell.sd / np.sqrt(cell.n)  # measurement error adds
        shrunk = eap[np.asarray(regions) == region]
        if sd >= 1.0:  # EAP scores are shrunk towards the prior N(0, 1): they understate a spread of 1 or more
            assert abs(cell.sd - sd) < abs(shrunk.std() - sd) and shrunk.std() < sd
        if abs(mean) >= 0.5:  # ... and pull a mean away from 0 towards it
            assert abs(cell.mean - mean) < abs(shrunk.mean() - mean) and abs(shrunk.mean()) < abs(mean)
    gap = next(d for d in result.differences if {d.cohort, d.versus_cohort} == {"north", "south"})
    sign = 1 if gap.cohort == "north" else -1
    assert sign * gap.difference == pytest.approx(-0.6, abs=0.12) and gap.ci_low < gap.difference < gap.ci_high
    assert len(result.differences) == 3 and not result.warnings


def test_respondents_without_answers_are_left_out_and_counted(simulated) -> None:  # noqa: ANN001
    scorer, x, regions, _, _ = simulated
    blank = x.copy()
    blank[:5] = np.nan
    result = summarize_groups(scorer, blank, ["all"] * len(regions), cohorts=regions, draws=5)
    assert result.left_out == 5 and {c.cohort: c.n for c in result.cells}["north"] == 1995


def test_groups_scored_on_different_item_sets_are_named() -> None:
    bundle = example_bundle()  # T4 is left out for tablet
    scorer = BundleScorer(bundle)
    rng = np.random.default_rng(3)
    x = (rng.random((120, 6)) < 0.6).astype(float)
    groups = ["paper"] * 60 + ["tablet"] * 60
    result = summarize_groups(scorer, x, groups, draws=5)
    assert any("different item sets" in w and "tablet: T4" in w for w in result.warnings)
    assert {c.group: c.items_scored for c in result.cells} == {"paper": 6, "tablet": 5}
