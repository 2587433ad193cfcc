"""Two seeded calibration cycles with a known population shift, drifted items and new items.

Cycle 1: 18 right/wrong items and 2 graded ones, 2,000 respondents from N(0, 1). Cycle 2: the same
items (three right/wrong items made 0.9 harder: drift) plus four new ones, 2,000 respondents from
N(0.5, 1.2^2). The link must recover A = 1.2 and B = 0.5, name the drifted items and keep them out,
and put the new items on the first cycle's scale; answers to unchanged items must score the same
under both versions. Checked against the simulation's own truth (no reference library calibrates a
link of this kind).
"""

from __future__ import annotations

import numpy as np
import pytest

from calibration.bundle import Bundle, DirectoryStore
from calibration.bundle.scorer import BundleScorer
from calibration.errors import CalibrationInputError
from calibration.io import ResponseData
from calibration.pipeline import PipelineSettings, calibrate_data
from calibration.pipeline.link import LinkRequest
from tests.helpers import simulate_responses

N_OLD, N_NEW = 18, 4
DRIFTED = ("Q03", "Q08", "Q12")
SHIFT, SPREAD = 0.5, 1.2


def _generating() -> tuple[list[str], np.ndarray, np.ndarray]:
    rng = np.random.default_rng(2026)
    n = N_OLD + 2 + N_NEW
    ids = [f"Q{j:02d}" for j in range(n)]
    slopes = rng.uniform(0.9, 2.0, n)
    b = np.full((n, 2), np.nan)
    b[:, 0] = rng.normal(0.0, 0.9, n)
    b[N_OLD : N_OLD + 2] = [[-0.8, 0.6], [-0.3, 1.0]]  # two graded items (3 categories) among the common ones
    return ids, slopes, b


def _data(ids: list[str], slopes: np.ndarray, b: np.ndarray, theta: np.ndarray, rng: np.random.Generator, name: str):  # noqa: ANN202
    x = simulate_responses(slopes, b, theta, rng)
    k = (np.sum(~np.isnan(b), axis=1) + 1).astype(np.int64)
    return ResponseData(
        ids=tuple(f"{name}-{i}" for i in range(x.shape[0])),
        item_ids=tuple(ids),
        responses=x,
        n_categories=k,
        models=tuple("2pl" if kk == 2 else "grm" for kk in k),
        source=f"{name}.csv",
    )


@pytest.fixture(scope="module")
def cycles(tmp_path_factory: pytest.TempPathFactory) -> tuple[DirectoryStore, Bundle, ResponseData]:
    ids, slopes, b = _generating()
    rng = np.random.default_rng(7)
    first = _data(ids[: N_OLD + 2], slopes[: N_OLD + 2], b[: N_OLD + 2], rng.normal(size=2000), rng, "cycle1")
    store = DirectoryStore(tmp_path_factory.mktemp("store"))
    parent = store.publish(calibrate_data(first, name="skills").bundle)
    drifted_b = b.copy()
    drifted_b[[ids.index(item) for item in DRIFTED], 0] += 0.9
    second = _data(ids, slopes, drifted_b, rng.normal(SHIFT, SPREAD, 2000), rng, "cycle2")
    return store, parent, second


@pytest.fixture(scope="module")
def linked(cycles: tuple[DirectoryStore, Bundle, ResponseData]) -> dict[str, Bundle]:
    store, parent, second = cycles
    return {
        method: calibrate_data(second, name="skills", link=LinkRequest(parent, method)).bundle  # type: ignore[arg-type]
        for method in ("fixed-parameter", "stocking-lord", "haebara")
    }


