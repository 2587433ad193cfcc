"""Summary routes: group (and cohort) summaries of response vectors with plausible values.

Dependencies run in the order declared: the caller's scope (401/403), the batch (413), then the bundle (404).
"""

from __future__ import annotations

from fastapi import APIRouter
from fastapi.concurrency import run_in_threadpool

from calibration.bundle.summaries import GroupSummaries
from service.api.deps import DefaultBundle, PinnedBundle, ScoreScope, SummaryBatch
from service.api.docs import problem_responses
from service.middleware import OrjsonRoute
from service.scoring import summarize_vectors

router = APIRouter(route_class=OrjsonRoute, tags=["summaries"])
_ANSWERS = problem_responses(401, 403, 404, 413, 422, 500, 503)


@router.post("/v1/bundles/{name}/summaries", response_model=GroupSummaries, responses=_ANSWERS)
async def summaries_default(_: ScoreScope, body: SummaryBatch, loaded: DefaultBundle) -> GroupSummaries:
    """Each group's (and cohort's) mean and SD, and every difference of means, from plausible values.

    Scored with the version the ``production`` alias points at, else the newest. Every respondent gets
    plausible values under their cell's latent density; means, SDs and differences are combined by Rubin's
    rules with 95% intervals. Group summaries describe groups, not individuals; their SEs assume simple
    random sampling within each cell.
    """
    return await run_in_threadpool(summarize_vectors, loaded, body)


@router.post("/v1/bundles/{name}/versions/{version}/summaries", response_model=GroupSummaries, responses=_ANSWERS)
async def summaries_version(_: ScoreScope, body: SummaryBatch, loaded: PinnedBundle) -> GroupSummaries:
    """Group summaries with one pinned version (see the unpinned route)."""
    return await run_in_threadpool(summarize_vectors, loaded, body)
