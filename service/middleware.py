"""ASGI middleware (body limit, metrics and request log) and the orjson request decoding."""

from __future__ import annotations

import logging
import time
from collections.abc import Callable
from typing import Any

import orjson
from fastapi import Request
from fastapi.routing import APIRoute
from pydantic import BaseModel, ValidationError
from starlette.types import ASGIApp, Message, Receive, Scope, Send

from service.errors import problem
from service.logs import log_event
from service.metrics import Metrics


class OrjsonRequest(Request):
    """Decodes JSON bodies with orjson: about 4x faster than the standard library on score batches.

    orjson is stricter (no NaN literals) and raises a subclass of json.JSONDecodeError, so a bad body
    is still answered with the usual 422 problem document.
    """

    async def json(self) -> Any:
        """The body decoded by orjson, once."""
        if not hasattr(self, "_json"):
            self._json = orjson.loads(await self.body())
        return self._json


class ModelRequest(OrjsonRequest):
    """Parses and validates a body in one pass with the route's body model (pydantic's JSON mode).

    A valid body becomes the model instance the route's validation then accepts as it is (about a
    third less work than decoding to dicts and validating those); an invalid one is decoded by
    orjson and validated the usual way, so every error answer stays exactly what it was. A model
    with a ``from_plain_json`` class method (the score request) is offered the body first: it
    returns the instance for a body that plainly keeps every rule, else None.
    """

    body_model: type[BaseModel]

    async def json(self) -> Any:
        """The validated model, or (when the body does not validate) the orjson-decoded body."""
        if not hasattr(self, "_json"):
            raw = await self.body()
            plain = getattr(self.body_model, "from_plain_json", None)
            self._json = None if plain is None else plain(raw)
            if self._json is None:
                try:
                    self._json = self.body_model.model_validate_json(raw)
                except ValidationError:
                    self._json = orjson.loads(raw)
        return self._json


class OrjsonRoute(APIRoute):
    """A route that hands its handler an :class:`OrjsonRequest` (a :class:`ModelRequest` for a model body)."""

    def get_route_handler(self) -> Callable[[Request], Any]:
        """The framework's handler, given an orjson-decoding request."""
        handler = super().get_route_handler()
        field = self.body_field
        model = None if field is None else field.field_info.annotation
        if isinstance(model, type) and issubclass(model, BaseModel):
            request_class = type(f"{model.__name__}Request", (ModelRequest,), {"body_model": model})
        else:
            request_class = OrjsonRequest

        async def decoded(request: Request) -> Any:
            return await handler(request_class(request.scope, request.receive))

        return decoded


class BodyLimit:
    """Reads the request body up to the limit; a larger body gets a 413 problem document."""

    def __init__(self, app: ASGIApp, max_bytes: int) -> None:
        self.app, self.max_bytes = app, max_bytes

    async def __call__(self, scope: Scope, receive: Receive, send: Send) -> None:
        """Pass the request on with its body read up to the limit (413 beyond it)."""
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
        """Pass the request on; count it and log one line when it is answered."""
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