@pytest.mark.parametrize("method", ["fixed-parameter", "stocking-lord", "haebara"])
def test_the_shift_is_recovered_and_the_drifted_items_are_kept_out(linked: dict[str, Bundle], method: str) -> None:
    link = linked[method].link
    assert link is not None and link.method == method
    # The parent's own estimation error (2,000 respondents) is not in the constants' SEs, so the tolerance
    # is absolute: 0.08 is about four SEs of such a calibration's location and unit.
    assert link.constants.intercept == pytest.approx(SHIFT, abs=0.08)
    assert link.constants.slope == pytest.approx(SPREAD, abs=0.08)
    assert link.constants.slope_se is not None and 0 < link.constants.slope_se < 0.05
    assert sorted(link.drifted_items) == sorted(DRIFTED)
    assert not set(DRIFTED) & set(link.link_items)
    assert len(link.link_items) == N_OLD + 2 - len(DRIFTED)
    assert link.new_items == [f"Q{j:02d}" for j in range(N_OLD + 2, N_OLD + 2 + N_NEW)]
    reference = linked[method].metric.groups[0]
    assert (reference.latent_mean, reference.latent_sd) == pytest.approx(
        (link.constants.intercept, link.constants.slope), abs=1e-9
    )


def test_the_drift_evidence_is_recorded_for_every_common_item(linked: dict[str, Bundle]) -> None:
    link = linked["fixed-parameter"].link
    assert link is not None
    rows = {row.item: row for row in link.drift}
    assert set(rows) == {f"Q{j:02d}" for j in range(N_OLD + 2)}
    for item in DRIFTED:
        row = rows[item]
        assert row.drifted and row.level == "large" and row.p_adjusted is not None and row.p_adjusted < 1e-6
        # The item was made 0.9 harder: this cycle's threshold on the parent's scale is about 0.9 above the published.
        assert -row.intercepts[0] / row.slope - (-row.parent_intercepts[0] / row.parent_slope) == pytest.approx(
            0.9, abs=0.25
        )
    assert all(not rows[i].drifted and rows[i].level != "large" for i in rows if i not in DRIFTED)


@pytest.mark.parametrize("method", ["fixed-parameter", "stocking-lord", "haebara"])
def test_new_items_land_on_the_parents_scale(linked: dict[str, Bundle], method: str) -> None:
    ids, slopes, b = _generating()
    items = {item.id: item for item in linked[method].items}
    for j in range(N_OLD + 2, N_OLD + 2 + N_NEW):
        # Generating values are on the first cycle's scale (N(0,1)); 2,000 respondents: 0.25 in b, 0.35 in a.
        assert items[ids[j]].thresholds[0] == pytest.approx(b[j, 0], abs=0.25)
        assert items[ids[j]].slope == pytest.approx(slopes[j], abs=0.35)


@pytest.mark.parametrize("method", ["fixed-parameter", "stocking-lord", "haebara"])
def test_answers_to_unchanged_items_score_the_same_under_both_versions(
    cycles: tuple[DirectoryStore, Bundle, ResponseData], linked: dict[str, Bundle], method: str
) -> None:
    _, parent, _ = cycles
    child = linked[method]
    link_items = child.link.link_items if child.link else []
    rng = np.random.default_rng(11)
    old_scorer, new_scorer = BundleScorer(parent), BundleScorer(child)
    for scorer in (old_scorer, new_scorer):
        assert scorer.bundle.scoring.prior_mean == 0.0 and scorer.bundle.scoring.prior_sd == 1.0

    def answers(scorer: BundleScorer) -> np.ndarray:
        x = np.full((5, len(scorer.item_ids)), np.nan)
        for item in link_items:
            x[:, scorer.item_ids.index(item)] = rng_values[item]
        return x

    rng_values = {item: rng.integers(0, 2, 5) for item in link_items}
    before = old_scorer.score(answers(old_scorer), old_scorer.resolve_groups(None, 5))
    after = new_scorer.score(answers(new_scorer), new_scorer.resolve_groups(None, 5))
    if method == "fixed-parameter":
        # The link items keep their published parameters and the prior is the parent's: the same posterior.
        np.testing.assert_allclose(after.theta, before.theta, atol=1e-12)
    else:
        assert np.all(np.abs(after.theta - before.theta) < np.minimum(before.se, after.se))


