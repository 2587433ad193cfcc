"""Secrets, faults and hostile input: one test per defect of the service drill.

Redis is real: a private ``redis-server`` on a free port for anything destructive (stopped,
stalled with SIGSTOP, emptied), the machine's server with a key prefix of the test's own
otherwise; the HTTP layer is a live uvicorn where it matters.
"""

from __future__ import annotations

import json
import os
import signal
import subprocess
import sys
import threading
import time
from pathlib import Path

import httpx
import pytest
import redis
from fastapi.testclient import TestClient

from calibration.bundle import DirectoryStore
from calibration.bundle.directory_store import STALE_TEMP_SECONDS
from calibration.bundle.redis_store import RedisStore
from calibration.bundle.schema import Bundle
from service.main import create_app
from service.registry import BundleRegistry
from service.settings import Settings
from tests.helpers import (
    auth,
    example_bundle,
    example_keys,
    free_port,
    live_server,
    metric_value,
    poll,
    start_private_redis,
    stop_process,
)

SCORE = {"responses": [{"id": "a", "group": "tablet", "answers": {"T1": 1, "T2": 0, "T3": 1, "T5": 1}}]}
PASSWORD = "s3cret-Tidewater-9f2"


def _settings(url: str, prefix: str = "equitheta", **extra: object) -> Settings:
    return Settings(store=url, redis_prefix=prefix, api_keys=example_keys(), log_level="info", **extra)


def _document(**changes: object) -> dict:
    document = json.loads(example_bundle().model_dump_json())
    document.update(changes)
    return document


# -- security -------------------------------------------------------------------------------------------
def test_redis_password_appears_in_no_message_log_or_answer(tmp_path: Path, capfd: pytest.CaptureFixture) -> None:
    url, process = start_private_redis(tmp_path, password=PASSWORD)
    try:
        store = RedisStore(url)
        store.put_version(example_bundle())
        assert PASSWORD not in repr(store) and PASSWORD not in repr(_settings(url))
        with live_server(create_app(_settings(url))) as server:
            assert httpx.get(f"{server}/readyz").json()["status"] == "ready"
            stop_process(process)
            assert poll(lambda: httpx.get(f"{server}/readyz").json()["status"] == "degraded")
            ready = httpx.get(f"{server}/readyz")
            refused = httpx.post(
                f"{server}/v1/bundles/pantry-checkout/versions", json=_document(), headers=auth("publisher")
            )
            unknown = httpx.post(f"{server}/v1/bundles/other/scores", json=SCORE, headers=auth("scorer"))
            scraped = httpx.get(f"{server}/metrics")
        assert refused.status_code == 503 and unknown.status_code == 503
        assert "***@127.0.0.1" in ready.json()["detail"]  # the store is named, its password is not
        for text in (ready.text, refused.text, unknown.text, scraped.text):
            assert PASSWORD not in text
        logs = capfd.readouterr()
        assert PASSWORD not in logs.err + logs.out
        assert '"event": "startup"' in logs.err  # the start-up line (with the store) was written
    finally:
        stop_process(process)


def test_metrics_can_require_a_scope_and_docs_can_be_turned_off(example_store: Path) -> None:
    settings = Settings(
        store=str(example_store), api_keys=example_keys(), log_level="warning", metrics_scope="read", docs=False
    )
    with TestClient(create_app(settings)) as client:
        assert client.get("/metrics").status_code == 401
        assert client.get("/metrics", headers=auth("scorer")).status_code == 403
        assert client.get("/metrics", headers=auth("reader")).status_code == 200
        for route in ("/docs", "/redoc", "/openapi.json"):
            assert client.get(route).status_code == 404
        assert client.get("/healthz").status_code == 200  # still open: probes carry no keys
    open_settings = Settings(store=str(example_store), api_keys=example_keys(), log_level="warning")
    with TestClient(create_app(open_settings)) as client:
        assert client.get("/metrics").status_code == 200 and client.get("/openapi.json").status_code == 200


