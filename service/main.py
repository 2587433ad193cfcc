"""The scoring service: ``create_app(settings)``; nothing connects at import.

Run it with ``equitheta serve --store DIR|redis://...`` (uvicorn), or
``uvicorn service.main:app_from_env --factory``.
"""

from __future__ import annotations

import json
import logging
import math
import sys
import time
from collections.abc import AsyncIterator, Callable
from contextlib import asynccontextmanager
from itertools import chain
from pathlib import Path
from typing import Annotated, Any

import numpy as np
import orjson
from fastapi import Body, Depends, FastAPI, Header, Request
from fastapi import Path as PathParam
from fastapi.responses import JSONResponse, PlainTextResponse, Response
from fastapi.routing import APIRoute
from starlette.types import ASGIApp, Message, Receive, Scope, Send

from calibration import __version__
from calibration.bundle import Bundle, open_store
from calibration.bundle.schema import ALIAS_PATTERN, NAME_PATTERN
from calibration.bundle.scorer import UnknownGroup
from service.errors import (
    PROBLEM_MEDIA_TYPE,
    AnswerOutOfRange,
    InvalidBundle,
    PayloadTooLarge,
    ProblemError,
    UnknownGroupProblem,
    UnknownItem,
    install_handlers,
    problem,
)
from service.metrics import CONTENT_TYPE as METRICS_CONTENT_TYPE
from service.metrics import Metrics
from service.registry import BundleRegistry, LoadedBundle
from service.schemas import (
    CAUTION,
    AliasRequest,
    AliasResult,
    BundleList,
    BundleSummary,
    Health,
    Problem,
    PublishResult,
    Readiness,
    ScoreRequest,
    ScoreResponse,
)
from service.security import KeyRing, Principal, load_keys
from service.settings import Settings

log = logging.getLogger("equitheta.service")
EXAMPLES = Path(__file__).resolve().parents[1] / "openapi_examples"

NameParam = Annotated[str, PathParam(pattern=NAME_PATTERN, description="bundle name")]
VersionParam = Annotated[int, PathParam(ge=1, le=2**31 - 1, description="bundle version")]
AliasParam = Annotated[str, PathParam(pattern=ALIAS_PATTERN, description="alias, e.g. production")]


def _example(name: str) -> Any:
    path = EXAMPLES / f"{name}.json"
    return json.loads(path.read_text()) if path.exists() else None


def _problem_responses(*codes: int) -> dict[int | str, dict[str, Any]]:
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
        example = _example(f"problem_{code}")
        if example is not None:
            entry["content"][PROBLEM_MEDIA_TYPE]["example"] = example
        out[code] = entry
    return out


def _ok_example(name: str) -> dict[str, Any]:
    example = _example(name)
    return {"content": {"application/json": {"example": example}}} if example is not None else {}


# -- request decoding ---------------------------------------------------------------------------------
class OrjsonRequest(Request):
    """Decodes JSON bodies with orjson: about 4x faster than the standard library on score batches.

    orjson is stricter (no NaN literals) and raises a subclass of json.JSONDecodeError, so a bad body
    is still answered with the usual 422 problem document.
    """

    async def json(self) -> Any:
        if not hasattr(self, "_json"):
            self._json = orjson.loads(await self.body())
        return self._json


class OrjsonRoute(APIRoute):
    def get_route_handler(self) -> Callable[[Request], Any]:
        handler = super().get_route_handler()

        async def decoded(request: Request) -> Any:
            return await handler(OrjsonRequest(request.scope, request.receive))

        return decoded


# -- middleware ---------------------------------------------------------------------------------------
class BodyLimit:
    """Reads the request body up to the limit; a larger body gets a 413 problem document."""

    def __init__(self, app: ASGIApp, max_bytes: int) -> None:
        self.app, self.max_bytes = app, max_bytes

    async def __call__(self, scope: Scope, receive: Receive, send: Send) -> None:
        if scope["type"] != "http" or scope["method"] in ("GET", "HEAD", "OPTIONS"):
            await self.app(scope, receive, send)
            return
        length = dict(scope.get("headers", [])).get(b"content-length")
        if length is not None and length.isdigit() and int(length) > self.max_bytes:
            await self._reject(scope, receive, send)
            return
        chunks, size, more = [], 0, True
        while more:
            message = await receive()
            if message["type"] == "http.disconnect":
                return
            body = message.get("body", b"")
            size += len(body)
            if size > self.max_bytes:
                await self._reject(scope, receive, send)
                return
            chunks.append(body)
            more = message.get("more_body", False)
        replay: list[Message] = [{"type": "http.request", "body": b"".join(chunks), "more_body": False}]

        async def replayed() -> Message:
            return replay.pop() if replay else await receive()

        await self.app(scope, replayed, send)

    async def _reject(self, scope: Scope, receive: Receive, send: Send) -> None:
        response = problem(
            413,
            "payload-too-large",
            "Request too large",
            f"the request body is larger than {self.max_bytes} bytes (EQUITHETA_MAX_BODY_BYTES)",
            scope.get("path"),
        )
        await response(scope, receive, send)


