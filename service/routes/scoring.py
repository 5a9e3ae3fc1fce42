"""Scoring: log-density, responsibilities, explanations, samples and conditional means.

The four endpoints that score points are answered by ``service.lane`` in front of
Litestar's router (``score_points``); samples is an ordinary route.

The hot path touches Redis only when the model's cached pointer is older than
``MIXSCORE_STAMP_CHECK_S``; batches small enough to score in well under a
millisecond run on the event loop, larger ones in a worker thread.
"""

from __future__ import annotations

import asyncio
import secrets
from collections.abc import Awaitable, Callable
from typing import Any, TypeVar

import msgspec
import numpy as np
from litestar import Request, post
from litestar.types import ASGIApp, Receive, Scope

from core import TRAINING_SAMPLE_ROWS

from ..cache import Loaded
from ..codec import as_wire, decode, msgpack_points, points_matrix, records_matrix
from ..errors import InvalidInput, TooLarge
from ..metrics import DRIFT, POINTS_SCORED, labelled
from ..schemas import (
    ConditionalResponse,
    ExplanationsResponse,
    LogDensityResponse,
    PackedArray,
    Points,
    PointsRequest,
    ResponsibilitiesResponse,
    SamplesRequest,
    SamplesResponse,
)
from ..state import Answer, Services, admit, authorize, body_as, read_body, reply
from ..store import check_model_name
from .models import core_error

#: Batches up to this many points are scored on the event loop (about 1 ms of maths).
INLINE_POINTS = 4096
#: An explanation costs about this many log-densities (loadtests/bench_core.py).
EXPLANATION_COST = 5
R = TypeVar("R")


async def _compute(rows: int, work: Callable[[], R]) -> R:
    """``rows``: the batch's cost in log-densities of one point."""
    try:
        if rows <= INLINE_POINTS:
            return work()
        return await asyncio.to_thread(work)
    except ValueError as error:
        raise core_error(error) from None


def _version(raw: str | None) -> int | None:
    if raw is None:
        return None
    if not raw.isdigit() or int(raw) < 1:
        raise InvalidInput.field("version", f"must be a positive integer; got {raw!r}")
    return int(raw)


async def _log_density(loaded: Loaded, X: np.ndarray, packed: bool) -> LogDensityResponse:
    tails = loaded.tails
    if tails is None:  # an import: no tail fractions
        values = await _compute(len(X), lambda: loaded.mixture.log_density(X))
        return LogDensityResponse(model=loaded.name, version=loaded.version,
                                  log_density=as_wire(values, packed), tail_fraction=None)

    def work() -> tuple[np.ndarray, np.ndarray]:
        values = loaded.mixture.log_density(X)
        return values, tails(X, values)

    complete = ~np.isnan(X).any(axis=1)
    # A missing pattern's first use computes its training quantiles: off the event loop.
    values, tail = await _compute(
        len(X) + (0 if complete.all() else TRAINING_SAMPLE_ROWS), work)
    DRIFT.observe(loaded.name, loaded.version, values[complete], tails.quantiles.mean,
                  tail[complete])
    return LogDensityResponse(
        model=loaded.name, version=loaded.version, log_density=as_wire(values, packed),
        tail_fraction=as_wire(tail, packed))


async def _responsibilities(loaded: Loaded, X: np.ndarray,
                            packed: bool) -> ResponsibilitiesResponse:
    resp = await _compute(len(X), lambda: loaded.mixture.responsibilities(X))
    return ResponsibilitiesResponse(
        model=loaded.name, version=loaded.version, responsibilities=as_wire(resp, packed),
        labels=as_wire(np.argmax(resp, axis=1), packed))


async def _conditional(loaded: Loaded, X: np.ndarray, packed: bool) -> ConditionalResponse:
    filled = await _compute(len(X), lambda: loaded.mixture.condition(X))
    return ConditionalResponse(model=loaded.name, version=loaded.version,
                               points=as_wire(filled, packed))


async def _explanations(loaded: Loaded, X: np.ndarray, packed: bool) -> ExplanationsResponse:
    found = await _compute(len(X) * EXPLANATION_COST, lambda: loaded.mixture.explain(X))
    return ExplanationsResponse(
        model=loaded.name, version=loaded.version, feature_names=loaded.feature_names,
        conditional_log_density=as_wire(found.conditional_log_density, packed),
        conditional_tail=as_wire(found.conditional_tail, packed),
        conditional_mean=as_wire(found.conditional_mean, packed),
        conditional_sd=as_wire(found.conditional_sd, packed),
        most_unusual=as_wire(found.most_unusual, packed))


#: POST /v1/models/{name}/<endpoint>: the endpoints that score points, served by
#: ``service.lane`` in front of the router.
POINT_ENDPOINTS: dict[str, Callable[[Loaded, np.ndarray, bool], Awaitable[msgspec.Struct]]] = {
    "log-density": _log_density,
    "responsibilities": _responsibilities,
    "conditional": _conditional,
    "explanations": _explanations,
}


async def score_points(found: Services, scope: Scope, receive: Receive, name: str,
                       endpoint: str, version: str | None) -> Answer:
    """The answer of POST /v1/models/{name}/{endpoint}: key, body, model, points, maths."""
    body_format, answer_format = await admit(found, scope, "score")
    check_model_name(name)
    body = await read_body(receive, found.settings.max_body_bytes)
    points: Points | np.ndarray | None = (
        msgpack_points(body) if body_format.msgpack else None)
    records = None
    if points is None:
        request = decode(body, PointsRequest, body_format)
        points, records = request.points, request.records
        if (points is None) == (records is None):
            raise InvalidInput.field("points", "give points (rows in the model's feature "
                                     "order) or records (objects keyed by feature name), "
                                     "one of the two")
    loaded = await found.cache.get(name, _version(version))
    limit = found.settings.max_points
    if records is not None:
        X = records_matrix(records, loaded.feature_names, name, limit)
    else:
        assert points is not None
        X = points_matrix(points, loaded.mixture.dimension, limit)
    labelled(POINTS_SCORED, name, endpoint).inc(X.shape[0])
    packed = isinstance(points, PackedArray) and answer_format.msgpack
    return reply(await POINT_ENDPOINTS[endpoint](loaded, X, packed), answer_format)


@post("/v1/models/{name:str}/samples", status_code=200)
async def samples(request: Request[Any, Any, Any]) -> ASGIApp:
    found, body_format, answer_format = await authorize(request, "score")
    name = request.path_params["name"]
    body = await body_as(request, SamplesRequest, found, body_format)
    limit = found.settings.max_samples
    if body.count > limit:
        raise TooLarge(f"count {body.count} exceeds the limit of {limit} samples per request "
                       "(MIXSCORE_MAX_SAMPLES)")
    if body.count < 1:
        raise InvalidInput.field("count", f"must be at least 1; got {body.count}")
    if body.seed is not None and body.seed < 0:
        raise InvalidInput.field("seed", f"must be a non-negative integer; got {body.seed}")
    loaded = await found.cache.get(check_model_name(name),
                                   _version(request.query_params.get("version")))
    seed = secrets.randbits(63) if body.seed is None else body.seed
    points, components = await _compute(body.count, lambda: loaded.mixture.sample(body.count,
                                                                                  seed=seed))
    packed = answer_format.msgpack and body.packed
    return reply(SamplesResponse(model=name, version=loaded.version, seed=seed,
                                 points=as_wire(points, packed),
                                 components=as_wire(components, packed)), answer_format)


ROUTES = [samples]
