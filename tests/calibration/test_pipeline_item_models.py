"""A mixed test (3PL, GPCM, PCM, graded) through the whole product: item spec, group DIF, the bundle (schema 4),
scoring against written-out quadrature, the service, the report and the older schema's refusal."""

from __future__ import annotations

import math

import numpy as np
import pandas as pd
import pytest
from fastapi.testclient import TestClient
from pydantic import ValidationError
from scipy import optimize

from calibration.bundle import Bundle, DirectoryStore
from calibration.bundle.canonical import document_of, from_bytes, to_bytes
from calibration.bundle.scorer import BundleScorer
from calibration.cli import main
from calibration.irt.models import ItemParameters
from calibration.irt.simulate import simulate_items
from calibration.report.page import render_report
from service.main import create_app
from service.settings import Settings

DIF_3PL, DIF_GPCM, HELD = "MC03", "PC02", "MC01"


def truth() -> tuple[list[str], list[tuple[float, list[float], str, float | None]]]:
    rng = np.random.default_rng(70)
    ids, rows = [], []
    for j in range(9):
        slope = float(rng.uniform(1.0, 2.0))
        g = 0.2 if j == 0 else float(rng.uniform(0.12, 0.28))
        rows.append((slope, [float(-slope * rng.normal(0.0, 0.8))], "3pl", g))
        ids.append(f"MC{j + 1:02d}")
    for j in range(3):
        slope = float(rng.uniform(0.8, 1.6))
        rows.append((slope, [float(v) for v in -slope * rng.normal(0.0, 1.0, 3)], "gpcm", None))
        ids.append(f"PC{j + 1:02d}")
    for j in range(2):
        rows.append((1.0, [float(v) for v in -np.sort(rng.normal(0.0, 1.0, 2))[::-1]], "pcm", None))
        ids.append(f"RA{j + 1:02d}")
    rows.append((1.3, [1.0, -0.6], "grm", None))
    ids.append("GR01")
    return ids, rows


@pytest.fixture(scope="module")
def mixed(tmp_path_factory: pytest.TempPathFactory) -> dict:
    root = tmp_path_factory.mktemp("mixed")
    ids, rows = truth()
    rng = np.random.default_rng(71)
    n = 5000
    group = rng.integers(0, 2, n)
    theta = rng.normal(size=n) + 0.3 * group
    x = simulate_items(ItemParameters.stack(rows), theta, rng)
    # Built-in DIF for the tablet group: one 3PL item and one GPCM item 0.9 harder.
    shifted = [
        (a, [c - 0.9 * a for c in cs] if i in (ids.index(DIF_3PL), ids.index(DIF_GPCM)) else cs, m, g)
        for i, (a, cs, m, g) in enumerate(rows)
    ]
    focal = simulate_items(ItemParameters.stack(shifted), theta, rng)
    x[group == 1] = focal[group == 1]
    frame = pd.DataFrame(x.astype(int), columns=ids)
    frame.insert(0, "mode", np.where(group == 1, "tablet", "paper"))
    frame.insert(0, "id", [f"r{i:05d}" for i in range(n)])
    frame.to_csv(root / "mixed.csv", index=False)
    spec = pd.DataFrame({"item": ids, "model": [r[2] for r in rows], "guessing": ""})
    spec.loc[ids.index(HELD), "guessing"] = "0.2"
    spec.to_csv(root / "spec.csv", index=False)
    store = root / "store"
    code = main(
        ["calibrate", str(root / "mixed.csv"), "--items", str(root / "spec.csv"), "--name", "mixed",
         "--store", str(store), "--group-column", "mode", "--reference-group", "paper", "--dif-action", "free"]
    )  # fmt: skip
    assert code == 0
    return {"root": root, "store": store, "bundle": DirectoryStore(store).get("mixed", 1), "frame": frame}


def test_bundle_carries_the_models(mixed: dict) -> None:
    bundle: Bundle = mixed["bundle"]
    assert bundle.schema_version == "4"
    items = {item.id: item for item in bundle.items}
    assert {item.model for item in bundle.items} == {"3pl", "gpcm", "pcm", "grm"}
    assert items[HELD].guessing == 0.2 and items[HELD].guessing_se is None
    for item in bundle.items:
        if item.model == "3pl" and item.id != HELD:
            assert 0.0 < item.guessing < 0.5 and item.guessing_se is not None and item.guessing_se > 0
        if item.model != "3pl":
            assert item.guessing is None
    assert items["RA01"].slope == items["RA02"].slope  # the Rasch family shares one slope
    for quality in bundle.quality.by_group.values():  # category functioning of every polytomous item
        assert set(quality.categories) == {i.id for i in bundle.items if i.n_categories > 2}
        assert all(sum(c.counts) > 0 and len(c.modal) == len(c.counts) for c in quality.categories.values())
    assert "beta(alpha=5, beta=17)" in bundle.provenance.settings["guessing_prior"]
    assert bundle.provenance.settings["held_asymptotes"] == f"{HELD}=0.2"
    # The stored bytes are the canonical form and read back to the same bundle.
    data = to_bytes(bundle)
    assert to_bytes(from_bytes(data, source="test")) == data