class Observe:
    """Metrics per route template and one structured log line per request (no keys, no bodies)."""

    def __init__(self, app: ASGIApp, metrics: Metrics) -> None:
        self.app, self.metrics = app, metrics

    async def __call__(self, scope: Scope, receive: Receive, send: Send) -> None:
        if scope["type"] != "http":
            await self.app(scope, receive, send)
            return
        start = time.perf_counter()
        status = {"code": 500}

        async def capture(message: Message) -> None:
            if message["type"] == "http.response.start":
                status["code"] = message["status"]
            await send(message)

        try:
            await self.app(scope, receive, capture)
        finally:
            elapsed = time.perf_counter() - start
            route = getattr(scope.get("route"), "path", "unmatched")
            self.metrics.observe_request(route, scope["method"], status["code"], elapsed)
            log_event(
                logging.INFO,
                "request",
                method=scope["method"],
                route=route,
                path=scope.get("path"),
                status=status["code"],
                ms=round(elapsed * 1000, 3),
            )


def log_event(level: int, event: str, **fields: Any) -> None:
    """One structured log line: an event name and its fields (never keys, bodies or secrets)."""
    log.log(level, event, extra={"fields": fields})


class JsonLogFormatter(logging.Formatter):
    """One JSON object per line: the event (or message), its fields, level, logger and time."""

    def format(self, record: logging.LogRecord) -> str:
        fields = getattr(record, "fields", None)
        body: dict[str, Any] = (
            {"event": record.getMessage(), **fields}
            if fields is not None
            else {"event": "log", "message": record.getMessage()}
        )
        body.update(
            {
                "level": record.levelname.lower(),
                "logger": record.name,
                "time": time.strftime("%Y-%m-%dT%H:%M:%S", time.gmtime(record.created)),
            }
        )
        if record.exc_info:
            body["exception"] = self.formatException(record.exc_info)
        return json.dumps(body)


class _StderrHandler(logging.StreamHandler):  # type: ignore[type-arg]
    """Writes to whatever ``sys.stderr`` is when a record is emitted (it may be replaced after start-up)."""

    def emit(self, record: logging.LogRecord) -> None:
        self.stream = sys.stderr
        super().emit(record)


def _configure_logging(level: str) -> None:
    if not any(getattr(h, "_equitheta", False) for h in log.handlers):
        handler = _StderrHandler()
        handler.setFormatter(JsonLogFormatter())
        handler._equitheta = True  # type: ignore[attr-defined]
        log.addHandler(handler)
        log.propagate = False
    log.setLevel(level.upper())


# -- scoring ------------------------------------------------------------------------------------------
def _finite(value: float) -> float | None:
    return float(value) if math.isfinite(value) else None


def _json_floats(array: np.ndarray) -> list[float | None]:
    """Floats for JSON: NaN and infinities become null (a pass over the list only when there are any)."""
    values = array.tolist()
    if np.isfinite(array).all():
        return values  # type: ignore[no-any-return]
    return [v if math.isfinite(v) else None for v in values]


