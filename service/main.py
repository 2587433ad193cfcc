"""The app factory and its lifespan; routes live in ``service.api.routes``, ``serve`` in ``service.__main__``."""

from __future__ import annotations

import logging
from collections.abc import AsyncIterator
from contextlib import asynccontextmanager

from fastapi import FastAPI

from calibration import __version__
from calibration.bundle import open_store
from calibration.bundle.redis_store import RedisStore
from calibration.irt.likelihood import single_threaded_blas
from service.api.docs import document_problems
from service.api.routes import bundles, ops, scores, summaries
from service.drift_watch import DriftWatch
from service.errors import install_handlers
from service.logs import configure_logging, log_event
from service.metrics import Metrics
from service.middleware import BodyLimit, Observe, OrjsonRoute
from service.registry import BundleRegistry
from service.schemas import ScoreResponse
from service.security import KeyRing, load_keys
from service.settings import Settings


def create_app(settings: Settings) -> FastAPI:
    """The scoring service over the store ``settings`` name; the registry starts with the app's lifespan."""
    keyring = KeyRing(load_keys(settings.api_keys_file, settings.api_keys))

    @asynccontextmanager
    async def lifespan(app: FastAPI) -> AsyncIterator[None]:
        configure_logging(settings.log_level)
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
        app.state.drift_watch = None
        if settings.drift_watch and isinstance(store, RedisStore):  # the settings insist on a redis:// store
            app.state.drift_watch = DriftWatch(store, settings.drift_flush_seconds)
            app.state.drift_watch.start()
        # One request per thread and one worker per core: BLAS threads would only compete (and spin).
        with single_threaded_blas():
            yield
        if app.state.drift_watch is not None:
            app.state.drift_watch.stop()
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
    app.state.settings, app.state.keyring, app.state.metrics = settings, keyring, Metrics()
    app.state.drift_watch = None  # started by the lifespan when EQUITHETA_DRIFT_WATCH is on
    install_handlers(app)
    routers = (ops.router(settings), scores.router, summaries.router, bundles.router)
    for router in routers:
        app.include_router(router)
    app.state.route_table = [*app.router.routes, *(route for router in routers for route in router.routes)]
    document_problems(app)
    app.add_middleware(BodyLimit, max_bytes=settings.max_body_bytes)
    app.add_middleware(Observe, metrics=app.state.metrics)
    return app


def app_from_env() -> FastAPI:
    """Factory for ``uvicorn --factory``: settings from EQUITHETA_* variables."""
    return create_app(Settings())