def test_dif_on_3pl_and_partial_credit_items(mixed: dict) -> None:
    # --dif-action free: the flagged cells get the group's own parameters, a 3PL item's with its asymptote.
    bundle: Bundle = mixed["bundle"]
    items = {item.id: item for item in bundle.items}
    own_3pl, own_gpcm = items[DIF_3PL].policy["tablet"], items[DIF_GPCM].policy["tablet"]
    assert own_3pl.status == "group_specific" and own_3pl.guessing is not None
    assert own_gpcm.status == "group_specific" and own_gpcm.guessing is None and len(own_gpcm.intercepts) == 3
    # Built in: 0.9 harder for the tablet group, i.e. intercepts 0.9 slope lower.
    assert own_3pl.intercepts[0] - items[DIF_3PL].intercepts[0] == pytest.approx(-0.9 * items[DIF_3PL].slope, abs=0.45)
    plan = BundleScorer(bundle).plans["tablet"]
    at = list(plan.columns).index([i.id for i in bundle.items].index(DIF_3PL))
    assert plan.params.guessing[at] == own_3pl.guessing and plan.params.intercepts[at, 0] == own_3pl.intercepts[0]
    flagged = {i.id for i in bundle.items if i.policy["tablet"].status != "invariant"}
    assert flagged <= {DIF_3PL, DIF_GPCM, "MC09"}  # the built-in cells and at most one false flag
    rows = {(r.item, r.stage): r for r in bundle.dif.irt}
    test = rows[(DIF_3PL, "test")]
    assert test.df_omnibus == 3  # slope, intercept and asymptote
    assert test.reference_guessing is not None and test.focal_guessing is not None
    assert rows[(DIF_GPCM, "test")].df_omnibus == 4
    held = [r for (item, _), r in rows.items() if item == HELD]
    assert held and all(r.df_omnibus == 2 for r in held)  # the held asymptote is not tested


def written_out(bundle: Bundle, group: str, theta: float) -> list[list[float]]:
    """Category probabilities of the group's items from the bundle's numbers, by the models' formulas."""
    out = []
    for item in bundle.items:
        policy = item.policy[group]
        if policy.status == "excluded":
            continue
        a, c, g = item.slope, item.intercepts, item.guessing
        if policy.status == "group_specific":
            a, c, g = policy.slope, policy.intercepts, policy.guessing
        if item.model == "3pl":
            right = g + (1 - g) / (1 + math.exp(-(a * theta + c[0])))
            out.append([1 - right, right])
        elif item.model in ("gpcm", "pcm"):
            numerators = [math.exp(sum(a * theta + c[v] for v in range(m))) for m in range(len(c) + 1)]
            out.append([v / sum(numerators) for v in numerators])
        else:
            star = [1.0] + [1 / (1 + math.exp(-(a * theta + cm))) for cm in c] + [0.0]
            out.append([star[m] - star[m + 1] for m in range(len(c) + 1)])
    return out


def test_scores_equal_written_out_quadrature_and_scipy(mixed: dict) -> None:
    bundle: Bundle = mixed["bundle"]
    scorer = BundleScorer(bundle)
    frame = mixed["frame"].head(6)
    kept = [i.id for i in bundle.items if i.policy["tablet"].status != "excluded"]
    assert len(kept) == len(bundle.items)  # --dif-action free: nothing left out
    groups = ["tablet"] * 6
    answers = frame[[i.id for i in bundle.items]].to_numpy(dtype=float)
    eap = scorer.score(answers, groups=groups, method="eap")
    map_ = scorer.score(answers, groups=groups, method="map")
    grid = scorer.grid.points
    prior_mean, prior_sd = bundle.scoring.prior_mean, bundle.scoring.prior_sd
    for i in range(6):
        row = frame.iloc[i]

        def log_post(t: float, row: pd.Series = row) -> float:
            probs = written_out(bundle, "tablet", t)
            value = -0.5 * ((t - prior_mean) / prior_sd) ** 2
            return value + sum(math.log(p[int(row[item])]) for p, item in zip(probs, kept, strict=True))

        weights = np.exp([log_post(t) for t in grid])
        mean = float(weights @ grid / weights.sum())
        assert eap.theta[i] == pytest.approx(mean, abs=1e-9)
        best = optimize.minimize_scalar(lambda t: -log_post(t), bounds=(-6, 6), method="bounded",
                                        options={"xatol": 1e-10})  # fmt: skip
        assert map_.theta[i] == pytest.approx(best.x, abs=1e-5)


def test_service_scores_the_mixed_bundle(mixed: dict) -> None:
    bundle: Bundle = mixed["bundle"]
    frame = mixed["frame"].head(3)
    body = {
        "responses": [
            {"id": r["id"], "group": r["mode"], "answers": {i.id: int(r[i.id]) for i in bundle.items}}
            for _, r in frame.iterrows()
        ]
    }
    with TestClient(create_app(Settings(store=str(mixed["store"]), log_level="warning"))) as client:
        reply = client.post("/v1/bundles/mixed/scores", json=body)
    assert reply.status_code == 200, reply.text
    expected = BundleScorer(bundle).score(
        frame[[i.id for i in bundle.items]].to_numpy(dtype=float), groups=list(frame["mode"]), method="eap"
    )
    thetas = [s["theta"] for s in reply.json()["results"]]
    np.testing.assert_allclose(thetas, expected.theta, atol=1e-6)


def test_report_lists_the_asymptotes(mixed: dict) -> None:
    page = render_report(mixed["bundle"])
    assert "asymptote (SE)" in page and "0.200 held" in page and "gpcm" in page
    assert "Category functioning" in page and "most probable (theta)" in page


def test_earlier_schema_versions_refuse_the_new_models(mixed: dict) -> None:
    document = document_of(mixed["bundle"])
    document["schema_version"] = "3"
    with pytest.raises(ValidationError, match="item models 3pl, gpcm, pcm need schema version 4"):
        Bundle.model_validate(document)