def score_vectors(loaded: LoadedBundle, request: ScoreRequest) -> dict[str, Any]:
    """Validate the vectors against the bundle and score them in one vectorised call.

    Returns the ScoreResponse document as plain JSON-ready data (the route sends it as is).
    """
    scorer = loaded.scorer
    bundle = loaded.bundle
    index = {item: j for j, item in enumerate(scorer.item_ids)}
    categories = [scorer.item_categories[item] for item in scorer.item_ids]
    n = len(request.responses)
    x = np.full((n, len(scorer.item_ids)), np.nan)
    # Vectors usually share one key order: place each distinct layout of keys with one column lookup,
    # reading the values at C speed. Errors name the earliest offending vector.
    layouts: dict[tuple[str, ...], list[int]] = {}
    for i, vector in enumerate(request.responses):
        layouts.setdefault(tuple(vector.answers), []).append(i)
    limits = np.asarray(categories, dtype=np.int64)
    problems: list[tuple[int, ProblemError]] = []
    for keys, members in layouts.items():
        if not keys:
            continue
        cols = np.fromiter((index.get(k, -1) for k in keys), dtype=np.int64, count=len(keys))
        rows = np.asarray(members, dtype=np.int64)
        if (cols < 0).any():
            i = members[0]
            item = keys[int(np.flatnonzero(cols < 0)[0])]
            problems.append(
                (
                    i,
                    UnknownItem(
                        f"responses[{i}] (id {request.responses[i].id!r}): item {item!r} is not in bundle "
                        f"{bundle.label}",
                        field=f"responses.{i}.answers.{item}",
                    ),
                )
            )
            continue
        values = np.fromiter(
            chain.from_iterable(request.responses[i].answers.values() for i in members),
            dtype=np.int64,
            count=len(members) * len(keys),
        ).reshape(len(members), len(keys))
        outside = (values < 0) | (values >= limits[cols][None, :])
        if outside.any():
            r, c = (int(v[0]) for v in np.nonzero(outside))
            i, item, value = members[r], keys[c], int(values[r, c])
            problems.append(
                (
                    i,
                    AnswerOutOfRange(
                        f"responses[{i}] (id {request.responses[i].id!r}), item {item!r}: answer {value} is "
                        f"outside the item's categories 0..{limits[cols[c]] - 1}",
                        field=f"responses.{i}.answers.{item}",
                    ),
                )
            )
            continue
        x[np.ix_(rows, cols)] = values
    if problems:
        raise min(problems, key=lambda p: p[0])[1]
    try:
        groups = scorer.resolve_groups([v.group for v in request.responses], n)
    except UnknownGroup as exc:
        vector = request.responses[exc.index]
        known = ", ".join(sorted(scorer.plans))
        what = (
            "no group given and the bundle has several groups"
            if exc.group is None
            else f"group {exc.group!r} is not in bundle {bundle.label}"
        )
        raise UnknownGroupProblem(
            f"responses[{exc.index}] (id {vector.id!r}): {what} (groups: {known})", field=f"responses.{exc.index}.group"
        ) from exc
    result = scorer.score(x, groups, method=request.options.method)
    tables: dict[str, dict[int, tuple[float, float]]] = {}
    if request.options.include_summed_score:
        for name, quality in bundle.quality.by_group.items():
            tables[name] = {row.summed_score: (row.theta, row.se) for row in quality.summed_score_table}
    excluded = {g: [{"item": i, "reason": r} for i, r in scorer.excluded_for(g)] for g in scorer.plans}
    # Plain dicts (the ScoreResult shape) instead of one model per respondent: the batch hot path.
    columns = [
        _json_floats(array)
        for array in (result.theta, result.se, result.scale_score, result.scale_se, result.person_fit)
    ]
    answered = result.n_answered.tolist()
    summed_scores = result.summed_score.tolist()
    results = [
        {
            "id": vector.id,
            "group": g,
            "theta": theta,
            "se": se,
            "scale_score": scale,
            "scale_se": scale_se,
            "items_answered": n_items,
            "excluded_items": excluded[g],
            "flags": list(flags),
            "person_fit_lz_star": lz,
            "summed_score": None,
            "summed_score_theta": None,
            "summed_score_se": None,
        }
        for vector, g, theta, se, scale, scale_se, n_items, flags, lz in zip(
            request.responses, groups, *columns[:4], answered, result.flags, columns[4], strict=True
        )
    ]
    if request.options.include_summed_score:
        for entry, summed in zip(results, summed_scores, strict=True):
            if math.isfinite(summed):
                theta_s, se_s = tables.get(entry["group"], {}).get(int(summed), (math.nan, math.nan))
                entry.update(
                    summed_score=int(summed), summed_score_theta=_finite(theta_s), summed_score_se=_finite(se_s)
                )
    return {
        "bundle": {"name": bundle.name, "version": bundle.version, "hash": bundle.hash},
        "method": result.method,
        "results": results,
        "caution": CAUTION,
    }


# -- app ----------------------------------------------------------------------------------------------
def publish_answer(stored: Bundle, created: bool) -> Any:
    """201 with the new version, or 200 naming the version that already held this content."""
    result = PublishResult(name=stored.name, version=stored.version, hash=stored.hash, created=created)
    return result if created else JSONResponse(result.model_dump(), status_code=200)


