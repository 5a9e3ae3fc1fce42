"""The point endpoints, answered in front of Litestar's router.

POST /v1/models/{name}/{log-density,responsibilities,conditional} is what clients
call per point. Litestar builds a Request, a signature model and a Response for
every call: about 14 µs here, all that /healthz costs in-process and more than
scoring a point (loadtests/bench_http.py). These paths go straight to
``scoring.score_points`` instead. Their errors are the problem bodies the app's
exception handlers write; every other path goes on to the router.
"""

from __future__ import annotations

import logging
from urllib.parse import parse_qs

from litestar.types import ASGIApp, Receive, Scope, Send

from .errors import INTERNAL_PROBLEM, ServiceError, framework_problem
from .routes.scoring import POINT_ENDPOINTS, score_points
from .state import problem_answer

log = logging.getLogger("mixscore")

PREFIX = "/v1/models/"
#: Route templates by endpoint, as the latency histogram and the access log name them.
TEMPLATES = {endpoint: f"{PREFIX}{{name}}/{endpoint}" for endpoint in POINT_ENDPOINTS}
ALLOW = "OPTIONS, POST"


def point_lane(router: ASGIApp) -> ASGIApp:
    async def lane(scope: Scope, receive: Receive, send: Send) -> None:
        path = scope["path"]
        if scope["type"] == "http" and path.startswith(PREFIX):
            name, _, endpoint = path[len(PREFIX):].rstrip("/").partition("/")
            if endpoint in TEMPLATES:
                scope["path_template"] = TEMPLATES[endpoint]
                answer = await _answer(str(scope.get("method")), scope, receive, name, endpoint)
                await answer(scope, receive, send)
                return
        await router(scope, receive, send)

    return lane


async def _answer(method: str, scope: Scope, receive: Receive, name: str,
                  endpoint: str) -> ASGIApp:
    if method == "OPTIONS":
        return _allow
    if method != "POST":
        return problem_answer(framework_problem(405, "Method Not Allowed"), {"Allow": ALLOW})
    try:
        return await score_points(scope["app"].state.services, scope, receive, name, endpoint,
                                  _query_value(scope, "version"))
    except ServiceError as error:
        return problem_answer(error.problem(), error.headers)
    except Exception:
        log.exception("unexpected error on %s %s", method, scope["path"])
        return problem_answer(INTERNAL_PROBLEM)


async def _allow(scope: Scope, receive: Receive, send: Send) -> None:
    """204 with the methods of the path, and no body headers (RFC 9110, 8.6)."""
    await send({"type": "http.response.start", "status": 204,
                "headers": [(b"allow", ALLOW.encode())]})
    await send({"type": "http.response.body", "body": b"", "more_body": False})


def _query_value(scope: Scope, name: str) -> str | None:
    """The first value of a query parameter, blank values kept (as Litestar reads them)."""
    raw: bytes = scope["query_string"]
    if not raw:
        return None
    return parse_qs(raw.decode("latin-1"), keep_blank_values=True).get(name, [None])[0]
