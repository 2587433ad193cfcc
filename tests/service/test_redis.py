"""Real Redis: the store contract, two replicas sharing bundles, concurrent publishes, an outage."""

from __future__ import annotations

import json
import threading
import time
from pathlib import Path

import httpx
import pytest
import redis

from calibration.bundle import BundleNotFound, VersionConflict, seal
from calibration.bundle.redis_store import RedisStore, StoreUnavailable
from service.main import create_app
from service.registry import FEED_TRUST
from service.settings import Settings
from tests.helpers import auth, example_bundle, example_keys, live_server, poll

SCORE = {"responses": [{"id": "a", "group": "tablet", "answers": {"T1": 1, "T2": 0, "T3": 1, "T5": 1}}]}


def _settings(url: str, prefix: str) -> Settings:
    return Settings(store=url, redis_prefix=prefix, api_keys=example_keys(), log_level="warning")


def test_redis_store_keeps_the_store_contract(shared_redis: tuple[str, str]) -> None:
    url, prefix = shared_redis
    store = RedisStore(url, prefix=prefix)
    bundle = example_bundle()
    one, created = store.put_version(bundle)
    assert created and store.put_version(bundle) == (one, False)  # same content again: accepted
    two = store.publish(bundle)
    assert (one.version, two.version) == (1, 2) and store.versions("pantry-checkout") == [1, 2]
    assert store.names() == ["pantry-checkout"] and store.get("pantry-checkout", 2) == two
    other = seal(bundle.model_copy(update={"created_at": "2031-01-01T00:00:00Z", "hash": ""}))
    with pytest.raises(VersionConflict):
        store.put_version(other)
    store.set_alias("pantry-checkout", "production", 1, by="API key ops")
    store.set_alias("pantry-checkout", "production", 2, by="command line (ana|b)")
    assert store.alias_back("pantry-checkout", "production", by="API key ops").version == 1
    moves = store.aliases("pantry-checkout")["production"].history
    assert [(m.version, m.by) for m in moves] == [(1, "API key ops"), (2, "command line (ana/b)"), (1, "API key ops")]
    # A move recorded before the mover was kept ("version|time") reads as by an unknown mover.
    redis.Redis.from_url(url).rpush(store.key("alias-history", "pantry-checkout", "staging"), "1|2026-11-30T00:00:00Z")
    redis.Redis.from_url(url).hset(store.key("aliases", "pantry-checkout"), "staging", 1)
    assert store.aliases("pantry-checkout")["staging"].history[0].by == "unknown"
    with pytest.raises(BundleNotFound, match="no version 9"):
        store.get("pantry-checkout", 9)


def test_two_replicas_share_one_registry(shared_redis: tuple[str, str]) -> None:
    url, prefix = shared_redis
    document = json.loads(example_bundle().model_dump_json())
    first_app, second_app = create_app(_settings(url, prefix)), create_app(_settings(url, prefix))
    with live_server(first_app) as first, live_server(second_app) as second:
        published = httpx.put(
            f"{first}/v1/bundles/pantry-checkout/versions/1", json=document, headers=auth("publisher")
        )
        assert published.status_code == 201
        from_second = httpx.post(
            f"{second}/v1/bundles/pantry-checkout/versions/1/scores", json=SCORE, headers=auth("scorer")
        )
        from_first = httpx.post(
            f"{first}/v1/bundles/pantry-checkout/versions/1/scores", json=SCORE, headers=auth("scorer")
        )
        assert from_second.status_code == 200 and from_second.json() == from_first.json()
        # A new version and an alias move through the first replica are what the second one scores with.
        document["created_at"] = "2026-12-05T00:00:00Z"
        document["provenance"]["notes"] = ["recalibrated after a content review"]  # other content: a new version
        document["hash"] = ""
        created = httpx.post(f"{first}/v1/bundles/pantry-checkout/versions", json=document, headers=auth("publisher"))
        assert created.json()["version"] == 2
        httpx.put(
            f"{first}/v1/bundles/pantry-checkout/aliases/production", json={"version": 2}, headers=auth("publisher")
        )

        # The second replica learns of the move from the change feed (milliseconds; FEED_TRUST at most).
        def second_scores_with_two() -> bool:
            scored = httpx.post(f"{second}/v1/bundles/pantry-checkout/scores", json=SCORE, headers=auth("scorer"))
            return scored.json()["bundle"]["version"] == 2

        assert poll(second_scores_with_two, timeout=FEED_TRUST + 1)
        listing = httpx.get(f"{second}/v1/bundles", headers=auth("reader")).json()
        assert listing == {"bundles": [{"name": "pantry-checkout", "versions": [1, 2], "aliases": {"production": 2}}]}


