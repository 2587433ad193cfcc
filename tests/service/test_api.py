"""The API against the library and the CLI; auth on every route; limits; problem documents."""

from __future__ import annotations

import hashlib
import json
from pathlib import Path

import httpx
import numpy as np
import pandas as pd
import pytest
from fastapi.testclient import TestClient
from pydantic import ValidationError

from calibration.bundle import Bundle, DirectoryStore
from calibration.bundle.scorer import BundleScorer
from calibration.cli import main as cli_main
from service.main import create_app
from service.schemas import ScoreResponse
from service.settings import Settings
from tests.helpers import EXAMPLES, auth, example_bundle, example_keys, live_server, metric_value

SCORE = {"responses": [{"id": "a", "group": "tablet", "answers": {"T1": 1, "T2": 0, "T3": 1, "T5": 1}}]}


def test_api_theta_and_se_equal_the_library_and_the_cli(
    keyed_settings: Settings, example_store: Path, tmp_path: Path
) -> None:
    rng = np.random.default_rng(3)
    answers = rng.integers(0, 2, size=(40, 6)).astype(float)
    answers[rng.random(answers.shape) < 0.2] = np.nan
    groups = ["paper" if i % 2 else "tablet" for i in range(40)]
    items = [f"T{j + 1}" for j in range(6)]
    body = {
        "responses": [
            {
                "id": f"r{i}",
                "group": groups[i],
                "answers": {items[j]: int(answers[i, j]) for j in range(6) if not np.isnan(answers[i, j])},
            }
            for i in range(40)
        ]
    }
    with TestClient(create_app(keyed_settings)) as client:
        reply = client.post("/v1/bundles/pantry-checkout/scores", json=body, headers=auth("scorer"))
    assert reply.status_code == 200
    ScoreResponse.model_validate(reply.json())  # the route sends plain data: it must still match its schema
    api = reply.json()["results"]
    library = BundleScorer(example_bundle()).score(answers, groups)
    np.testing.assert_allclose([r["theta"] for r in api], library.theta, rtol=0, atol=1e-12)
    np.testing.assert_allclose([r["se"] for r in api], library.se, rtol=0, atol=1e-12)
    # The CLI on the same bundle and answers (CSV keeps 6 decimals).
    frame = pd.DataFrame(answers, columns=items).astype("Int64")
    frame.insert(0, "id", [f"r{i}" for i in range(40)])
    frame.insert(1, "mode", groups)
    frame.to_csv(tmp_path / "in.csv", index=False)
    assert (
        cli_main(
            [
                "score",
                str(tmp_path / "in.csv"),
                "--bundle",
                "pantry-checkout@1",
                "--store",
                str(example_store),
                "--group-column",
                "mode",
                "--out",
                str(tmp_path / "out.csv"),
            ]
        )
        == 0
    )
    cli = pd.read_csv(tmp_path / "out.csv")
    np.testing.assert_allclose(cli["theta"], library.theta, atol=5e-7)
    np.testing.assert_allclose(cli["se"], library.se, atol=5e-7)


ROUTES = [
    ("POST", "/v1/bundles/pantry-checkout/scores", SCORE, "score"),
    ("POST", "/v1/bundles/pantry-checkout/versions/1/scores", SCORE, "score"),
    ("GET", "/v1/bundles", None, "read"),
    ("GET", "/v1/bundles/pantry-checkout/versions", None, "read"),
    ("GET", "/v1/bundles/pantry-checkout/versions/1", None, "read"),
    ("PUT", "/v1/bundles/pantry-checkout/aliases/production", {"version": 1}, "publish"),
    ("PUT", "/v1/bundles/pantry-checkout/versions/1", "bundle", "publish"),
    ("POST", "/v1/bundles/pantry-checkout/versions", "bundle", "publish"),
    ("GET", "/v1/bundles/pantry-checkout/diff?from=1&to=1", None, "read"),
]


@pytest.mark.parametrize(("method", "path", "body", "scope"), ROUTES, ids=[f"{m} {p}" for m, p, _, _ in ROUTES])
def test_every_route_with_and_without_the_right_scope(
    method: str, path: str, body: object, scope: str, keyed_settings: Settings
) -> None:
    payload = json.loads(example_bundle().model_dump_json()) if body == "bundle" else body
    holder = {"score": "scorer", "read": "reader", "publish": "publisher"}[scope]
    wrong = "reader" if scope != "read" else "scorer"
    with TestClient(create_app(keyed_settings)) as client:
        none = client.request(method, path, json=payload)
        assert none.status_code == 401 and none.headers["content-type"] == "application/problem+json"
        assert none.json()["type"].endswith("/unauthorized") and none.headers["www-authenticate"] == "Bearer"
        bad = client.request(method, path, json=payload, headers={"Authorization": "Bearer not-a-key"})
        assert bad.status_code == 401
        forbidden = client.request(method, path, json=payload, headers=auth(wrong))
        assert forbidden.status_code == 403 and f"lacks the '{scope}' scope" in forbidden.json()["detail"]
        allowed = client.request(method, path, json=payload, headers=auth(holder))
        assert allowed.status_code in (200, 201), allowed.text
        alternative = client.request(method, path, json=payload, headers={"X-API-Key": "example-publish-key"})
        assert alternative.status_code in (200, 201)


