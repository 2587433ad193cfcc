"""Scoring routes: the default version of a bundle, or one pinned version.

Dependencies run in the order declared: the caller's scope (401/403), the batch (413), then the bundle (404).
"""

from __future__ import annotations

import orjson
from fastapi import APIRouter, Request
from fastapi.concurrency import run_in_threadpool
from fastapi.responses import Response

from service.api.deps import DefaultBundle, PinnedBundle, ScoreBatch, ScoreScope
from service.api.docs import ok_example, problem_responses
from service.drift_watch import DriftWatch
from service.metrics import Metrics
from service.middleware import OrjsonRoute
from service.registry import LoadedBundle
from service.schemas import ScoreRequest, ScoreResponse
from service.scoring import score_vectors

router = APIRouter(route_class=OrjsonRoute, tags=["scoring"])
_ANSWERS = {200: ok_example("score_response"), **problem_responses(401, 403, 404, 413, 422, 500, 503)}


def _scored(loaded: LoadedBundle, body: ScoreRequest, metrics: Metrics, watch: DriftWatch | None) -> Response:
    document = score_vectors(loaded, body, None if watch is None else watch.observe)
    metrics.count_vectors(loaded.bundle.label, len(body.responses))
    # Built in the ScoreResponse shape (tests check it against the schema); sent without re-validation.
    return Response(orjson.dumps(document), media_type="application/json")


INLINE_VECTORS = 16
"""Batches up to this size are scored on the event loop (well under a millisecond); larger ones in a thread."""


async def _answer(loaded: LoadedBundle, body: ScoreRequest, request: Request) -> Response:
    state = request.app.state
    if len(body.responses) <= INLINE_VECTORS:
        return _scored(loaded, body, state.metrics, state.drift_watch)
    return await run_in_threadpool(_scored, loaded, body, state.metrics, state.drift_watch)


@router.post("/v1/bundles/{name}/scores", response_model=ScoreResponse, responses=_ANSWERS)
async def score_default(_: ScoreScope, body: ScoreBatch, loaded: DefaultBundle, request: Request) -> Response:
    """Score with the version the ``production`` alias points at, else the newest version."""
    return await _answer(loaded, body, request)


@router.post("/v1/bundles/{name}/versions/{version}/scores", response_model=ScoreResponse, responses=_ANSWERS)
async def score_version(_: ScoreScope, body: ScoreBatch, loaded: PinnedBundle, request: Request) -> Response:
    """Score with one pinned version."""
    return await _answer(loaded, body, request)
