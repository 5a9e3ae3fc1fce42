"""A version's fit report: an HTML page with its summary and plots."""

from __future__ import annotations

import asyncio
from typing import Any

from litestar import Request, get
from litestar.types import ASGIApp

from ..errors import InvalidInput
from ..report import default_pair, feature_names, render
from ..state import Answer, authorize_page
from ..store import check_model_name

HTML = "text/html; charset=utf-8"


def chosen_feature(request: Request[Any, Any, Any], axis: str, names: list[str],
                   default: int) -> int:
    """A feature by name or index from the ``x`` or ``y`` query parameter."""
    given = request.query_params.get(axis)
    if given is None:
        return default
    if given in names:
        return names.index(given)
    if given.isdigit() and int(given) < len(names):
        return int(given)
    raise InvalidInput.field(axis, f"must be a feature name or an index below {len(names)}; "
                                   f"the features are {', '.join(names)}")


@get("/v1/models/{name:str}/versions/{version:int}/report")
async def version_report(request: Request[Any, Any, Any]) -> ASGIApp:
    found = await authorize_page(request, "score")
    name, version = request.path_params["name"], request.path_params["version"]
    record = await found.store.load(check_model_name(name), version)
    serving, _ = await found.store.pointer(name)
    names = feature_names(record)
    pair = None
    if len(names) > 1:
        x, y = default_pair(record.mixture)
        pair = (chosen_feature(request, "x", names, x), chosen_feature(request, "y", names, y))
        if pair[0] == pair[1]:
            raise InvalidInput.field("y", f"must differ from x ({names[pair[0]]})")
    # Drawing takes a few hundred milliseconds: off the event loop.
    page = await asyncio.to_thread(render, name, version, record, serving == version, pair)
    return Answer(page.encode(), HTML)


ROUTES = [version_report]