def test_a_link_keeps_the_parents_scoring_and_refuses_another_reporting_scale(
    cycles: tuple[DirectoryStore, Bundle, ResponseData], linked: dict[str, Bundle]
) -> None:
    _, parent, second = cycles
    assert linked["haebara"].scoring == parent.scoring.model_copy(
        update={"min_items_answered": linked["haebara"].scoring.min_items_answered}
    )
    from calibration.bundle.schema import ReportingScaleSettings

    other = PipelineSettings(reporting_scale=ReportingScaleSettings(location=250.0, scale=50.0, minimum=0, maximum=500))
    with pytest.raises(CalibrationInputError, match="reporting scale"):
        calibrate_data(second, name="skills", settings=other, link=LinkRequest(parent))


def test_a_link_without_enough_comparable_items_is_refused(cycles: tuple[DirectoryStore, Bundle, ResponseData]) -> None:
    _, parent, second = cycles
    keep = [0] + list(range(N_OLD + 2, N_OLD + 2 + N_NEW))  # one common item and the new ones
    few = ResponseData(
        ids=second.ids,
        item_ids=tuple(second.item_ids[j] for j in keep),
        responses=second.responses[:, keep],
        n_categories=second.n_categories[keep],
        models=tuple(second.models[j] for j in keep),
        source="few.csv",
    )
    with pytest.raises(CalibrationInputError, match="a link needs at least 2"):
        calibrate_data(few, name="skills", link=LinkRequest(parent))


def test_a_linked_version_is_published_and_read_back_with_its_link(
    cycles: tuple[DirectoryStore, Bundle, ResponseData], linked: dict[str, Bundle]
) -> None:
    store, parent, _ = cycles
    published = store.publish(linked["stocking-lord"])
    again = store.get("skills", published.version)
    assert again.link == linked["stocking-lord"].link
    assert again.link is not None and again.link.parent == parent.label and again.link.parent_hash == parent.hash


def test_with_groups_the_link_is_made_on_the_reference_group(tmp_path_factory: pytest.TempPathFactory) -> None:
    # The invented demo's two cycles (three sites; DOC03 made 0.9 easier in the second, every site 0.3
    # stronger). The child's reference group defaults to the parent's, the drifted task is kept out, every
    # site's mean moves by the shift, and each site's policy comes from the second cycle's own DIF screen.
    from calibration.demo import CYCLE_SHIFT, DRIFTED_TASK, make_demo_responses
    from calibration.io import read_responses

    root = tmp_path_factory.mktemp("sites")
    paths = []
    for cycle in (1, 2):
        path = root / f"cycle{cycle}.csv"
        make_demo_responses(1500, seed=40 + cycle, cycle=cycle).to_csv(path, index=False)
        paths.append(path)
    first, second = (read_responses(p, group_column="site") for p in paths)
    parent = DirectoryStore(root / "store").publish(
        calibrate_data(first, name="tidewater", reference_group="port-ellery").bundle
    )
    child = calibrate_data(second, name="tidewater", link=LinkRequest(parent)).bundle
    assert child.metric.reference_group == "port-ellery"
    assert child.link is not None and DRIFTED_TASK in child.link.drifted_items
    assert child.link.new_items == ["NUM09", "DIG09"]
    assert child.link.constants.intercept == pytest.approx(CYCLE_SHIFT, abs=0.12)
    means = {g.name: g.latent_mean for g in child.metric.groups}
    parent_means = {g.name: g.latent_mean for g in parent.metric.groups}
    for site, mean in means.items():  # every site 0.3 stronger on the parent's scale (1,500 split three ways)
        assert mean - parent_means[site] == pytest.approx(CYCLE_SHIFT, abs=0.15)
    # The policy is this cycle's own: its DIF screen tested every item in every focal site.
    assert child.dif is not None
    tested = {(row.item, row.group) for row in child.dif.irt}
    assert {(item.id, site) for item in child.items for site in ("marsh-creek", "ridgeview")} <= tested | {
        (a, site) for a in child.anchors.items for site in ("marsh-creek", "ridgeview")
    }
