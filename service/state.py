"""What every handler needs, built once per worker by the app's lifespan."""

from __future__ import annotations

from dataclasses import dataclass
from typing import Any, TypeVar

import msgspec
import redis.asyncio as aioredis
from litestar import Request
from litestar.types import Receive, Scope, Send

from .auth import KeyRing
from .cache import ModelCache
from .codec import Format, decode, encode, request_format, response_format
from .errors import TooLarge
from .ratelimit import RateLimiter
from .settings import Settings
from .store import ModelStore

T = TypeVar("T")


@dataclass
class Services:
    settings: Settings
    redis: aioredis.Redis
    store: ModelStore
    cache: ModelCache
    keys: KeyRing
    limiter: RateLimiter


def services(request: Request[Any, Any, Any]) -> Services:
    found: Services = request.app.state.services
    return found


def _headers(request: Request[Any, Any, Any]) -> tuple[str | None, str | None, str | None]:
    """Content-Type, Accept and Authorization in one pass over the raw headers (building
    Litestar's header objects cost more than scoring one point)."""
    content_type = accept = authorization = None
    for name, value in request.scope["headers"]:
        if name == b"content-type":
            content_type = value.decode("latin-1")
        elif name == b"accept":
            accept = value.decode("latin-1")
        elif name == b"authorization":
            authorization = value.decode("latin-1")
    return content_type, accept, authorization


async def authorize(request: Request[Any, Any, Any],
                    scope: str) -> tuple[Services, Format, Format]:
    """The services and the (body, answer) formats, once the API key is checked for
    ``scope`` and counted against its rate limit."""
    content_type, accept, authorization = _headers(request)
    found = await _admitted(request, scope, authorization)
    body = request_format(content_type)
    return found, body, response_format(accept, body)


async def authorize_page(request: Request[Any, Any, Any], scope: str) -> Services:
    """The services, once the key is checked and counted, for an answer that is HTML
    whatever the Accept header says."""
    return await _admitted(request, scope, _headers(request)[2])


async def _admitted(request: Request[Any, Any, Any], scope: str,
                    authorization: str | None) -> Services:
    found = services(request)
    key_id = found.keys.check(authorization, scope)
    if key_id is not None:
        await found.limiter.admit(key_id)
    return found


class Answer:
    """A complete response as a bare ASGI app: Litestar passes it through untouched,
    where its own Response costs more than scoring a point."""

    __slots__ = ("body", "headers", "status")

    def __init__(self, body: bytes, media_type: str, status: int = 200,
                 headers: dict[str, str] | None = None) -> None:
        self.body = body
        self.status = status
        self.headers = [(b"content-type", media_type.encode("latin-1")),
                        (b"content-length", str(len(body)).encode("latin-1"))]
        for name, value in (headers or {}).items():
            self.headers.append((name.lower().encode("latin-1"), value.encode("latin-1")))

    async def __call__(self, scope: Scope, receive: Receive, send: Send) -> None:
        await send({"type": "http.response.start", "status": self.status,
                    "headers": self.headers})
        await send({"type": "http.response.body", "body": self.body, "more_body": False})


def reply(value: msgspec.Struct, fmt: Format, status: int = 200,
          headers: dict[str, str] | None = None) -> Answer:
    return Answer(encode(value, fmt), fmt.media_type, status, headers)


async def read_body(request: Request[Any, Any, Any], limit: int) -> bytes:
    """The whole body, at most ``limit`` bytes (413 beyond), read from the ASGI channel."""
    chunks: list[bytes] = []
    size = 0
    while True:
        message = await request.receive()
        chunk: bytes = message.get("body", b"")  # type: ignore[assignment]
        size += len(chunk)
        if size > limit:
            raise TooLarge(f"the body exceeds the limit of {limit} bytes (MIXSCORE_MAX_BODY_BYTES)")
        chunks.append(chunk)
        if not message.get("more_body", False):
            return chunks[0] if len(chunks) == 1 else b"".join(chunks)


async def body_as(request: Request[Any, Any, Any], kind: type[T], found: Services,
                  fmt: Format) -> T:
    """The request body decoded and checked as ``kind``."""
    return decode(await read_body(request, found.settings.max_body_bytes), kind, fmt)
