"""The drift watch end to end with real Redis: simulated production traffic where one item drifts for one
group is flagged, the stable items are not, and Redis holds counts only (its keys and values inspected)."""

from __future__ import annotations

import json

import numpy as np
import pytest
import redis
from fastapi.testclient import TestClient
from pydantic import ValidationError

from calibration.bundle.redis_store import RedisStore
from service.main import create_app
from service.settings import Settings
from tests.helpers import auth, example_bundle, example_keys, poll, simulate_responses

DRIFTED_ITEM, DRIFTED_GROUP = "T2", "paper"


def _traffic(seed: int, n_per_group: int) -> list[dict]:
    """Respondents answering the example bundle's six tasks; T2 is 1.0 harder at paper than published."""
    bundle = example_bundle()
    rng = np.random.default_rng(seed)
    slopes = np.array([item.slope for item in bundle.items])
    thresholds = np.array([item.thresholds for item in bundle.items])
    vectors = []
    for group in ("paper", "tablet"):
        b = thresholds.copy()
        if group == DRIFTED_GROUP:
            b[[i.id for i in bundle.items].index(DRIFTED_ITEM), 0] += 1.0
        x = simulate_responses(slopes, b, rng.normal(size=n_per_group), rng)
        for i, row in enumerate(x):
            answers = {item.id: int(v) for item, v in zip(bundle.items, row, strict=True)}
            vectors.append({"id": f"{group}-person-{i}", "group": group, "answers": answers})
    return vectors


def test_a_drifting_item_is_flagged_stable_ones_are_not_and_only_counts_are_kept(
    shared_redis: tuple[str, str],
) -> None:
    url, prefix = shared_redis
    store = RedisStore(url, prefix=prefix)
    store.put_version(example_bundle())
    settings = Settings(
        store=url,
        redis_prefix=prefix,
        api_keys=example_keys(),
        log_level="warning",
        drift_watch=True,
        drift_flush_seconds=0.2,
    )
    vectors = _traffic(seed=5, n_per_group=1500)
    with TestClient(create_app(settings)) as client:
        for start in range(0, len(vectors), 500):
            reply = client.post(
                "/v1/bundles/pantry-checkout/scores",
                json={"responses": vectors[start : start + 500]},
                headers=auth("scorer"),
            )
            assert reply.status_code == 200, reply.text

        def report() -> dict:
            return client.get("/v1/bundles/pantry-checkout/versions/1/drift", headers=auth("reader")).json()

        # Every worker adds its counts every 0.2 s: wait (bounded) until all respondents are counted.
        assert poll(lambda: sum(report()["respondents"].values()) == len(vectors), timeout=10)
        final = report()
    rows = {(r["item"], r["group"]): r for r in final["rows"]}
    assert rows[(DRIFTED_ITEM, DRIFTED_GROUP)]["flagged"] and rows[(DRIFTED_ITEM, DRIFTED_GROUP)]["rmsd"] > 0.1
    stable = [r for key, r in rows.items() if key != (DRIFTED_ITEM, DRIFTED_GROUP)]
    assert stable and not any(r["flagged"] for r in stable)
    assert all(r["responses"] == pytest.approx(1500) for r in rows.values())
    assert ("T4", "tablet") not in rows  # left out for tablet by the bundle's policy: not watched there
    # Redis holds the store's own keys and one hash of sums: no answer vector, no id, no score.
    client = redis.Redis.from_url(url)
    keys = {k.decode() for k in client.scan_iter(f"{prefix}:*")}
    drift_keys = [k for k in keys if ":drift:" in k]
    assert drift_keys == [f"{prefix}:drift:pantry-checkout:1"]
    for field, value in client.hgetall(drift_keys[0]).items():
        group, item, b, kind = json.loads(field)
        assert group in ("paper", "tablet") and (
            item in {i.id for i in example_bundle().items} or kind == "respondents"
        )
        assert isinstance(b, int) and kind in (0, 1, "model", "respondents")
        float(value)
    everything = b"".join(
        (client.dump(k) or b"") for k in keys
    )  # every stored byte: no respondent id may appear anywhere
    assert b"person-" not in everything


def test_the_drift_watch_needs_redis_and_a_directory_store_answers_404(example_store, keyed_settings) -> None:  # noqa: ANN001
    with pytest.raises(ValidationError, match="EQUITHETA_DRIFT_WATCH=true keeps its counts in the shared Redis"):
        Settings(store=str(example_store), drift_watch=True)
    with TestClient(create_app(keyed_settings)) as client:
        reply = client.get("/v1/bundles/pantry-checkout/versions/1/drift", headers=auth("reader"))
    assert reply.status_code == 404 and reply.json()["type"].endswith("/drift-counts-not-kept")


def test_the_command_line_prints_the_report_from_redis(
    shared_redis: tuple[str, str], monkeypatch: pytest.MonkeyPatch, capsys: pytest.CaptureFixture, tmp_path
) -> None:  # noqa: ANN001
    from calibration.bundle.drift_watch import add_counts, batch_counts
    from calibration.bundle.scorer import BundleScorer
    from calibration.cli import main

    url, prefix = shared_redis
    monkeypatch.setenv("EQUITHETA_REDIS_PREFIX", prefix)
    store = RedisStore(url, prefix=prefix)
    bundle, _ = store.put_version(example_bundle())
    scorer = BundleScorer(bundle)
    vectors = _traffic(seed=6, n_per_group=1500)
    x = np.array([[v["answers"].get(i, np.nan) for i in scorer.item_ids] for v in vectors], dtype=float)
    add_counts(store, bundle.name, bundle.version, batch_counts(scorer, x, [v["group"] for v in vectors]).items())
    assert main(["drift", "pantry-checkout@1", "--store", url]) == 0
    out = capsys.readouterr().out
    assert "respondents counted by group: paper 1500, tablet 1500" in out
    flagged = [line for line in out.splitlines() if "FLAGGED" in line]
    assert len(flagged) == 1 and DRIFTED_ITEM in flagged[0] and DRIFTED_GROUP in flagged[0]
    assert main(["drift", "pantry-checkout@1", "--store", str(tmp_path)]) == 2  # a directory keeps no counts
    assert "shared Redis store" in capsys.readouterr().err