def test_absurd_parameters_are_refused_on_publish_naming_item_and_field(example_store: Path) -> None:
    settings = Settings(store=str(example_store), api_keys=example_keys(), log_level="warning")
    document = _document(hash="", version=2)
    document["items"][2]["slope"] = 1e308
    with TestClient(create_app(settings)) as client:
        reply = client.put("/v1/bundles/pantry-checkout/versions/2", json=document, headers=auth("publisher"))
        assert reply.status_code == 422
        body = reply.json()
        assert body["errors"][0]["field"] == "body.items.2"
        assert "item 'T3': slope 1e+308 is outside -20..20" in body["detail"]
        document["items"][2]["slope"] = 1.2
        document["items"][0]["intercepts"] = [1e300]
        reply = client.put("/v1/bundles/pantry-checkout/versions/2", json=document, headers=auth("publisher"))
        assert reply.status_code == 422 and "item 'T1': intercept 1 = 1e+300 is outside" in reply.json()["detail"]
        raw = json.dumps(_document(hash="", version=2)).replace('"latent_sd": 1.0', '"latent_sd": 1e999', 1)
        reply = client.put("/v1/bundles/pantry-checkout/versions/2", content=raw, headers=auth("publisher"))
        assert reply.status_code == 422
    assert DirectoryStore(example_store).versions("pantry-checkout") == [1]  # nothing was published


# -- faults ---------------------------------------------------------------------------------------------
def test_a_stalled_redis_is_not_asked_on_the_request_path(tmp_path: Path) -> None:
    url, process = start_private_redis(tmp_path)
    try:
        store = RedisStore(url)
        store.put_version(example_bundle())
        store.set_alias("pantry-checkout", "production", 1)
        app = create_app(_settings(url))
        with live_server(app) as server:
            before = httpx.post(f"{server}/v1/bundles/pantry-checkout/scores", json=SCORE, headers=auth("scorer"))
            statuses: list[int] = []
            done = threading.Event()

            def load() -> None:  # requests all through the stall, from its first instant
                with httpx.Client(headers=auth("scorer"), timeout=30) as client:
                    while not done.is_set():
                        statuses.append(
                            client.post(f"{server}/v1/bundles/pantry-checkout/scores", json=SCORE).status_code
                        )

            loader = threading.Thread(target=load)
            os.kill(process.pid, signal.SIGSTOP)  # a partition: no reset, no answer
            loader.start()
            try:
                assert poll(lambda: httpx.get(f"{server}/readyz").json()["status"] == "degraded")
                registry = app.state.registry
                skipped = registry.skipped_store_calls
                answers = [
                    httpx.post(f"{server}/v1/bundles/pantry-checkout/scores", json=SCORE, headers=auth("scorer"))
                    for _ in range(10)
                ]
                assert all(a.status_code == 200 and a.json() == before.json() for a in answers)
                # Every default-route request was answered from memory, none waited on the stalled server.
                assert registry.skipped_store_calls - skipped >= 10
            finally:
                done.set()
                loader.join(30)
                os.kill(process.pid, signal.SIGCONT)
            assert statuses and set(statuses) == {200}  # not one failed score request under the stall
            assert poll(lambda: httpx.get(f"{server}/readyz").json()["status"] == "ready")
    finally:
        stop_process(process)


def test_publish_is_one_atomic_step_and_repairs_an_interrupted_one(shared_redis: tuple[str, str]) -> None:
    url, prefix = shared_redis
    store = RedisStore(url, prefix=prefix)
    bundle = example_bundle()
    # What the old two-step writer left when the connection dropped between its steps: a document
    # that no index lists.
    client = redis.Redis.from_url(url)
    from calibration.bundle.canonical import to_bytes

    client.set(store.key("bundle", bundle.name, 1), to_bytes(bundle))
    assert store.versions(bundle.name) == []
    stored, created = store.put_version(bundle)  # the retry now repairs the index
    assert (stored.hash, created) == (bundle.hash, False)
    assert store.versions(bundle.name) == [1] and store.names() == [bundle.name]
    other = bundle.model_copy(update={"created_at": "2026-12-09T00:00:00Z", "hash": ""})
    assert store.publish(other).version == 2  # no number skipped
    assert store.versions(bundle.name) == [1, 2]


