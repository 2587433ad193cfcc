"""The summaries route: the same answer as the library (same seed), cohorts, and its errors."""

from __future__ import annotations

import numpy as np
from fastapi.testclient import TestClient

from calibration.bundle.scorer import BundleScorer
from calibration.bundle.summaries import summarize_groups
from service.main import create_app
from service.settings import Settings
from tests.helpers import auth, example_bundle, simulate_responses
from tests.service.test_examples import _same

PATH = "/v1/bundles/pantry-checkout/summaries"


def _vectors(n: int, seed: int) -> list[dict]:
    bundle = example_bundle()
    rng = np.random.default_rng(seed)
    slopes = np.array([item.slope for item in bundle.items])
    thresholds = np.array([item.thresholds for item in bundle.items])
    out = []
    for group, shift in (("paper", 0.0), ("tablet", 0.4)):
        x = simulate_responses(slopes, thresholds, rng.normal(shift, 1.0, n), rng)
        for i, row in enumerate(x):
            answers = {item.id: int(v) for item, v in zip(bundle.items, row, strict=True)}
            out.append({"id": f"{group}{i}", "group": group, "cohort": "2026" if i % 2 else "2027", "answers": answers})
    return out


def test_route_equals_the_library_and_carries_cohorts(keyed_settings: Settings) -> None:
    vectors = _vectors(300, seed=9)
    body = {"responses": vectors, "options": {"plausible_values": 8, "seed": 5, "percentiles": [50]}}
    with TestClient(create_app(keyed_settings)) as client:
        reply = client.post(PATH, json=body, headers=auth("scorer"))
    assert reply.status_code == 200, reply.text
    document = reply.json()
    scorer = BundleScorer(example_bundle())
    x = np.array([[v["answers"][i] for i in scorer.item_ids] for v in vectors], dtype=float)
    groups = [v["group"] for v in vectors]
    library = summarize_groups(
        scorer, x, groups, cohorts=[v["cohort"] for v in vectors], draws=8, seed=5, percentiles=(50,)
    )
    # The route runs the library's computation on the same answers and seed: the same numbers (JSON floats round
    # trip exactly), the same words.
    assert _same(document, library.model_dump(mode="json"))
    assert {(c["group"], c["cohort"]) for c in document["cells"]} == {
        (g, c) for g in ("paper", "tablet") for c in ("2026", "2027")
    }
    assert len(document["differences"]) == 6 and any("different item sets" in w for w in document["warnings"])


def test_route_errors_name_the_vector(keyed_settings: Settings) -> None:
    vectors = _vectors(5, seed=2)
    with TestClient(create_app(keyed_settings)) as client:
        del vectors[3]["cohort"]
        missing = client.post(PATH, json={"responses": vectors}, headers=auth("scorer"))
        assert missing.status_code == 422 and "responses[3]" in missing.json()["detail"]
        vectors[3]["cohort"] = "2026"
        vectors[1]["group"] = "kiosk"
        unknown = client.post(PATH, json={"responses": vectors}, headers=auth("scorer"))
        assert unknown.status_code == 422 and "kiosk" in unknown.json()["detail"]
        assert client.post(PATH, json={"responses": vectors}, headers=auth("reader")).status_code == 403
        too_many = client.post(
            PATH, json={"responses": vectors, "options": {"plausible_values": 0}}, headers=auth("scorer")
        )
        assert too_many.status_code == 422
