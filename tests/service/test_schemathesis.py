"""Property-based requests from the app's own OpenAPI document against a live uvicorn.

Bounded: a few dozen cases per operation. Checks: no 5xx, and every error response is
an RFC 9457 problem document.
"""

from __future__ import annotations

import tempfile
from collections.abc import Iterator
from pathlib import Path

import pytest
import schemathesis
from hypothesis import HealthCheck, settings

from calibration.bundle import DirectoryStore
from service.main import create_app
from service.settings import Settings
from tests.service.conftest import auth, example_bundle, example_keys, live_server

_SCHEMA_STORE = tempfile.mkdtemp(prefix="equitheta-schema-")
schema = schemathesis.openapi.from_dict(create_app(Settings(store=_SCHEMA_STORE, api_keys=example_keys())).openapi())


@pytest.fixture(scope="module")
def server() -> Iterator[str]:
    with tempfile.TemporaryDirectory() as root:
        store = Path(root) / "store"
        DirectoryStore(store).put_version(example_bundle())
        app = create_app(
            Settings(store=str(store), api_keys=example_keys(), log_level="warning", max_body_bytes=256 * 1024)
        )
        with live_server(app) as url:
            yield url


@schema.parametrize()
@settings(max_examples=25, deadline=None, suppress_health_check=list(HealthCheck), derandomize=True)
def test_no_server_errors_and_problem_documents(case: schemathesis.Case, server: str) -> None:
    response = case.call(base_url=server, headers=auth("publisher"), timeout=30)
    assert response.status_code < 500, f"{case.method} {case.path}: {response.status_code} {response.text[:300]}"
    if response.status_code >= 400:
        content_type = response.headers.get("content-type")
        content_type = content_type[0] if isinstance(content_type, list) else content_type  # headers hold lists
        assert content_type == "application/problem+json", response.text[:300]
        body = response.json()
        assert {"type", "title", "status", "detail"} <= set(body)
        assert body["status"] == response.status_code