def test_redis_restarted_empty_is_reseeded_from_verified_copies(tmp_path: Path) -> None:
    url, process = start_private_redis(tmp_path)
    try:
        store = RedisStore(url)
        app = create_app(_settings(url))
        with live_server(app) as server:
            httpx.put(f"{server}/v1/bundles/pantry-checkout/versions/1", json=_document(), headers=auth("publisher"))
            httpx.put(
                f"{server}/v1/bundles/pantry-checkout/aliases/production",
                json={"version": 1},
                headers=auth("publisher"),
            )
            before = httpx.post(f"{server}/v1/bundles/pantry-checkout/scores", json=SCORE, headers=auth("scorer"))
            redis.Redis.from_url(url).flushall()  # what a restart without persistence leaves
            after = httpx.post(f"{server}/v1/bundles/pantry-checkout/scores", json=SCORE, headers=auth("scorer"))
            pinned = httpx.post(
                f"{server}/v1/bundles/pantry-checkout/versions/1/scores", json=SCORE, headers=auth("scorer")
            )
            listing = httpx.get(f"{server}/v1/bundles", headers=auth("reader")).json()
            ready = httpx.get(f"{server}/readyz").json()
        # No contradiction: both routes answer as before, and the store holds the bundle again.
        assert after.status_code == pinned.status_code == 200 and after.json() == before.json()
        assert store.versions("pantry-checkout") == [1] and store.aliases("pantry-checkout")["production"].version == 1
        assert store.get("pantry-checkout", 1).hash == before.json()["bundle"]["hash"]
        assert listing == {"bundles": [{"name": "pantry-checkout", "versions": [1], "aliases": {"production": 1}}]}
        assert ready["status"] == "ready" and app.state.registry.reseeded == ["pantry-checkout@1"]
    finally:
        stop_process(process)


@pytest.mark.parametrize("kind", ["directory", "redis"])
def test_of_concurrent_identical_puts_exactly_one_is_created(
    kind: str, tmp_path: Path, shared_redis: tuple[str, str]
) -> None:
    url, prefix = shared_redis
    settings = (
        _settings(url, prefix)
        if kind == "redis"
        else Settings(store=str(tmp_path / "store"), api_keys=example_keys(), log_level="warning")
    )
    document = _document()
    codes: list[int] = []
    with live_server(create_app(settings)) as server:
        barrier = threading.Barrier(10)

        def put() -> None:
            barrier.wait()
            reply = httpx.put(
                f"{server}/v1/bundles/pantry-checkout/versions/1", json=document, headers=auth("publisher"), timeout=30
            )
            codes.append(reply.status_code)

        threads = [threading.Thread(target=put) for _ in range(10)]
        for t in threads:
            t.start()
        for t in threads:
            t.join()
    assert sorted(codes) == [200] * 9 + [201]


def test_stale_temporary_files_are_removed_and_modes_are_consistent(tmp_path: Path) -> None:
    root = tmp_path / "store"
    previous = os.umask(0o022)
    try:
        store = DirectoryStore(root)
        store.put_version(example_bundle())
        store.set_alias("pantry-checkout", "production", 1)
        directory = root / "pantry-checkout"
        assert (directory / "v000001.json").stat().st_mode & 0o777 == 0o444
        assert (directory / "aliases.json").stat().st_mode & 0o777 == 0o644  # before: 0600
        stale, fresh = directory / ".incoming-killed.json", directory / ".incoming-live.json"
        stale.write_bytes(b"")
        fresh.write_bytes(b"")
        old = time.time() - STALE_TEMP_SECONDS - 60
        os.utime(stale, (old, old))
        reopened = DirectoryStore(root)
    finally:
        os.umask(previous)
    assert reopened.removed_temp_files == 1 and not stale.exists() and fresh.exists()


# -- hostile input --------------------------------------------------------------------------------------
def test_huge_and_loose_answers_are_422_naming_respondent_and_item(example_store: Path) -> None:
    settings = Settings(store=str(example_store), api_keys=example_keys(), log_level="warning")
    with live_server(create_app(settings)) as server, httpx.Client(base_url=server, headers=auth("scorer")) as client:
        for value in (2**63, 2**70, -1, "1", True, 1.0, 1.5, None):
            body = {
                "responses": [
                    {"id": "a", "group": "tablet", "answers": {"T1": 1}},
                    {"id": "b", "group": "tablet", "answers": {"T2": value}},
                ]
            }
            reply = client.post("/v1/bundles/pantry-checkout/scores", json=body)
            assert reply.status_code == 422, value
            assert reply.json()["errors"][0]["field"] == "body.responses.1.answers.T2"
        # The keep-alive connection survives (before, a 500 dropped it without notice).
        assert client.post("/v1/bundles/pantry-checkout/scores", json=SCORE).status_code == 200


