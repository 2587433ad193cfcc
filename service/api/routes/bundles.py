"""Bundle routes: list names and versions, read a verified bundle, publish, move an alias.

Every route checks the caller's scope first (its first parameter), so a caller without it learns nothing.
"""

from __future__ import annotations

from typing import Annotated, Any

from fastapi import APIRouter, Query
from fastapi.responses import HTMLResponse, JSONResponse, Response

from calibration.bundle import Bundle, to_bytes
from calibration.bundle.compare import BundleDiff, compare_versions
from calibration.bundle.drift_watch import DriftWatchReport, drift_report
from calibration.bundle.redis_store import RedisStore
from calibration.bundle.schema import ALIAS_PATTERN
from calibration.errors import BundleNotFound
from service.api.deps import AliasParam, NameParam, PinnedBundle, PublishScope, ReadScope, RegistryDep, VersionParam
from service.api.docs import ok_example, problem_responses
from service.errors import DriftCountsNotKept, InvalidBundle
from service.middleware import OrjsonRoute
from service.registry import BundleRegistry
from service.schemas import (
    AliasHistory,
    AliasMoveOut,
    AliasRequest,
    AliasResult,
    BundleList,
    BundleSummary,
    PublishResult,
)
from service.security import OPEN_ACCESS

router = APIRouter(route_class=OrjsonRoute, tags=["bundles"])


def publish_answer(stored: Bundle, created: bool) -> Any:  # noqa: FBT001 - (bundle, created) is the store's answer
    """201 with the new version, or 200 naming the version that already held this content."""
    result = PublishResult(name=stored.name, version=stored.version, hash=stored.hash, created=created)
    return result if created else JSONResponse(result.model_dump(), status_code=200)


@router.get(
    "/v1/bundles",
    response_model=BundleList,
    responses={200: ok_example("bundles"), **problem_responses(401, 403, 500, 503)},
)
def list_bundles(_: ReadScope, registry: RegistryDep) -> BundleList:
    """Every bundle name with its versions and aliases."""
    listing = registry.listing()
    return BundleList(bundles=[BundleSummary(name=n, versions=v, aliases=a) for n, (v, a) in listing.items()])


@router.get(
    "/v1/bundles/{name}/versions",
    response_model=BundleSummary,
    responses={200: ok_example("versions"), **problem_responses(401, 403, 404, 422, 500, 503)},
)
def list_versions(_: ReadScope, name: NameParam, registry: RegistryDep) -> BundleSummary:
    """The published versions of one bundle and its aliases."""
    versions, aliases = registry.versions(name)
    return BundleSummary(name=name, versions=versions, aliases=aliases)


@router.get(
    "/v1/bundles/{name}/versions/{version}",
    response_model=Bundle,
    responses={**problem_responses(401, 403, 404, 422, 500, 503)},
)
def get_version(_: ReadScope, loaded: PinnedBundle) -> Response:
    """The whole verified bundle: groups, items, policy per item and group with evidence, anchors, quality.

    Sent as its stored canonical bytes, so a client can check the hash: SHA-256 of the same document
    without its `hash` field, keys sorted, no white space."""
    return Response(to_bytes(loaded.bundle), media_type="application/json")


@router.put(
    "/v1/bundles/{name}/versions/{version}",
    response_model=PublishResult,
    status_code=201,
    responses={
        200: {"model": PublishResult, "description": "identical content was already published"},
        **problem_responses(401, 403, 409, 413, 422, 500, 503),
    },
)
def put_version(_: PublishScope, name: NameParam, version: VersionParam, bundle: Bundle, registry: RegistryDep) -> Any:
    """Publish a bundle at this version; a published version never changes (other content: 409)."""
    if bundle.name != name or bundle.version != version:
        raise InvalidBundle(
            f"the document is {bundle.name}@{bundle.version} but the path names {name}@{version}",
            field="body.version" if bundle.name == name else "body.name",
        )
    return publish_answer(*registry.put_version(bundle))


@router.post(
    "/v1/bundles/{name}/versions",
    response_model=PublishResult,
    status_code=201,
    responses={
        200: {
            "model": PublishResult,
            "description": "an identical calibration (same content but for version, time and hash) is already "
            "published: nothing changed",
        },
        **problem_responses(401, 403, 413, 422, 500, 503),
    },
)
def publish_next(_: PublishScope, name: NameParam, bundle: Bundle, registry: RegistryDep) -> Any:
    """Publish a bundle as the next version of ``name`` (the version in the document is ignored).

    An identical calibration already published is not published again: the answer names it (200).
    """
    if bundle.name != name:
        raise InvalidBundle(f"the document is named {bundle.name!r} but the path names {name!r}", field="body.name")
    return publish_answer(*registry.publish(bundle))