def registry_dep(request: Request) -> BundleRegistry:
    return request.app.state.registry  # type: ignore[no-any-return]


def principal_dep(
    request: Request,
    authorization: Annotated[str | None, Header(description="Bearer <API key>")] = None,
    x_api_key: Annotated[str | None, Header(description="the API key (alternative header)")] = None,
) -> Principal:
    keyring: KeyRing = request.app.state.keyring
    return keyring.authenticate(authorization, x_api_key)


RegistryDep = Annotated[BundleRegistry, Depends(registry_dep)]
PrincipalDep = Annotated[Principal, Depends(principal_dep)]


def _needs(scope: str) -> Callable[[Principal], Principal]:
    def check(principal: PrincipalDep) -> Principal:
        KeyRing.require(principal, scope)
        return principal

    return check


ScoreScope = Annotated[Principal, Depends(_needs("score"))]
ReadScope = Annotated[Principal, Depends(_needs("read"))]
PublishScope = Annotated[Principal, Depends(_needs("publish"))]
ScoreBody = Annotated[
    ScoreRequest,
    Body(
        openapi_examples={"one respondent": {"value": _example("score_request")}} if _example("score_request") else None
    ),
]


def _document_problems(app: FastAPI) -> None:
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


def create_app(settings: Settings) -> FastAPI:
    keyring = KeyRing(load_keys(settings.api_keys_file, settings.api_keys))
    metrics = Metrics()

    @asynccontextmanager
    async def lifespan(app: FastAPI) -> AsyncIterator[None]:
        _configure_logging(settings.log_level)
        store = open_store(settings.store, prefix=settings.redis_prefix)
        registry = BundleRegistry(store)
        if settings.preload:
            registry.preload()
        registry.start()
        app.state.registry = registry
        if keyring.open:
            log_event(
                logging.WARNING,
                "startup",
                message=f"no API keys configured: open access, bound to loopback only ({settings.host})",
            )
        log_event(
            logging.INFO, "startup", store=repr(store), bundles_loaded=registry.loaded_count, keys=len(keyring.records)
        )
        yield
        registry.stop()

    docs = {} if settings.docs else {"docs_url": None, "redoc_url": None, "openapi_url": None}
    app = FastAPI(
        title="equitheta scoring service",
        version=__version__,
        **docs,
        description=(
            "Scores response vectors with versioned, invariance-checked calibration bundles and explains which "
            "items were left out for a respondent's group. " + ScoreResponse.model_fields["caution"].default
        ),
        lifespan=lifespan,
    )
    app.router.route_class = OrjsonRoute
    install_handlers(app)
    _document_problems(app)
    app.add_middleware(BodyLimit, max_bytes=settings.max_body_bytes)
    app.add_middleware(Observe, metrics=metrics)

    app.state.keyring = keyring

    def resolve(registry: BundleRegistry, name: str, version: int | None) -> LoadedBundle:
        # Store errors map to problems through the one table in service.errors.
        return registry.get(name, version) if version is not None else registry.default(name)

    def run_scoring(loaded: LoadedBundle, body: ScoreRequest) -> Any:
        if len(body.responses) > settings.max_vectors:
            raise PayloadTooLarge(
                f"{len(body.responses)} response vectors; at most {settings.max_vectors} per "
                "request (EQUITHETA_MAX_VECTORS)"
            )
        document = score_vectors(loaded, body)
        metrics.count_vectors(loaded.bundle.label, len(body.responses))
        # Built in the ScoreResponse shape (tests check it against the schema); sent without re-validation.
        return Response(orjson.dumps(document), media_type="application/json")

    @app.get("/healthz", response_model=Health, tags=["operations"], responses={200: _ok_example("healthz")})
    def healthz() -> Health:
        return Health(status="ok")

    @app.get(
        "/readyz",
        response_model=Readiness,
        tags=["operations"],
        responses={200: _ok_example("readyz"), 503: {"model": Readiness, "description": "not ready"}},
    )
    def readyz(registry: RegistryDep) -> Any:
        """Readiness from the background probe's last word: this route never waits on the store."""
        up, loaded, damaged = registry.store_up, registry.loaded_count, registry.damaged
        metrics.set_state(bundles_loaded=loaded, store_up=up)
        if up:
            status = "degraded" if damaged else "ready"
            detail = f"{len(damaged)} stored version(s) failed verification" if damaged else None
            return Readiness(
                status=status, store="reachable", bundles_loaded=loaded, detail=detail, damaged_versions=damaged
            )
        body = Readiness(
            status="degraded" if loaded else "not_ready",
            store="unreachable",
            bundles_loaded=loaded,
            detail=registry.degraded_reason,
            damaged_versions=damaged,
        )
        if loaded:
            return body
        return JSONResponse(body.model_dump(), status_code=503)

    def metrics_guard(
        request: Request,
        authorization: Annotated[str | None, Header(description="Bearer <API key>")] = None,
        x_api_key: Annotated[str | None, Header(description="the API key (alternative header)")] = None,
    ) -> None:
        # Open by default like /healthz and /readyz (scrapers rarely carry keys); a setting closes it.
        if settings.metrics_scope is not None:
            KeyRing.require(principal_dep(request, authorization, x_api_key), settings.metrics_scope)

    @app.get(
        "/metrics",
        response_class=PlainTextResponse,
        tags=["operations"],
        responses={
            200: {"content": {"text/plain": {"example": "equitheta_requests_total{...} 1\n"}}},
            **(_problem_responses(401, 403) if settings.metrics_scope else {}),
        },
    )
    def metrics_route(registry: RegistryDep, _: None = Depends(metrics_guard)) -> Response:  # noqa: B008
        metrics.set_state(bundles_loaded=registry.loaded_count, store_up=registry.store_up)
        return Response(metrics.render(), media_type=METRICS_CONTENT_TYPE)

    @app.post(
        "/v1/bundles/{name}/scores",
        response_model=ScoreResponse,
        tags=["scoring"],
        responses={200: _ok_example("score_response"), **_problem_responses(401, 403, 404, 413, 422, 500, 503)},
    )
    def score_default(name: NameParam, body: ScoreBody, registry: RegistryDep, _: ScoreScope) -> Any:
        """Score with the version the ``production`` alias points at, else the newest version."""
        return run_scoring(resolve(registry, name, None), body)

    @app.post(
        "/v1/bundles/{name}/versions/{version}/scores",
        response_model=ScoreResponse,
        tags=["scoring"],
        responses={200: _ok_example("score_response"), **_problem_responses(401, 403, 404, 413, 422, 500, 503)},
    )
    def score_version(
        name: NameParam, version: VersionParam, body: ScoreBody, registry: RegistryDep, _: ScoreScope
    ) -> Any:
        """Score with one pinned version."""
        return run_scoring(resolve(registry, name, version), body)

    @app.get(
        "/v1/bundles",
        response_model=BundleList,
        tags=["bundles"],
        responses={200: _ok_example("bundles"), **_problem_responses(401, 403, 500, 503)},
    )
    def list_bundles(registry: RegistryDep, _: ReadScope) -> BundleList:
        listing = registry.listing()
        return BundleList(bundles=[BundleSummary(name=n, versions=v, aliases=a) for n, (v, a) in listing.items()])

    @app.get(
        "/v1/bundles/{name}/versions",
        response_model=BundleSummary,
        tags=["bundles"],
        responses={200: _ok_example("versions"), **_problem_responses(401, 403, 404, 422, 500, 503)},
    )
    def list_versions(name: NameParam, registry: RegistryDep, _: ReadScope) -> BundleSummary:
        versions, aliases = registry.versions(name)
        return BundleSummary(name=name, versions=versions, aliases=aliases)

    @app.get(
        "/v1/bundles/{name}/versions/{version}",
        response_model=Bundle,
        tags=["bundles"],
        responses={**_problem_responses(401, 403, 404, 422, 500, 503)},
    )
    def get_version(name: NameParam, version: VersionParam, registry: RegistryDep, _: ReadScope) -> Bundle:
        """The whole verified bundle: groups, items, policy per item and group with evidence, anchors, quality."""
        return resolve(registry, name, version).bundle

    @app.put(
        "/v1/bundles/{name}/versions/{version}",
        response_model=PublishResult,
        status_code=201,
        tags=["bundles"],
        responses={
            200: {"model": PublishResult, "description": "identical content was already published"},
            **_problem_responses(401, 403, 409, 413, 422, 500, 503),
        },
    )
    def put_version(
        name: NameParam, version: VersionParam, bundle: Bundle, registry: RegistryDep, _: PublishScope
    ) -> Any:
        """Publish a bundle at this version; a published version never changes (other content: 409)."""
        if bundle.name != name or bundle.version != version:
            raise InvalidBundle(
                f"the document is {bundle.name}@{bundle.version} but the path names {name}@{version}",
                field="body.version" if bundle.name == name else "body.name",
            )
        return publish_answer(*registry.put_version(bundle))

    @app.post(
        "/v1/bundles/{name}/versions",
        response_model=PublishResult,
        status_code=201,
        tags=["bundles"],
        responses={
            200: {
                "model": PublishResult,
                "description": "an identical calibration (same content "
                "but for version, time and hash) is already "
                "published: nothing changed",
            },
            **_problem_responses(401, 403, 413, 422, 500, 503),
        },
    )
    def publish_next(name: NameParam, bundle: Bundle, registry: RegistryDep, _: PublishScope) -> Any:
        """Publish a bundle as the next version of ``name`` (the version in the document is ignored).

        An identical calibration already published is not published again: the answer names it (200).
        """
        if bundle.name != name:
            raise InvalidBundle(f"the document is named {bundle.name!r} but the path names {name!r}", field="body.name")
        return publish_answer(*registry.publish(bundle))

    @app.put(
        "/v1/bundles/{name}/aliases/{alias}",
        response_model=AliasResult,
        tags=["bundles"],
        responses={200: _ok_example("alias_response"), **_problem_responses(401, 403, 404, 422, 500, 503)},
    )
    def move_alias(
        name: NameParam, alias: AliasParam, body: AliasRequest, registry: RegistryDep, _: PublishScope
    ) -> AliasResult:
        """Point an alias (e.g. ``production``) at a published version; move it back the same way."""
        version = registry.set_alias(name, alias, body.version)
        return AliasResult(name=name, alias=alias, version=version)

    return app


