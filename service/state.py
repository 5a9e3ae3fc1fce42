"""What every handler needs, built once per worker by the app's lifespan."""

from __future__ import annotations

import hashlib
import hmac
import secrets
from dataclasses import dataclass
from typing import Any, TypeVar, cast

import msgspec
import redis.asyncio as aioredis
from litestar import Request
from litestar.types import Receive, Scope, Send

from .auth import ApiKey, KeyRing
from .bulk import BulkAnswer, split
from .cache import ModelCache
from .codec import JSON_FORMAT, Format, decode, encode, request_format, response_format
from .drift import SharedWindows
from .errors import PROBLEM_MEDIA_TYPE, Problem, TooLarge
from .ratelimit import RateLimiter
from .settings import Settings
from .store import ModelStore, RequestKey

T = TypeVar("T")
#: Where ``admit`` leaves the caller's API key (None while the service is open), for
#: the handler: an extension of the ASGI scope.
CALLER = "mixscore.caller"
#: Where ``body_as`` leaves the raw body of a request with an Idempotency-Key, for the
#: request's fingerprint (``request_key``).
RAW_BODY = "mixscore.body"


@dataclass
class Services:
    settings: Settings
    redis: aioredis.Redis
    store: ModelStore
    cache: ModelCache
    keys: KeyRing
    limiter: RateLimiter
    drift: SharedWindows


def services(request: Request[Any, Any, Any]) -> Services:
    found: Services = request.app.state.services
    return found


def _headers(scope: Scope) -> tuple[str | None, str | None, str | None]:
    """Content-Type, Accept and Authorization in one pass over the raw headers (building
    Litestar's header objects cost more than scoring one point)."""
    content_type = accept = authorization = None
    for name, value in scope["headers"]:
        if name == b"content-type":
            content_type = value.decode("latin-1")
        elif name == b"accept":
            accept = value.decode("latin-1")
        elif name == b"authorization":
            authorization = value.decode("latin-1")
    return content_type, accept, authorization


async def admit(found: Services, scope: Scope, needed: str) -> tuple[Format, Format]:
    """The (body, answer) formats of a request, once its API key is checked for the
    ``needed`` scope and counted against its rate limit."""
    content_type, accept, authorization = _headers(scope)
    await _admitted(found, needed, authorization, scope)
    body = request_format(content_type)
    return body, response_format(accept, body)


async def authorize(request: Request[Any, Any, Any],
                    scope: str) -> tuple[Services, Format, Format]:
    """``admit`` for a Litestar handler, with the services."""
    found = services(request)
    return found, *await admit(found, request.scope, scope)


async def authorize_page(request: Request[Any, Any, Any], scope: str) -> Services:
    """The services, once the key is checked and counted, for an answer of its own
    media type (HTML, the metrics' text) whatever the Accept header says."""
    found = services(request)
    await _admitted(found, scope, _headers(request.scope)[2], request.scope)
    return found


async def _admitted(found: Services, needed: str, authorization: str | None,
                    scope: Scope) -> None:
    key = found.keys.check(authorization, needed)
    cast(dict[str, Any], scope)[CALLER] = key
    if key is not None:
        await found.limiter.admit(key.id)


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


def request_key(request: Request[Any, Any, Any]) -> RequestKey:
    """The request's Idempotency-Key, scoped to its caller and route (``RequestKey``),
    once ``body_as`` has read the body."""
    given = request.headers.get("idempotency-key")
    if not given:
        return RequestKey(secrets.token_hex(32), "", None)
    caller = cast(ApiKey | None, request.scope.get(CALLER))
    route = f"{request.method} {request.url.path}"
    digest = hmac.new(caller.digest if caller else b"", f"{route}\0{given}".encode(),
                      hashlib.sha256).hexdigest()
    fingerprint = hashlib.sha256(cast(bytes, request.scope.get(RAW_BODY, b""))).hexdigest()
    return RequestKey(digest, fingerprint, given)


def problem_answer(problem: Problem, headers: dict[str, str] | None = None) -> Answer:
    """The same body and status the app's exception handlers answer with."""
    return Answer(encode(problem, JSON_FORMAT), PROBLEM_MEDIA_TYPE, problem.status, headers)


def reply(value: msgspec.Struct, fmt: Format, status: int = 200,
          headers: dict[str, str] | None = None) -> Answer | BulkAnswer:
    """The encoded answer; streamed when it carries bulk arrays."""
    pieces = split(value, fmt.msgpack)
    if len(pieces) == 1:
        return Answer(cast(bytes, pieces[0]), fmt.media_type, status, headers)
    extra = [(name.lower().encode("latin-1"), text.encode("latin-1"))
             for name, text in (headers or {}).items()]
    return BulkAnswer(pieces, fmt.msgpack, fmt.media_type, status, extra)


async def read_body(receive: Receive, limit: int) -> bytes:
    """The whole body, at most ``limit`` bytes (413 beyond), read from the ASGI channel."""
    chunks: list[bytes] = []
    size = 0
    while True:
        message = await receive()
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
    raw = await read_body(request.receive, found.settings.max_body_bytes)
    if any(name == b"idempotency-key" for name, _ in request.scope["headers"]):
        cast(dict[str, Any], request.scope)[RAW_BODY] = raw
    return decode(raw, kind, fmt)
