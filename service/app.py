"""The one assembly point: ``create_app()``."""

from __future__ import annotations

import asyncio
import logging
from collections.abc import AsyncIterator
from contextlib import asynccontextmanager
from typing import Any

from litestar import Litestar, Request, Response
from litestar.exceptions import HTTPException

from .auth import KeyRing
from .cache import ModelCache
from .drift import SharedWindows
from .errors import (
    INTERNAL_PROBLEM,
    PROBLEM_MEDIA_TYPE,
    Problem,
    ServiceError,
    framework_problem,
)
from .heap import keep_heap
from .keys import Keys
from .lane import ALLOW, TEMPLATES, point_lane
from .logs import ACCESS_LOG
from .metrics import DRIFT, forget_dead_processes, forget_this_process
from .middleware import request_middleware
from .ratelimit import RateLimiter
from .redis_clients import async_client, close
from .replicas import ReplicatedWriter
from .routes import datasets, health, jobs, models, reports, scoring
from .settings import Settings
from .state import Services
from .store import ModelStore

log = logging.getLogger("mixscore")

#: Longest wait for the events listener to stop at shutdown.
SHUTDOWN_WAIT_S = 2.0


def create_app(settings: Settings | None = None) -> Litestar:
    settings = settings or Settings.from_env()
    keys = KeyRing.from_settings(settings)

    @asynccontextmanager
    async def lifespan(app: Litestar) -> AsyncIterator[None]:
        forget_dead_processes()
        keep_heap()
        ACCESS_LOG.open(settings.access_log)
        DRIFT.window = settings.drift_window
        client = async_client(settings)
        store = ModelStore(client, Keys(settings.key_prefix),
                           ReplicatedWriter.from_settings(client, settings))
        cache = ModelCache(store, settings.cache_bytes, settings.stamp_check_s)
        limiter = RateLimiter(client, store.keys, settings.rate_limit)
        drift = SharedWindows(client, store.keys, settings.drift_window)
        app.state.services = Services(settings, client, store, cache, keys, limiter, drift)
        if keys.empty:
            log.warning("no API keys are configured: every request is allowed, so mixscore "
                        "must only listen on loopback (set MIXSCORE_API_KEYS_FILE)")
        stop = asyncio.Event()
        listener = asyncio.create_task(cache.follow_events(client, store.keys.events, stop))
        flusher = asyncio.create_task(ACCESS_LOG.flush_every(stop))
        appender = asyncio.create_task(drift.run(stop))
        try:
            yield
        finally:
            stop.set()
            await asyncio.wait([listener, flusher, appender], timeout=SHUTDOWN_WAIT_S)
            listener.cancel()
            appender.cancel()
            await close(client)
            forget_this_process()

    app = Litestar(
        route_handlers=[*health.ROUTES, *models.ROUTES, *scoring.ROUTES, *jobs.ROUTES,
                        *datasets.ROUTES, *reports.ROUTES],
        lifespan=[lifespan],
        exception_handlers={
            ServiceError: _service_problem,
            HTTPException: _framework_problem,
            Exception: _unexpected_problem,
        },
        request_max_body_size=settings.max_body_bytes,
        openapi_config=None,  # served from service/openapi.py, which knows our bodies
        logging_config=None,
    )
    # Around the router, not per route: unknown paths are logged and counted too.
    allowed = {route.path_format: ", ".join(sorted(route.methods)) for route in app.routes}
    allowed.update(dict.fromkeys(TEMPLATES.values(), ALLOW))
    app.asgi_handler = request_middleware(point_lane(app.asgi_handler), allowed)
    return app


def _problem(problem: Problem, headers: dict[str, str] | None = None) -> Response[Problem]:
    return Response(content=problem, status_code=problem.status, media_type=PROBLEM_MEDIA_TYPE,
                    headers=headers)


def _service_problem(_: Request[Any, Any, Any], error: ServiceError) -> Response[Problem]:
    return _problem(error.problem(), error.headers)


def _framework_problem(_: Request[Any, Any, Any], error: HTTPException) -> Response[Problem]:
    return _problem(framework_problem(error.status_code, str(error.detail)), error.headers)


def _unexpected_problem(request: Request[Any, Any, Any], error: Exception) -> Response[Problem]:
    log.exception("unexpected error on %s %s", request.method, request.url.path)
    return _problem(INTERNAL_PROBLEM)
