"""The one ASGI middleware: a request id, the latency histogram and the access log line."""

from __future__ import annotations

import os
import time

from litestar.types import ASGIApp, Message, Receive, Scope, Send

from .logs import ACCESS_LOG, REQUEST_ID
from .metrics import REQUEST_DURATION, labelled

#: A client's X-Request-ID is kept when it is this short and printable; else a new one.
MAX_REQUEST_ID = 128


def request_id(scope: Scope) -> str:
    for name, value in scope["headers"]:
        if name == b"x-request-id":
            text = value.decode("latin-1")
            if 0 < len(text) <= MAX_REQUEST_ID and text.isascii() and text.isprintable():
                return text
            break
    return os.urandom(8).hex()


def request_middleware(app: ASGIApp, allowed: dict[str, str]) -> ASGIApp:
    """Answer with X-Request-ID (the client's or a new one), observe the duration by
    route template, and log one line per request at INFO.

    ``allowed`` maps route templates to their methods: Litestar 2's own answer to
    OPTIONS lists only the first handler registered on a path (litestar#4169)."""

    async def middleware(scope: Scope, receive: Receive, send: Send) -> None:
        if scope["type"] != "http":
            await app(scope, receive, send)
            return
        start = time.perf_counter()
        ident = request_id(scope)
        REQUEST_ID.set(ident)  # each request runs in a task of its own, so a context of its own
        status = 500

        async def send_with_id(message: Message) -> None:
            nonlocal status
            if message["type"] == "http.response.start":
                status = message["status"]
                headers = [*message.get("headers", ()), (b"x-request-id", ident.encode())]
                if scope.get("method") == "OPTIONS" and scope.get("path_template") in allowed:
                    headers = [(name, value) for name, value in headers if name != b"allow"]
                    headers.append((b"allow", allowed[scope["path_template"]].encode()))
                message["headers"] = headers
            await send(message)

        try:
            await app(scope, receive, send_with_id)
        finally:
            duration = time.perf_counter() - start
            route = scope.get("path_template") or "unmatched"
            method = str(scope.get("method", ""))
            labelled(REQUEST_DURATION, route, method, str(status)).observe(duration)
            if ACCESS_LOG.enabled():
                ACCESS_LOG.write(ident, route, method, status, duration)

    return middleware
