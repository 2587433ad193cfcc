"""Operations routes: liveness, readiness (from the background probe, never waiting on the store), metrics."""

from __future__ import annotations

from typing import Any

from fastapi import APIRouter
from fastapi.responses import JSONResponse, PlainTextResponse, Response

from service.api.deps import MetricsAccess, MetricsDep, RegistryDep
from service.api.docs import ok_example, problem_responses
from service.metrics import CONTENT_TYPE as METRICS_CONTENT_TYPE
from service.middleware import OrjsonRoute
from service.schemas import Health, Readiness
from service.settings import Settings


def router(settings: Settings) -> APIRouter:
    """The operations routes; /metrics documents its problem answers only when a scope closes it."""
    ops = APIRouter(route_class=OrjsonRoute, tags=["operations"])
    ops.add_api_route(
        "/healthz", healthz, methods=["GET"], response_model=Health, responses={200: ok_example("healthz")}
    )
    ops.add_api_route(
        "/readyz",
        readyz,
        methods=["GET"],
        response_model=Readiness,
        responses={200: ok_example("readyz"), 503: {"model": Readiness, "description": "not ready"}},
    )
    ops.add_api_route(
        "/metrics",
        metrics_route,
        methods=["GET"],
        response_class=PlainTextResponse,
        responses={
            200: {"content": {"text/plain": {"example": "equitheta_requests_total{...} 1\n"}}},
            **(problem_responses(401, 403) if settings.metrics_scope else {}),
        },
    )
    return ops


def healthz() -> Health:
    """The process answers."""
    return Health(status="ok")


def readyz(registry: RegistryDep, metrics: MetricsDep) -> Any:
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


def metrics_route(_: MetricsAccess, registry: RegistryDep, metrics: MetricsDep) -> Response:
    """Prometheus text exposition of the service's counters and gauges."""
    metrics.set_state(bundles_loaded=registry.loaded_count, store_up=registry.store_up)
    return Response(metrics.render(), media_type=METRICS_CONTENT_TYPE)