def test_concurrent_publishes_of_one_version_exactly_one_wins(shared_redis: tuple[str, str]) -> None:
    url, prefix = shared_redis
    base = json.loads(example_bundle().model_dump_json())
    documents = [dict(base, created_at=f"2026-12-{day:02d}T00:00:00Z", hash="") for day in range(10, 22)]
    seen: list[tuple[int, str]] = []
    stop = threading.Event()
    with live_server(create_app(_settings(url, prefix))) as server:

        def reader() -> None:
            with httpx.Client() as client:
                while not stop.is_set():
                    reply = client.get(f"{server}/v1/bundles/pantry-checkout/versions/1", headers=auth("reader"))
                    seen.append((reply.status_code, reply.json().get("hash", "")))

        def publish(document: dict, out: list) -> None:
            out.append(
                httpx.put(
                    f"{server}/v1/bundles/pantry-checkout/versions/1",
                    json=document,
                    headers=auth("publisher"),
                    timeout=30,
                ).status_code
            )

        watcher = threading.Thread(target=reader)
        watcher.start()
        codes: list[int] = []
        threads = [threading.Thread(target=publish, args=(d, codes)) for d in documents]
        for t in threads:
            t.start()
        for t in threads:
            t.join()
        time.sleep(0.1)
        stop.set()
        watcher.join()
        final = httpx.get(f"{server}/v1/bundles/pantry-checkout/versions/1", headers=auth("reader")).json()
    assert sorted(codes) == [201] + [409] * (len(documents) - 1)
    # Readers only ever saw "not there yet" or the winner's complete, verified document.
    assert {status for status, _ in seen} <= {200, 404}
    assert {h for status, h in seen if status == 200} <= {final["hash"]}


def test_redis_outage_keeps_scoring_and_flips_readiness(private_redis: tuple[str, object]) -> None:
    url, process = private_redis
    RedisStore(url, prefix="outage").put_version(example_bundle())
    with live_server(create_app(_settings(url, "outage"))) as server:
        assert httpx.get(f"{server}/readyz").json()["status"] == "ready"
        before = httpx.post(f"{server}/v1/bundles/pantry-checkout/scores", json=SCORE, headers=auth("scorer"))
        assert before.status_code == 200
        process.terminate()  # type: ignore[attr-defined]
        process.wait(10)  # type: ignore[attr-defined]
        # The background probe notices within a second or two; readiness never waits on the store itself.
        assert poll(lambda: httpx.get(f"{server}/readyz").json()["status"] == "degraded")
        ready = httpx.get(f"{server}/readyz")
        assert ready.status_code == 200
        after = httpx.post(f"{server}/v1/bundles/pantry-checkout/scores", json=SCORE, headers=auth("scorer"))
        assert after.status_code == 200 and after.json() == before.json()
        pinned = httpx.post(
            f"{server}/v1/bundles/pantry-checkout/versions/1/scores", json=SCORE, headers=auth("scorer")
        )
        assert pinned.status_code == 200
        document = json.loads(example_bundle().model_dump_json())
        refused = httpx.post(f"{server}/v1/bundles/pantry-checkout/versions", json=document, headers=auth("publisher"))
        assert refused.status_code == 503
        assert refused.headers["content-type"] == "application/problem+json"
        assert refused.json()["type"].endswith("/store-unavailable")
        unknown = httpx.post(f"{server}/v1/bundles/other/scores", json=SCORE, headers=auth("scorer"))
        assert unknown.status_code == 503
    with pytest.raises(StoreUnavailable):
        RedisStore(url, prefix="outage", timeout=0.5).versions("pantry-checkout")