def app_from_env() -> FastAPI:
    """Factory for ``uvicorn --factory``: settings from EQUITHETA_* variables."""
    return create_app(Settings())


def serve(argv: list[str] | None = None) -> int:
    """``python -m service.main [--store ...] [--redis-url ...] [--host --port --workers ...]``.

    What ``equitheta serve`` runs. The access log stays off (uvicorn's would print query strings,
    which may carry keys); each request is logged by the service itself without keys or bodies.
    """
    import argparse
    import os
    import shutil
    import tempfile

    import uvicorn
    from pydantic import ValidationError

    parser = argparse.ArgumentParser(prog="equitheta serve")
    parser.add_argument("--store", help="bundle directory (or a redis:// URL); default: EQUITHETA_STORE")
    parser.add_argument("--redis-url", help="shared Redis store; overrides --store for bundles")
    parser.add_argument("--host", help="address to bind; default: EQUITHETA_HOST or 127.0.0.1")
    parser.add_argument("--port", type=int, help="port; default: EQUITHETA_PORT or 8000")
    parser.add_argument("--workers", type=int, help="worker processes; default: EQUITHETA_WORKERS or 1")
    parser.add_argument(
        "--worker-healthcheck-timeout",
        type=float,
        help="seconds before a worker that does not answer its health check is restarted; "
        "default: EQUITHETA_WORKER_HEALTHCHECK_TIMEOUT or 60",
    )
    args = parser.parse_args(argv)
    overrides = {
        "store": args.redis_url or args.store,
        "host": args.host,
        "port": args.port,
        "workers": args.workers,
        "worker_healthcheck_timeout": args.worker_healthcheck_timeout,
    }
    for key, value in overrides.items():
        if value is not None:
            os.environ[f"EQUITHETA_{key.upper()}"] = str(value)  # the workers read the same settings
    try:
        settings = Settings()
    except ValidationError as exc:
        for error in exc.errors():
            print(f"configuration error: {error['msg']}", file=sys.stderr)
        return 2
    if not settings.has_keys:
        print(f"no API keys configured: open access, bound to loopback only ({settings.host})", file=sys.stderr)
    metrics_dir = None
    if settings.workers > 1 and not os.environ.get("PROMETHEUS_MULTIPROC_DIR"):
        metrics_dir = tempfile.mkdtemp(prefix="equitheta-metrics-")
        os.environ["PROMETHEUS_MULTIPROC_DIR"] = metrics_dir  # every worker counts into the same files
    try:
        uvicorn.run(
            "service.main:app_from_env",
            factory=True,
            host=settings.host,
            port=settings.port,
            workers=settings.workers,
            log_level=settings.log_level,
            access_log=False,
            timeout_worker_healthcheck=settings.worker_healthcheck_timeout,
        )
    finally:
        if metrics_dir is not None:
            shutil.rmtree(metrics_dir, ignore_errors=True)
    return 0


if __name__ == "__main__":
    sys.exit(serve())
