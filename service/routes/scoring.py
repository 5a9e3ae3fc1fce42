"""Scoring: log-density, responsibilities, samples and conditional means.

The hot path touches Redis only when the model's cached pointer is older than
``MIXSCORE_STAMP_CHECK_S``; batches small enough to score in well under a
millisecond run on the event loop, larger ones in a worker thread.
"""

from __future__ import annotations

import asyncio
import secrets
from collections.abc import Callable
from typing import Any, TypeVar

import numpy as np
from litestar import Request, post
from litestar.types import ASGIApp

from ..cache import Loaded
from ..codec import Format, as_wire, decode, msgpack_points, points_matrix
from ..errors import InvalidInput, TooLarge
from ..metrics import DRIFT, POINTS_SCORED, labelled
from ..schemas import (
    ConditionalResponse,
    LogDensityResponse,
    PackedArray,
    PointsRequest,
    ResponsibilitiesResponse,
    SamplesRequest,
    SamplesResponse,
)
from ..state import Services, authorize, body_as, read_body, reply
from ..store import check_model_name
from .models import core_error

#: Batches up to this many points are scored on the event loop (about 1 ms of maths).
INLINE_POINTS = 4096
R = TypeVar("R")


async def _compute(rows: int, work: Callable[[], R]) -> R:
    try:
        if rows <= INLINE_POINTS:
            return work()
        return await asyncio.to_thread(work)
    except ValueError as error:
        raise core_error(error) from None


def _version(request: Request[Any, Any, Any]) -> int | None:
    raw = request.query_params.get("version")
    if raw is None:
        return None
    if not raw.isdigit() or int(raw) < 1:
        raise InvalidInput.field("version", f"must be a positive integer; got {raw!r}")
    return int(raw)


async def _points(request: Request[Any, Any, Any], endpoint: str
                  ) -> tuple[Services, Loaded, np.ndarray, bool, Format]:
    """Checked key, model, points; whether they came packed; the format to answer in."""
    found, body_format, answer_format = await authorize(request, "score")
    name = check_model_name(request.path_params["name"])
    raw = await read_body(request, found.settings.max_body_bytes)
    fast = msgpack_points(raw) if body_format.msgpack else None
    points = fast if fast is not None else decode(raw, PointsRequest, body_format).points
    loaded = await found.cache.get(name, _version(request))
    X = points_matrix(points, loaded.mixture.dimension, found.settings.max_points)
    labelled(POINTS_SCORED, name, endpoint).inc(X.shape[0])
    packed = isinstance(points, PackedArray) and answer_format.msgpack
    return found, loaded, X, packed, answer_format


@post("/v1/models/{name:str}/log-density", status_code=200)
async def log_density(request: Request[Any, Any, Any]) -> ASGIApp:
    _, loaded, X, packed, fmt = await _points(request, "log-density")
    values = await _compute(len(X), lambda: loaded.mixture.log_density(X))
    tail = None
    if loaded.quantiles is not None:
        tail = loaded.quantiles.tail_fraction(values)
        # A marginal log-density is not comparable with the training quantiles, which are
        # of complete rows: no tail fraction for rows with missing features, and no drift.
        incomplete = np.isnan(X).any(axis=1)
        tail[incomplete] = np.nan
        DRIFT.observe(loaded.name, loaded.version, values[~incomplete], loaded.quantiles.mean)
    return reply(LogDensityResponse(
        model=loaded.name, version=loaded.version, log_density=as_wire(values, packed),
        tail_fraction=None if tail is None else as_wire(tail, packed)), fmt)


@post("/v1/models/{name:str}/responsibilities", status_code=200)
async def responsibilities(request: Request[Any, Any, Any]) -> ASGIApp:
    _, loaded, X, packed, fmt = await _points(request, "responsibilities")
    resp = await _compute(len(X), lambda: loaded.mixture.responsibilities(X))
    return reply(ResponsibilitiesResponse(
        model=loaded.name, version=loaded.version, responsibilities=as_wire(resp, packed),
        labels=as_wire(np.argmax(resp, axis=1), packed)), fmt)


@post("/v1/models/{name:str}/conditional", status_code=200)
async def conditional(request: Request[Any, Any, Any]) -> ASGIApp:
    _, loaded, X, packed, fmt = await _points(request, "conditional")
    filled = await _compute(len(X), lambda: loaded.mixture.condition(X))
    return reply(ConditionalResponse(model=loaded.name, version=loaded.version,
                                     points=as_wire(filled, packed)), fmt)


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
    loaded = await found.cache.get(check_model_name(name), _version(request))
    seed = secrets.randbits(63) if body.seed is None else body.seed
    points, components = await _compute(body.count, lambda: loaded.mixture.sample(body.count,
                                                                                  seed=seed))
    packed = answer_format.msgpack and body.packed
    return reply(SamplesResponse(model=name, version=loaded.version, seed=seed,
                                 points=as_wire(points, packed),
                                 components=as_wire(components, packed)), answer_format)


ROUTES = [log_density, responsibilities, conditional, samples]