def test_operations_routes_need_no_key(keyed_settings: Settings) -> None:
    with TestClient(create_app(keyed_settings)) as client:
        assert client.get("/healthz").json() == {"status": "ok"}
        assert client.get("/readyz").json()["status"] == "ready"
        client.post("/v1/bundles/pantry-checkout/scores", json=SCORE, headers=auth("scorer"))
        text = client.get("/metrics").text
    assert metric_value(text, "equitheta_vectors_scored_total", bundle="pantry-checkout@1") == 1
    route = "/v1/bundles/{name}/scores"
    assert metric_value(text, "equitheta_requests_total", route=route, method="POST", status="200") == 1
    assert metric_value(text, "equitheta_request_duration_seconds_count", route=route) == 1


def test_limits_answer_413_problems(example_store: Path) -> None:
    from tests.helpers import example_keys

    settings = Settings(
        store=str(example_store), api_keys=example_keys(), max_vectors=3, max_body_bytes=2048, log_level="warning"
    )
    with TestClient(create_app(settings)) as client:
        many = {"responses": [{"id": str(i), "group": "paper", "answers": {"T1": 1}} for i in range(4)]}
        reply = client.post("/v1/bundles/pantry-checkout/scores", json=many, headers=auth("scorer"))
        assert reply.status_code == 413 and "at most 3 per request" in reply.json()["detail"]
        big = {"responses": [{"id": "x" * 200, "group": "paper", "answers": {"T1": 1}}] * 30}
        reply = client.post("/v1/bundles/pantry-checkout/scores", json=big, headers=auth("scorer"))
        assert reply.status_code == 413 and "larger than 2048 bytes" in reply.json()["detail"]
        assert reply.headers["content-type"] == "application/problem+json"


def test_errors_name_the_field_item_or_value(keyed_settings: Settings) -> None:
    headers = auth("scorer")
    with TestClient(create_app(keyed_settings)) as client:

        def post(body: object) -> dict:
            reply = client.post("/v1/bundles/pantry-checkout/scores", json=body, headers=headers)
            assert reply.headers["content-type"] == "application/problem+json"
            return reply.json()

        assert (
            post({"responses": [{"id": "a", "group": "paper", "answers": {"T1": 2}}]})["detail"]
            == "responses[0] (id 'a'), item 'T1': answer 2 is outside the item's categories 0..1"
        )
        unknown_group = post(
            {"responses": [{"id": "a", "answers": {"T1": 1}}, {"id": "b", "group": "phone", "answers": {"T1": 1}}]}
        )
        assert unknown_group["detail"].startswith("responses[0] (id 'a'): no group given")
        validation = post({"responses": [{"id": "a", "answers": {"T1": "yes"}}]})
        assert validation["status"] == 422 and validation["errors"][0]["field"] == "body.responses.0.answers.T1"
        extra = post({"responses": [{"id": "a", "answers": {}}], "colour": "blue"})
        assert extra["errors"][0]["field"] == "body.colour"
        # The bundle is sent as its stored canonical bytes, so the client can check the hash itself
        # (hashlib over the document without its hash field, keys sorted, no white space).
        stored = client.get("/v1/bundles/pantry-checkout/versions/1", headers=auth("reader"))
        document = stored.json()
        body = {k: v for k, v in document.items() if k != "hash"}
        canonical = json.dumps(body, sort_keys=True, separators=(",", ":"), ensure_ascii=False).encode()
        assert hashlib.sha256(canonical).hexdigest() == document["hash"]
        missing = client.get("/v1/bundles/pantry-checkout/versions/7", headers=auth("reader")).json()
        assert missing["detail"] == "bundle 'pantry-checkout' has no version 7 (versions: 1)"
        assert client.get("/nowhere").json()["type"].endswith("/not-found")


def test_unexpected_errors_are_generic(keyed_settings: Settings) -> None:
    app = create_app(keyed_settings)

    @app.get("/explode")
    def explode() -> None:
        raise RuntimeError("secret internals /etc/passwd")

    with TestClient(app, raise_server_exceptions=False) as client:
        reply = client.get("/explode")
    assert reply.status_code == 500
    assert reply.json()["detail"] == "The server could not complete the request; the error was logged."
    assert "secret" not in reply.text


