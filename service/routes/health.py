"""Liveness, readiness, metrics, the OpenAPI document and its HTML reference page."""

from __future__ import annotations

import asyncio
import logging
from typing import Any

from litestar import MediaType, Request, get
from litestar.types import ASGIApp

from ..codec import JSON_FORMAT
from ..metrics import exposition
from ..openapi import document_bytes
from ..redis_clients import outage, ping_every_primary
from ..reference import reference_page
from ..schemas import Health
from ..state import Answer, authorize_page, reply, services

log = logging.getLogger("mixscore.metrics")


@get("/healthz", sync_to_thread=False)
def healthz() -> ASGIApp:
    return reply(Health(status="ok"), JSON_FORMAT)


@get("/readyz")
async def readyz(request: Request[Any, Any, Any]) -> ASGIApp:
    found = services(request)
    try:
        await ping_every_primary(found.redis, found.settings.ready_timeout_s)
    except Exception as error:  # any failure to answer in time means not ready
        detail = f"Redis did not answer a ping ({type(error).__name__})"
        return reply(Health(status="unavailable", detail=detail), JSON_FORMAT, status=503)
    return reply(Health(status="ok"), JSON_FORMAT)


@get("/metrics")
async def metrics(request: Request[Any, Any, Any]) -> ASGIApp:
    found = services(request)
    if found.settings.metrics_access == "key":
        await authorize_page(request, "metrics")
    try:  # the drift statistic of every version, from the windows all processes share
        await asyncio.wait_for(found.drift.refresh(), found.settings.ready_timeout_s)
    except Exception as error:  # the other metrics still answer; the gauges keep values
        if not (isinstance(error, TimeoutError) or outage(error)):
            raise
        log.warning("drift statistic not refreshed: %s", error)
    body, content_type = exposition()
    return Answer(body, content_type)


@get("/openapi.json", sync_to_thread=False)
def openapi() -> ASGIApp:
    return Answer(document_bytes(), MediaType.JSON)


@get("/docs", sync_to_thread=False)
def docs() -> ASGIApp:
    return Answer(reference_page(), "text/html; charset=utf-8")


ROUTES = [healthz, readyz, metrics, openapi, docs]
