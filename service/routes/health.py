"""Liveness, readiness, metrics, the OpenAPI document and its HTML reference page."""

from __future__ import annotations

from typing import Any

from litestar import MediaType, Request, get
from litestar.types import ASGIApp

from ..codec import JSON_FORMAT
from ..metrics import exposition
from ..openapi import document_bytes
from ..redis_clients import ping_every_primary
from ..reference import reference_page
from ..schemas import Health
from ..state import Answer, authorize_page, reply, services


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
    body, content_type = exposition()
    return Answer(body, content_type)


@get("/openapi.json", sync_to_thread=False)
def openapi() -> ASGIApp:
    return Answer(document_bytes(), MediaType.JSON)


@get("/docs", sync_to_thread=False)
def docs() -> ASGIApp:
    return Answer(reference_page(), "text/html; charset=utf-8")


ROUTES = [healthz, readyz, metrics, openapi, docs]