def test_the_openapi_document_is_true_to_the_service(example_store: Path) -> None:
    settings = Settings(store=str(example_store), api_keys=example_keys(), log_level="warning")
    with TestClient(create_app(settings)) as client:
        spec = client.get("/openapi.json").json()
        wrong_method = client.delete("/v1/bundles")
    for path, operations in spec["paths"].items():
        for method, operation in operations.items():
            responses = operation["responses"]
            if operation.get("parameters") or operation.get("requestBody"):
                # Validation errors are sent as problem documents, so that is what the document says.
                assert list(responses["422"]["content"]) == ["application/problem+json"], (method, path)
            if path.startswith("/v1/"):
                assert "500" in responses, (method, path)  # a damaged stored bundle or alias file
            for code, answer in responses.items():
                if code[0] in "45" and path != "/readyz":  # /readyz answers 503 with its readiness document
                    assert list(answer["content"]) == ["application/problem+json"], (method, path, code)
    assert "HTTPValidationError" not in json.dumps(spec["paths"])
    assert wrong_method.status_code == 405 and wrong_method.headers["allow"] == "GET"
    assert wrong_method.headers["content-type"] == "application/problem+json"


# -- operations -----------------------------------------------------------------------------------------
def test_metrics_count_every_worker(example_store: Path, tmp_path: Path) -> None:
    port = free_port()
    env = {**os.environ, "EQUITHETA_LOG_LEVEL": "warning"}
    env.pop("PROMETHEUS_MULTIPROC_DIR", None)
    command = [
        sys.executable,
        "-m",
        "service",
        "--store",
        str(example_store),
        "--port",
        str(port),
        "--workers",
        "2",
    ]
    process = subprocess.Popen(command, stdout=subprocess.DEVNULL, stderr=subprocess.PIPE, env=env)
    base = f"http://127.0.0.1:{port}"
    try:

        def up() -> bool:
            try:
                return httpx.get(f"{base}/healthz").status_code == 200
            except httpx.HTTPError:
                return False

        assert poll(up, timeout=60)
        for _ in range(40):  # a new connection each time, so both workers take requests
            reply = httpx.post(f"{base}/v1/bundles/pantry-checkout/scores", json=SCORE, headers={"Connection": "close"})
            assert reply.status_code == 200
        for _ in range(8):
            text = httpx.get(f"{base}/metrics", headers={"Connection": "close"}).text
            route = "/v1/bundles/{name}/scores"
            assert metric_value(text, "equitheta_requests_total", route=route, method="POST", status="200") == 40
            assert metric_value(text, "equitheta_vectors_scored_total", bundle="pantry-checkout@1") == 40
    finally:
        process.terminate()
        process.wait(30)


def test_the_container_starts_through_equitheta_serve() -> None:
    dockerfile = (Path(__file__).parents[2] / "deploy" / "Dockerfile").read_text()
    command = next(line for line in dockerfile.splitlines() if line.startswith("CMD"))
    assert json.loads(command.removeprefix("CMD").strip()) == ["equitheta", "serve"]
    assert "uvicorn " not in command  # uvicorn's access log would print query strings with keys
    done = subprocess.run(
        [sys.executable, "-m", "calibration.cli", "serve", "--help"],
        capture_output=True,
        text=True,
        check=True,
        env={**os.environ, "COLUMNS": "200"},
    )
    assert "--worker-healthcheck-timeout" in done.stdout


def test_bundle_documents_round_trip_the_strict_schema() -> None:
    # The stricter schema (no infinities, ranges) still reads every bundle the examples hold.
    Bundle.model_validate_json((Path(__file__).parents[2] / "openapi_examples" / "bundle.json").read_text())


def test_a_stale_view_met_by_many_requests_is_read_once(example_store: Path) -> None:
    # A publish makes the held view stale (the directory store's change token moves); eight requests
    # that meet it at once used to read the store eight times, each on its own connection. One reads;
    # the others wait for it and score with what it read.
    store = DirectoryStore(example_store)
    registry = BundleRegistry(store)
    registry.preload()
    assert registry.default("pantry-checkout").bundle.version == 1
    document = json.loads(example_bundle().model_dump_json())
    document["provenance"]["notes"] = ["second calibration"]
    store.publish(Bundle.model_validate(document))
    reads: list[str] = []
    original = store.versions
    store.versions = lambda name: reads.append(name) or original(name)  # type: ignore[method-assign]
    barrier = threading.Barrier(8)
    versions: list[int] = []

    def request() -> None:
        barrier.wait()
        versions.append(registry.default("pantry-checkout").bundle.version)

    threads = [threading.Thread(target=request) for _ in range(8)]
    for thread in threads:
        thread.start()
    for thread in threads:
        thread.join()
    assert versions == [2] * 8
    assert reads == ["pantry-checkout"]
