"""Annotated dependencies that resolve and validate: settings, registry, caller and scope, bundle, batch.

A route declares what it needs (``ReadScope``, ``DefaultBundle``, ``ScoreBatch`` ...) and receives it
checked; a failed check raises a domain exception that ``service.errors`` turns into a problem document.
Dependencies are coroutines that do no I/O on the event loop (no thread hand-off per request); a
store read (a version not yet held, aliases without a live change feed) runs in the thread pool.
FastAPI resolves each dependency anew on every request (tens of microseconds each), so those on the
scoring path read the app's state (settings, registry, key ring) from the request themselves instead
of depending on the accessors: a score request resolves four dependencies, not eight.
"""

from __future__ import annotations

from collections.abc import Awaitable, Callable
from typing import Annotated

from fastapi import Body, Depends, Header, Request
from fastapi import Path as PathParam
from fastapi.concurrency import run_in_threadpool

from calibration.bundle.schema import ALIAS_PATTERN, NAME_PATTERN
from service.api.docs import example
from service.errors import PayloadTooLarge
from service.metrics import Metrics
from service.registry import BundleRegistry, LoadedBundle
from service.schemas import ScoreRequest, SummaryRequest
from service.security import KeyRing, Principal
from service.settings import Settings

NameParam = Annotated[str, PathParam(pattern=NAME_PATTERN, description="bundle name")]
VersionParam = Annotated[int, PathParam(ge=1, le=2**31 - 1, description="bundle version")]
AliasParam = Annotated[str, PathParam(pattern=ALIAS_PATTERN, description="alias, e.g. production")]
AuthorizationHeader = Annotated[str | None, Header(description="Bearer <API key>")]
ApiKeyHeader = Annotated[str | None, Header(description="the API key (alternative header)")]


async def settings_dep(request: Request) -> Settings:
    """The settings the app was created with."""
    return request.app.state.settings  # type: ignore[no-any-return]


async def registry_dep(request: Request) -> BundleRegistry:
    """The registry of verified bundles (started by the lifespan)."""
    return request.app.state.registry  # type: ignore[no-any-return]


async def metrics_dep(request: Request) -> Metrics:
    """The app's metrics."""
    return request.app.state.metrics  # type: ignore[no-any-return]


SettingsDep = Annotated[Settings, Depends(settings_dep)]
RegistryDep = Annotated[BundleRegistry, Depends(registry_dep)]
MetricsDep = Annotated[Metrics, Depends(metrics_dep)]


def _principal(request: Request, authorization: str | None, x_api_key: str | None) -> Principal:
    """The caller named by the API key (or the open-access principal when no keys are configured)."""
    keyring: KeyRing = request.app.state.keyring
    return keyring.authenticate(authorization, x_api_key)


def _needs(scope: str) -> Callable[..., Awaitable[Principal]]:
    async def check(
        request: Request, authorization: AuthorizationHeader = None, x_api_key: ApiKeyHeader = None
    ) -> Principal:
        principal = _principal(request, authorization, x_api_key)
        KeyRing.require(principal, scope)
        return principal

    return check


ScoreScope = Annotated[Principal, Depends(_needs("score"))]
ReadScope = Annotated[Principal, Depends(_needs("read"))]
PublishScope = Annotated[Principal, Depends(_needs("publish"))]


async def metrics_access(
    request: Request, settings: SettingsDep, authorization: AuthorizationHeader = None, x_api_key: ApiKeyHeader = None
) -> None:
    """Open by default like /healthz and /readyz (scrapers rarely carry keys); ``metrics_scope`` closes it."""
    if settings.metrics_scope is not None:
        KeyRing.require(_principal(request, authorization, x_api_key), settings.metrics_scope)


MetricsAccess = Annotated[None, Depends(metrics_access)]


async def default_bundle(name: NameParam, request: Request) -> LoadedBundle:
    """The version the ``production`` alias points at, else the newest version (store errors map to problems).

    Answered from memory while the store's change feed keeps the view current; otherwise the store
    is read in the thread pool.
    """
    registry: BundleRegistry = request.app.state.registry
    held = registry.default_held(name)
    if held is not None:
        return held
    return await run_in_threadpool(registry.default, name)


async def pinned_bundle(name: NameParam, version: VersionParam, request: Request) -> LoadedBundle:
    """One published version, verified (a version already held is answered without a thread hand-off)."""
    registry: BundleRegistry = request.app.state.registry
    held = registry.held(name, version)
    if held is not None:
        return held
    return await run_in_threadpool(registry.get, name, version)


DefaultBundle = Annotated[LoadedBundle, Depends(default_bundle)]
PinnedBundle = Annotated[LoadedBundle, Depends(pinned_bundle)]

_SCORE_EXAMPLE = example("score_request")
ScoreBody = Annotated[
    ScoreRequest,
    Body(openapi_examples={"one respondent": {"value": _SCORE_EXAMPLE}} if _SCORE_EXAMPLE else None),
]


def _within_limit(n_vectors: int, request: Request) -> None:
    """Refuse (413) a request with more vectors than ``max_vectors``."""
    settings: Settings = request.app.state.settings
    if n_vectors > settings.max_vectors:
        raise PayloadTooLarge(
            f"{n_vectors} response vectors; at most {settings.max_vectors} per request (EQUITHETA_MAX_VECTORS)"
        )


async def score_batch(body: ScoreBody, request: Request) -> ScoreRequest:
    """The score request, refused (413) when it holds more vectors than ``max_vectors``."""
    _within_limit(len(body.responses), request)
    return body


async def summary_batch(body: SummaryRequest, request: Request) -> SummaryRequest:
    """The summary request, refused (413) when it holds more vectors than ``max_vectors``."""
    _within_limit(len(body.responses), request)
    return body


ScoreBatch = Annotated[ScoreRequest, Depends(score_batch)]
SummaryBatch = Annotated[SummaryRequest, Depends(summary_batch)]
