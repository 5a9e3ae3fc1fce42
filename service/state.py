"""What every handler needs, built once per worker by the app's lifespan."""

from __future__ import annotations

from dataclasses import dataclass
from typing import Any

import msgspec
import redis.asyncio as aioredis
from litestar import Request, Response

from .auth import KeyRing
from .cache import ModelCache
from .codec import Format, encode, request_format, response_format
from .settings import Settings
from .store import ModelStore


@dataclass
class Services:
    settings: Settings
    redis: aioredis.Redis
    store: ModelStore
    cache: ModelCache
    keys: KeyRing


def services(request: Request[Any, Any, Any]) -> Services:
    return request.app.state.services  # type: ignore[no-any-return]


def authorize(request: Request[Any, Any, Any], scope: str) -> Services:
    """The services, once the request's API key is checked for ``scope``."""
    found = services(request)
    found.keys.check(request.headers.get("authorization"), scope)
    return found


def formats(request: Request[Any, Any, Any]) -> tuple[Format, Format]:
    """(format of the body, format of the answer)."""
    body = request_format(request.headers.get("content-type"))
    return body, response_format(request.headers.get("accept"), body)


def reply(value: msgspec.Struct, fmt: Format, status: int = 200,
          headers: dict[str, str] | None = None) -> Response[bytes]:
    return Response(content=encode(value, fmt), media_type=fmt.media_type, status_code=status,
                    headers=headers)