def test_change_feed_warms_the_other_replica(shared_redis: tuple[str, str]) -> None:
    url, prefix = shared_redis
    document = json.loads(example_bundle().model_dump_json())
    first_app, second_app = create_app(_settings(url, prefix)), create_app(_settings(url, prefix))
    with live_server(first_app) as first, live_server(second_app) as second:
        assert httpx.get(f"{second}/readyz").json()["bundles_loaded"] == 0
        httpx.put(f"{first}/v1/bundles/pantry-checkout/versions/1", json=document, headers=auth("publisher"))
        # No request reaches the second replica for that bundle: its listener loads it from the channel.
        deadline = time.time() + 10
        while second_app.state.registry.loaded_count == 0 and time.time() < deadline:
            time.sleep(0.05)
        assert second_app.state.registry.loaded_count == 1


def test_cli_publishes_to_redis_and_the_service_scores_it(
    shared_redis: tuple[str, str], tmp_path: Path, monkeypatch: pytest.MonkeyPatch
) -> None:
    from calibration.cli import main as cli_main
    from calibration.demo import make_demo_responses

    url, prefix = shared_redis
    monkeypatch.setenv("EQUITHETA_REDIS_PREFIX", prefix)
    data = tmp_path / "skills.csv"
    make_demo_responses(600, seed=2, with_sites=False).to_csv(data, index=False)
    assert cli_main(["calibrate", str(data), "--name", "skills", "--store", url, "--alias", "production"]) == 0
    with live_server(create_app(_settings(url, prefix))) as server:
        reply = httpx.post(
            f"{server}/v1/bundles/skills/scores",
            headers=auth("scorer"),
            json={"responses": [{"id": "x", "answers": {"NUM01": 1, "DIG01": 2}}]},
        )
    assert reply.status_code == 200 and reply.json()["bundle"]["version"] == 1


def test_unpinned_requests_are_answered_from_memory_while_the_feed_is_live(shared_redis: tuple[str, str]) -> None:
    # With the change feed subscribed, the default route makes no store call; an alias moved by
    # another client straight in Redis still reaches it through the feed.
    url, prefix = shared_redis
    document = json.loads(example_bundle().model_dump_json())
    app = create_app(_settings(url, prefix))
    with live_server(app) as server:
        httpx.put(f"{server}/v1/bundles/pantry-checkout/versions/1", json=document, headers=auth("publisher"))
        document["provenance"]["notes"] = ["second calibration"]
        document["hash"] = ""
        httpx.post(f"{server}/v1/bundles/pantry-checkout/versions", json=document, headers=auth("publisher"))
        registry = app.state.registry
        assert poll(lambda: registry.default_held("pantry-checkout") is not None)
        calls = []
        original = registry.store.aliases
        registry.store.aliases = lambda name: calls.append(name) or original(name)  # count store reads
        answer = httpx.post(f"{server}/v1/bundles/pantry-checkout/scores", json=SCORE, headers=auth("scorer"))
        assert answer.json()["bundle"]["version"] == 2 and calls == []
        RedisStore(url, prefix=prefix).set_alias("pantry-checkout", "production", 1)  # another client

        def moved() -> bool:
            scored = httpx.post(f"{server}/v1/bundles/pantry-checkout/scores", json=SCORE, headers=auth("scorer"))
            return scored.json()["bundle"]["version"] == 1

        assert poll(moved, timeout=FEED_TRUST + 1)
