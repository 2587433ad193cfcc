"""The OpenAPI document: examples from ``openapi_examples/``, problem responses, problem+json only for errors."""

from __future__ import annotations

import json
from pathlib import Path
from typing import Any

from fastapi import FastAPI

from service.errors import PROBLEM_MEDIA_TYPE
from service.schemas import Problem

EXAMPLES = Path(__file__).resolve().parents[2] / "openapi_examples"


def example(name: str) -> Any:
    """The stored example document of this name, or None when the examples are not generated yet."""
    path = EXAMPLES / f"{name}.json"
    return json.loads(path.read_text()) if path.exists() else None


def problem_responses(*codes: int) -> dict[int | str, dict[str, Any]]:
    """OpenAPI ``responses`` entries for these problem status codes, each with its example when there is one."""
    descriptions = {
        401: "missing or unknown API key",
        403: "the key lacks the scope",
        404: "unknown bundle or version",
        409: "version already published with other content",
        413: "request too large",
        422: "invalid request (any field, item, answer or group)",
        500: "a stored bundle or alias file is damaged and refused (problem type stored-bundle-damaged)",
        503: "the shared store is unreachable",
    }
    out: dict[int | str, dict[str, Any]] = {}
    for code in codes:
        entry: dict[str, Any] = {
            "model": Problem,
            "description": descriptions[code],
            "content": {PROBLEM_MEDIA_TYPE: {"schema": {"$ref": "#/components/schemas/Problem"}}},
        }
        sample = example(f"problem_{code}")
        if sample is not None:
            entry["content"][PROBLEM_MEDIA_TYPE]["example"] = sample
        out[code] = entry
    return out


def ok_example(name: str) -> dict[str, Any]:
    """An OpenAPI ``responses`` entry carrying the stored example of a successful answer."""
    sample = example(name)
    return {"content": {"application/json": {"example": sample}}} if sample is not None else {}


def document_problems(app: FastAPI) -> None:
    """Make the OpenAPI document say what is sent: every 422 is a problem document, never FastAPI's default."""
    generate = app.openapi

    def openapi() -> dict[str, Any]:
        if app.openapi_schema:
            return app.openapi_schema
        schema = generate()
        for operations in schema.get("paths", {}).values():
            for operation in operations.values():
                for code, answer in operation.get("responses", {}).items():
                    content = answer.get("content", {})
                    if code[0] in "45" and PROBLEM_MEDIA_TYPE in content:
                        answer["content"] = {PROBLEM_MEDIA_TYPE: content[PROBLEM_MEDIA_TYPE]}  # errors are never JSON
                response = operation.get("responses", {}).get("422")
                if response is not None:
                    content = response.get("content", {})
                    problem_content = content.get(
                        PROBLEM_MEDIA_TYPE, {"schema": {"$ref": "#/components/schemas/Problem"}}
                    )
                    response["content"] = {PROBLEM_MEDIA_TYPE: problem_content}
                    if response.get("description") == "Validation Error":
                        response["description"] = "invalid request (any field, item, answer or group)"
        components = schema.get("components", {}).get("schemas", {})
        for unused in ("HTTPValidationError", "ValidationError"):
            components.pop(unused, None)
        app.openapi_schema = schema
        return schema

    app.openapi = openapi  # type: ignore[method-assign]
