"""RFC 9457 problem documents: every error the service returns has this shape."""

from __future__ import annotations

import logging
from typing import Any

from fastapi import FastAPI, Request
from fastapi.exceptions import RequestValidationError
from fastapi.responses import JSONResponse
from starlette.exceptions import HTTPException as StarletteHTTPException
from starlette.routing import Match

from calibration.errors import (
    BundleIntegrityError,
    BundleNotFound,
    InvalidBundleDocument,
    InvalidReference,
    StoreUnavailable,
    VersionConflict,
)
from service.logs import log_event

PROBLEM_MEDIA_TYPE = "application/problem+json"
PROBLEM_BASE = "https://equitheta.invalid/problems/"


class ProblemError(Exception):
    """A domain error with a stable problem type."""

    status = 400
    slug = "bad-request"
    title = "Bad request"

    def __init__(self, detail: str, **extra: Any) -> None:
        super().__init__(detail)
        self.detail = detail
        self.extra = extra


class InvalidScoreRequest(ProblemError):
    """A score request that does not fit the bundle (422)."""

    status, slug, title = 422, "invalid-score-request", "The response vectors cannot be scored"


class UnknownItem(InvalidScoreRequest):
    """A response vector names an item the bundle does not have."""

    slug, title = "unknown-item", "Unknown item"


class AnswerOutOfRange(InvalidScoreRequest):
    """An answer outside its item's categories."""

    slug, title = "answer-out-of-range", "Answer outside the item's categories"


class UnknownGroupProblem(InvalidScoreRequest):
    """A response vector's group is not in the bundle (or none is given where several exist)."""

    slug, title = "unknown-group", "Unknown group"


class InvalidBundle(ProblemError):
    """A published document that contradicts its path (422)."""

    status, slug, title = 422, "invalid-bundle", "The bundle document is not valid"


class Unauthorized(ProblemError):
    """No API key, or an unknown one (401)."""

    status, slug, title = 401, "unauthorized", "Missing or unknown API key"


class Forbidden(ProblemError):
    """A key without the scope the route needs (403)."""

    status, slug, title = 403, "forbidden", "The API key lacks the scope this route needs"


class DriftCountsNotKept(ProblemError):
    """Drift-watch counts live in the shared Redis store; this service's store is a directory (404)."""

    status, slug, title = 404, "drift-counts-not-kept", "This service keeps no drift-watch counts"


class PayloadTooLarge(ProblemError):
    """A request with too many vectors or too many bytes (413)."""

    status, slug, title = 413, "payload-too-large", "Request too large"


# Domain exceptions -> (status, problem type, title): the one table, registered once in install_handlers.
# A damaged stored bundle is the server's fault (500, its own type); its message names the version,
# never where it is stored.
DOMAIN_PROBLEMS: dict[type[Exception], tuple[int, str, str]] = {
    BundleNotFound: (404, "bundle-not-found", "Bundle not found"),
    VersionConflict: (409, "version-conflict", "That version is already published with other content"),
    InvalidReference: (422, "invalid-bundle", "The bundle document is not valid"),
    InvalidBundleDocument: (422, "invalid-bundle", "The bundle document is not valid"),
    BundleIntegrityError: (500, "stored-bundle-damaged", "A stored bundle is damaged and refused"),
    StoreUnavailable: (503, "store-unavailable", "The shared bundle store is unreachable"),
}


def problem(
    status: int,
    slug: str,
    title: str,
    detail: str,
    instance: str | None = None,
    headers: dict[str, str] | None = None,
    **extra: Any,
) -> JSONResponse:
    """An RFC 9457 problem document as a response (``application/problem+json``)."""
    body: dict[str, Any] = {"type": PROBLEM_BASE + slug, "title": title, "status": status, "detail": detail}
    if instance:
        body["instance"] = instance
    body.update(extra)
    return JSONResponse(body, status_code=status, media_type=PROBLEM_MEDIA_TYPE, headers=headers)


def _allow_header(request: Request) -> dict[str, str]:
    """Every method any route offers at this path (Starlette would name only the first route's)."""
    methods: set[str] = set()
    # The app's own routes and those of the routers it included (``route_table``, set by create_app).
    for route in getattr(request.app.state, "route_table", request.app.router.routes):
        match, _ = route.matches({**request.scope, "method": "\x00"})  # no real method: path matches only
        if match is not Match.NONE:
            methods |= set(getattr(route, "methods", None) or ())
    return {"Allow": ", ".join(sorted(methods))}


def install_handlers(app: FastAPI) -> None:
    """Register the one table from domain exception to problem document, and the framework's own errors."""

    @app.exception_handler(ProblemError)
    async def _domain(request: Request, exc: ProblemError) -> JSONResponse:
        headers = {"WWW-Authenticate": "Bearer"} if exc.status == 401 else None
        return problem(exc.status, exc.slug, exc.title, exc.detail, request.url.path, headers=headers, **exc.extra)

    async def _table(request: Request, exc: Exception) -> JSONResponse:
        status, slug, title = next(v for k, v in DOMAIN_PROBLEMS.items() if isinstance(exc, k))
        if status >= 500:
            log_event(
                logging.ERROR,
                slug,
                method=request.method,
                path=request.url.path,
                detail=str(exc),
                location=getattr(exc, "location", None),
            )
        return problem(status, slug, title, str(exc), request.url.path)

    for error in DOMAIN_PROBLEMS:
        app.add_exception_handler(error, _table)

    @app.exception_handler(RequestValidationError)
    async def _validation(request: Request, exc: RequestValidationError) -> JSONResponse:
        errors = [
            {"field": ".".join(str(p) for p in e.get("loc", ())), "message": e.get("msg", ""), "type": e.get("type")}
            for e in exc.errors()
        ]
        first = errors[0] if errors else {"field": "", "message": "invalid request"}
        detail = f"{first['field']}: {first['message']}" + (f" (and {len(errors) - 1} more)" if len(errors) > 1 else "")
        return problem(
            422, "validation-error", "The request does not match the schema", detail, request.url.path, errors=errors
        )

    @app.exception_handler(StarletteHTTPException)
    async def _http(request: Request, exc: StarletteHTTPException) -> JSONResponse:
        slug = {404: "not-found", 405: "method-not-allowed"}.get(exc.status_code, "http-error")
        return problem(
            exc.status_code,
            slug,
            str(exc.detail),
            f"{request.method} {request.url.path}: {exc.detail}",
            request.url.path,
            headers=_allow_header(request) if exc.status_code == 405 else getattr(exc, "headers", None),
        )

    @app.exception_handler(Exception)
    async def _unexpected(request: Request, exc: Exception) -> JSONResponse:
        log_event(logging.ERROR, "unexpected-error", exc_info=True, method=request.method, path=request.url.path)
        return problem(
            500,
            "internal-error",
            "Internal server error",
            "The server could not complete the request; the error was logged.",
            request.url.path,
        )