def test_publishing_rules_over_the_api(keyed_settings: Settings) -> None:
    bundle = json.loads(example_bundle().model_dump_json())
    headers = auth("publisher")
    with TestClient(create_app(keyed_settings)) as client:
        mismatch = client.put("/v1/bundles/pantry-checkout/versions/2", json=bundle, headers=headers)
        assert mismatch.status_code == 422 and "path names pantry-checkout@2" in mismatch.json()["detail"]
        tampered = dict(bundle, created_at="2030-01-01T00:00:00Z")
        conflict = client.put("/v1/bundles/pantry-checkout/versions/1", json=tampered, headers=headers)
        assert conflict.status_code == 422 and "hash does not match" in conflict.json()["detail"]
        tampered["hash"] = ""
        conflict = client.put("/v1/bundles/pantry-checkout/versions/1", json=tampered, headers=headers)
        assert conflict.status_code == 409
        # The same calibration again (only its time differs) is not published twice: the answer names it.
        same = client.post("/v1/bundles/pantry-checkout/versions", json=tampered, headers=headers)
        assert same.status_code == 200 and same.json()["version"] == 1 and same.json()["created"] is False
        changed = json.loads(json.dumps(tampered))
        changed["provenance"]["notes"] = ["recalibrated after a content review"]
        created = client.post("/v1/bundles/pantry-checkout/versions", json=changed, headers=headers)
        assert created.status_code == 201 and created.json()["version"] == 2
        moved = client.put("/v1/bundles/pantry-checkout/aliases/production", json={"version": 2}, headers=headers)
        assert moved.json() == {"name": "pantry-checkout", "alias": "production", "version": 2}
        scored = client.post("/v1/bundles/pantry-checkout/scores", json=SCORE, headers=auth("scorer"))
        assert scored.json()["bundle"]["version"] == 2
        back = client.put("/v1/bundles/pantry-checkout/aliases/production", json={"version": 1}, headers=headers)
        assert back.json()["version"] == 1
        bad_alias = client.put("/v1/bundles/pantry-checkout/aliases/production", json={"version": 5}, headers=headers)
        assert bad_alias.status_code == 404


def test_damaged_bundle_file_is_refused_and_others_still_serve(keyed_settings: Settings, example_store: Path) -> None:
    path = example_store / "pantry-checkout" / "v000001.json"
    path.chmod(0o644)
    path.write_bytes(path.read_bytes()[:-100])
    with TestClient(create_app(keyed_settings)) as client:
        reply = client.post("/v1/bundles/pantry-checkout/versions/1/scores", json=SCORE, headers=auth("scorer"))
        again = client.post("/v1/bundles/pantry-checkout/versions/1/scores", json=SCORE, headers=auth("scorer"))
        ready = client.get("/readyz").json()
    # A server problem of its own type (not the client's fault), naming the version but no server path.
    assert reply.status_code == 500 and reply.headers["content-type"] == "application/problem+json"
    body = reply.json()
    assert body["type"].endswith("/stored-bundle-damaged") and body["detail"].startswith("pantry-checkout@1: not valid")
    assert str(example_store) not in reply.text and "v000001.json" not in reply.text
    assert again.json() == body  # the verdict is remembered, not re-read and re-hashed
    assert ready["status"] == "degraded" and ready["damaged_versions"] == ["pantry-checkout@1"]


def test_settings_fail_at_start_up_naming_the_variable(tmp_path: Path, monkeypatch: pytest.MonkeyPatch) -> None:
    with pytest.raises(ValidationError, match="EQUITHETA_HOST=0.0.0.0 with no API keys"):
        Settings(store=str(tmp_path), host="0.0.0.0")
    monkeypatch.setenv("EQUITHETA_PORT", "not-a-port")
    with pytest.raises(ValidationError, match="port"):
        Settings(store=str(tmp_path))
    monkeypatch.delenv("EQUITHETA_PORT")
    with pytest.raises(ValidationError, match="EQUITHETA_API_KEYS_FILE"):
        Settings(store=str(tmp_path), api_keys_file=tmp_path / "nope.json")
    with pytest.raises(ValueError, match="SHA-256 of the key, not the key itself"):
        create_app(Settings(store=str(tmp_path), api_keys="ops:read:plaintext-key"))


