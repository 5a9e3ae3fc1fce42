"""Liveness, readiness, metrics and the OpenAPI document."""

from __future__ import annotations

import asyncio
from typing import Any

from litestar import MediaType, Request, Response, get

from ..codec import JSON_FORMAT
from ..metrics import exposition
from ..openapi import document_bytes
from ..schemas import Health
from ..state import reply, services


@get("/healthz", sync_to_thread=False)
def healthz() -> Response[bytes]:
    return reply(Health(status="ok"), JSON_FORMAT)


@get("/readyz")
async def readyz(request: Request[Any, Any, Any]) -> Response[bytes]:
    found = services(request)
    try:
        await asyncio.wait_for(found.redis.ping(), found.settings.ready_timeout_s)
    except Exception as error:  # any failure to answer in time means not ready
        detail = f"Redis did not answer a ping ({type(error).__name__})"
        return reply(Health(status="unavailable", detail=detail), JSON_FORMAT, status=503)
    return reply(Health(status="ok"), JSON_FORMAT)


@get("/metrics", sync_to_thread=False)
def metrics() -> Response[bytes]:
    body, content_type = exposition()
    return Response(content=body, media_type=content_type)


@get("/openapi.json", sync_to_thread=False)
def openapi() -> Response[bytes]:
    return Response(content=document_bytes(), media_type=MediaType.JSON)


ROUTES = [healthz, readyz, metrics, openapi]