@router.put(
    "/v1/bundles/{name}/aliases/{alias}",
    response_model=AliasResult,
    responses={200: ok_example("alias_response"), **problem_responses(401, 403, 404, 422, 500, 503)},
)
def move_alias(
    caller: PublishScope, name: NameParam, alias: AliasParam, body: AliasRequest, registry: RegistryDep
) -> AliasResult:
    """Point an alias (e.g. ``production``) at a published version; move it back the same way.

    The alias history records when and by which API key (its name, never the key) every move was made.
    """
    by = caller.name if caller is OPEN_ACCESS else f"API key {caller.name}"
    version = registry.set_alias(name, alias, body.version, by=by)
    return AliasResult(name=name, alias=alias, version=version)


@router.get(
    "/v1/bundles/{name}/aliases/{alias}",
    response_model=AliasHistory,
    responses={200: ok_example("alias_history"), **problem_responses(401, 403, 404, 422, 500, 503)},
)
def alias_history(_: ReadScope, name: NameParam, alias: AliasParam, registry: RegistryDep) -> AliasHistory:
    """Where an alias points and every move that led there: version, time (UTC) and who (the key's name)."""
    record = registry.alias_record(name, alias)
    moves = [AliasMoveOut(version=m.version, moved_at=m.moved_at, by=m.by) for m in record.history]
    return AliasHistory(name=name, alias=alias, version=record.version, history=moves)


VERSION_OR_ALIAS = r"^[1-9][0-9]{0,9}$|" + ALIAS_PATTERN
FromParam = Annotated[str, Query(alias="from", pattern=VERSION_OR_ALIAS, description="older version, or an alias")]
ToParam = Annotated[str, Query(alias="to", pattern=VERSION_OR_ALIAS, description="newer version, or an alias")]


def _version_of(registry: BundleRegistry, name: str, reference: str) -> Bundle:
    if reference.isdigit():
        return registry.get(name, int(reference)).bundle
    _, aliases = registry.versions(name)
    if reference not in aliases:
        known = ", ".join(sorted(aliases)) or "none"
        raise BundleNotFound(f"bundle {name!r} has no alias {reference!r} (aliases: {known})")
    return registry.get(name, aliases[reference]).bundle


@router.get(
    "/v1/bundles/{name}/diff",
    response_model=BundleDiff,
    responses={200: ok_example("diff"), **problem_responses(401, 403, 404, 422, 500, 503)},
)
def diff_versions(_: ReadScope, name: NameParam, older: FromParam, newer: ToParam, registry: RegistryDep) -> BundleDiff:
    """What changed between two versions: items (with the size of each change in theta units), policy cells,
    anchors, group densities, and the expected change in theta and SE for a respondent who answers the common
    items; ``same_scale`` says whether the versions were linked. A changed item is evidence for content review,
    not a verdict."""
    return compare_versions(
        _version_of(registry, name, older),
        _version_of(registry, name, newer),
        lambda parent, version: registry.get(parent, version).bundle,
    )


@router.get(
    "/v1/bundles/{name}/versions/{version}/drift",
    response_model=DriftWatchReport,
    responses={**problem_responses(401, 403, 404, 422, 500, 503)},
)
def drift_watch(_: ReadScope, loaded: PinnedBundle, registry: RegistryDep) -> DriftWatchReport:
    """How each item of this version fits the responses scored with it so far, per group (the drift watch).

    Counts kept by every replica with ``EQUITHETA_DRIFT_WATCH`` on (counts by theta bin and category only).
    The RMSD between the observed and the model expected-score curves flags an item in a group above the
    threshold once enough answers are counted: evidence for a content review, not a verdict on any score.
    """
    if not isinstance(registry.store, RedisStore):
        raise DriftCountsNotKept(
            "drift-watch counts are kept in the shared Redis store; this service uses a directory store "
            "(run it with EQUITHETA_STORE=redis://... and EQUITHETA_DRIFT_WATCH=true)"
        )
    return drift_report(registry.store, loaded.bundle)


@router.get(
    "/v1/bundles/{name}/versions/{version}/report",
    response_class=HTMLResponse,
    responses={
        200: {"content": {"text/html": {}}, "description": "the calibration report page"},
        **problem_responses(401, 403, 404, 422, 500, 503),
    },
)
def report_page(_: ReadScope, loaded: PinnedBundle, registry: RegistryDep) -> HTMLResponse:
    """The calibration report of one version: one self-contained HTML page (plots inline, no network) with the
    data, the invariance ladder, anchors, the item policy by group, every flagged cell's curves and evidence,
    information and SE, reliability, item fit, summed-score tables, reviewers' decisions and the cautions."""
    from calibration.report.page import render_report  # plotting loads only when a report is asked for

    aliases = registry.alias_records(loaded.bundle.name)
    return HTMLResponse(render_report(loaded.bundle, aliases=aliases))