def test_directory_store_changes_reach_the_default_route_and_no_change_costs_no_read(
    keyed_settings: Settings, example_store: Path
) -> None:
    # The directory store's change token (two stats) stands in for Redis's change feed: an alias
    # moved by another client straight in the store is used by the very next request, and while
    # nothing was written the default route reads no alias file.
    app = create_app(keyed_settings)
    score = SCORE
    with live_server(app) as server:
        url = f"{server}/v1/bundles/pantry-checkout/scores"
        assert httpx.post(url, json=score, headers=auth("scorer")).json()["bundle"]["version"] == 1
        registry = app.state.registry
        reads: list[str] = []
        original = registry.store.aliases
        registry.store.aliases = lambda name: reads.append(name) or original(name)  # counts, then reads
        again = httpx.post(url, json=score, headers=auth("scorer"))
        assert again.json()["bundle"]["version"] == 1 and reads == []
        other = DirectoryStore(example_store)
        document = json.loads(example_bundle().model_dump_json())
        document["provenance"]["notes"] = ["second calibration"]  # other content: a new version
        second = other.publish(Bundle.model_validate({**document, "hash": ""}))
        other.set_alias("pantry-checkout", "production", second.version)
        moved = httpx.post(url, json=score, headers=auth("scorer"))
        assert moved.json()["bundle"]["version"] == second.version and reads == ["pantry-checkout"]


def test_diff_route_answers_the_stored_example_and_names_what_is_missing(tmp_path: Path) -> None:
    # openapi_examples/bundle_v2.json: the second (invented) cycle of the example bundle, linked to it.
    # The route's answer is the stored example (floats to 1e-9), an alias works as a reference, and an
    # unknown version or alias is a 404 naming it; a malformed reference is a 422.
    from tests.service.test_examples import _same

    store = DirectoryStore(tmp_path / "store")
    store.put_version(example_bundle())
    store.put_version(Bundle.model_validate_json((EXAMPLES / "bundle_v2.json").read_text()))
    store.set_alias("pantry-checkout", "production", 2)
    settings = Settings(store=str(tmp_path / "store"), api_keys=example_keys(), log_level="warning")
    expected = json.loads((EXAMPLES / "diff.json").read_text())
    path = "/v1/bundles/pantry-checkout/diff"
    with TestClient(create_app(settings)) as client:
        reply = client.get(path, params={"from": "1", "to": "2"}, headers=auth("reader"))
        assert reply.status_code == 200 and _same(reply.json(), expected)
        assert expected["same_scale"] and expected["items"][-1] == {**expected["items"][-1], "change": "added"}
        by_alias = client.get(path, params={"from": "1", "to": "production"}, headers=auth("reader"))
        assert by_alias.status_code == 200 and by_alias.json()["to_bundle"] == "pantry-checkout@2"
        missing = client.get(path, params={"from": "1", "to": "staging"}, headers=auth("reader"))
        assert missing.status_code == 404 and "no alias 'staging'" in missing.json()["detail"]
        unknown = client.get(path, params={"from": "7", "to": "2"}, headers=auth("reader"))
        assert unknown.status_code == 404 and "no version 7" in unknown.json()["detail"]
        malformed = client.get(path, params={"from": "1;drop", "to": "2"}, headers=auth("reader"))
        assert malformed.status_code == 422 and malformed.headers["content-type"] == "application/problem+json"
        assert client.get(path, params={"from": "1", "to": "2"}).status_code == 401


def test_alias_moves_record_the_key_name_never_the_key(keyed_settings: Settings) -> None:
    # Promote and roll back over the API: the history names the publisher key (by its name), in order.
    path = "/v1/bundles/pantry-checkout/aliases/production"
    with TestClient(create_app(keyed_settings)) as client:
        assert client.get(path, headers=auth("reader")).status_code == 404  # no such alias yet
        for version in (1, 1):
            moved = client.put(path, json={"version": version}, headers=auth("publisher"))
            assert moved.status_code == 200
        history = client.get(path, headers=auth("reader"))
        assert client.get(path).status_code == 401
        assert client.get(path, headers=auth("scorer")).status_code == 403
    assert history.status_code == 200
    document = history.json()
    assert document["version"] == 1 and [m["by"] for m in document["history"]] == ["API key publisher"] * 2
    assert all(m["moved_at"].endswith("Z") for m in document["history"])
    assert "example-publish-key" not in history.text


def test_report_route_answers_the_page(keyed_settings: Settings) -> None:
    with TestClient(create_app(keyed_settings)) as client:
        reply = client.get("/v1/bundles/pantry-checkout/versions/1/report", headers=auth("reader"))
        assert client.get("/v1/bundles/pantry-checkout/versions/1/report").status_code == 401
        missing = client.get("/v1/bundles/pantry-checkout/versions/9/report", headers=auth("reader"))
    assert reply.status_code == 200 and reply.headers["content-type"].startswith("text/html")
    assert "pantry-checkout@1: calibration report" in reply.text and '<section id="flagged">' in reply.text
    assert missing.status_code == 404 and missing.headers["content-type"] == "application/problem+json"
