"""Replay every request in openapi_examples/cases.json and compare with the stored answer."""

from __future__ import annotations

import json

import pytest
from fastapi.testclient import TestClient

from service.main import create_app
from service.settings import Settings
from tests.helpers import CASES, EXAMPLES, auth


def _same(actual: object, expected: object) -> bool:
    """Equal JSON, floats to 1e-9 relative (the same arithmetic may round differently across BLAS builds)."""
    if isinstance(expected, float) and isinstance(actual, float):
        return actual == pytest.approx(expected, rel=1e-9, abs=1e-12)
    if isinstance(expected, dict) and isinstance(actual, dict):
        return expected.keys() == actual.keys() and all(_same(actual[k], expected[k]) for k in expected)
    if isinstance(expected, list) and isinstance(actual, list):
        return len(actual) == len(expected) and all(_same(a, e) for a, e in zip(actual, expected, strict=True))
    return actual == expected


@pytest.mark.parametrize("case", CASES["cases"], ids=[c["name"] for c in CASES["cases"]])
def test_example_replays(case: dict, keyed_settings: Settings) -> None:
    with TestClient(create_app(keyed_settings), raise_server_exceptions=False) as client:
        body = json.loads((EXAMPLES / f"{case['request']}.json").read_text()) if "request" in case else None
        headers = auth(case["key"]) if "key" in case else {}
        reply = client.request(case["method"], case["path"], json=body, headers=headers)
    assert reply.status_code == case["status"], reply.text
    expected = json.loads((EXAMPLES / f"{case['response']}.json").read_text())
    assert _same(reply.json(), expected)
    if reply.status_code >= 400:
        assert reply.headers["content-type"] == "application/problem+json"


def test_examples_appear_in_the_openapi_document(keyed_settings: Settings) -> None:
    with TestClient(create_app(keyed_settings)) as client:
        document = client.get("/openapi.json").json()
    score = document["paths"]["/v1/bundles/{name}/scores"]["post"]
    assert "one respondent" in score["requestBody"]["content"]["application/json"]["examples"]
    assert score["responses"]["200"]["content"]["application/json"]["example"]["results"]
    assert score["responses"]["422"]["content"]["application/problem+json"]["example"]["status"] == 422
