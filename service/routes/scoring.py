"""Scoring: log-density, responsibilities, explanations, samples and conditional means.

The four endpoints that score points are answered by ``service.lane`` in front of
Litestar's router (``score_points``); samples is an ordinary route.

The hot path touches Redis only when the model's cached pointer is older than
``MIXSCORE_STAMP_CHECK_S``. Each answer is computed and encoded together, on the
event loop when ``workload`` estimates it cheap, else on a thread.
"""

from __future__ import annotations

import secrets
from collections.abc import Callable
from typing import Any

import msgspec
import numpy as np
from litestar import Request, post
from litestar.types import ASGIApp, Receive, Scope

from ..cache import Loaded
from ..codec import Format, as_wire, decode, msgpack_points, points_matrix, records_matrix
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
from ..state import Services, admit, authorize, body_as, read_body, reply
from ..store import check_model_name
from ..workload import DECODE_S, estimated_s, incomplete_rows, run
from .models import core_error


def _version(raw: str | None) -> int | None:
    if raw is None:
        return None
    if not raw.isdigit() or int(raw) < 1:
        raise InvalidInput.field("version", f"must be a positive integer; got {raw!r}")
    return int(raw)


def _log_density(loaded: Loaded, X: np.ndarray, packed: bool) -> LogDensityResponse:
    values = loaded.mixture.log_density(X)
    tails = loaded.tails
    if tails is None:  # an import: no tail fractions
        return LogDensityResponse(model=loaded.name, version=loaded.version,
                                  log_density=as_wire(values, packed), tail_fraction=None)
    tail = tails(X, values)
    complete = ~np.isnan(X).any(axis=1)
    DRIFT.observe(loaded.name, loaded.version, values[complete], tails.quantiles.mean,
                  tail[complete])
    return LogDensityResponse(
        model=loaded.name, version=loaded.version, log_density=as_wire(values, packed),
        tail_fraction=as_wire(tail, packed))


def _responsibilities(loaded: Loaded, X: np.ndarray, packed: bool) -> ResponsibilitiesResponse:
    resp = loaded.mixture.responsibilities(X)
    return ResponsibilitiesResponse(
        model=loaded.name, version=loaded.version, responsibilities=as_wire(resp, packed),
        labels=as_wire(np.argmax(resp, axis=1), packed))


def _conditional(loaded: Loaded, X: np.ndarray, packed: bool) -> ConditionalResponse:
    return ConditionalResponse(model=loaded.name, version=loaded.version,
                               points=as_wire(loaded.mixture.condition(X), packed))


def _explanations(loaded: Loaded, X: np.ndarray, packed: bool) -> ExplanationsResponse:
    found = loaded.mixture.explain(X)
    return ExplanationsResponse(
        model=loaded.name, version=loaded.version, feature_names=loaded.feature_names,
        conditional_log_density=as_wire(found.conditional_log_density, packed),
        conditional_tail=as_wire(found.conditional_tail, packed),
        conditional_mean=as_wire(found.conditional_mean, packed),
        conditional_sd=as_wire(found.conditional_sd, packed),
        most_unusual=as_wire(found.most_unusual, packed))


#: POST /v1/models/{name}/<endpoint>: the endpoints that score points, served by
#: ``service.lane`` in front of the router.
POINT_ENDPOINTS: dict[str, Callable[[Loaded, np.ndarray, bool], msgspec.Struct]] = {
    "log-density": _log_density,
    "responsibilities": _responsibilities,
    "conditional": _conditional,
    "explanations": _explanations,
}


async def score_points(found: Services, scope: Scope, receive: Receive, name: str,
                       endpoint: str, version: str | None) -> ASGIApp:
    """The answer of POST /v1/models/{name}/{endpoint}: key, body, model, points, maths."""
    body_format, answer_format = await admit(found, scope, "score")
    check_model_name(name)
    body = await read_body(receive, found.settings.max_body_bytes)
    # Decoding a large body, and making an array of its rows, is work like any other.
    reading_s = len(body) * DECODE_S
    points, records = await run(reading_s, lambda: _decoded(body, body_format))
    loaded = await found.cache.get(name, _version(version))
    limit = found.settings.max_points
    if records is not None:
        X = await run(reading_s, lambda: records_matrix(records, loaded.feature_names, name,
                                                        limit))
    else:
        X = await run(reading_s, lambda: points_matrix(points, loaded.mixture.dimension,
                                                       limit))
    labelled(POINTS_SCORED, name, endpoint).inc(X.shape[0])
    packed = isinstance(points, PackedArray) and answer_format.msgpack
    n, d = X.shape
    patterns = incomplete_rows(X)
    # A missing pattern's tail fractions score training rows under its marginal.
    tail_rows = (loaded.tails.rows_per_pattern * patterns
                 if endpoint == "log-density" and loaded.tails is not None else 0)
    seconds = estimated_s(endpoint, loaded.mixture, n + tail_rows, patterns,
                          _answer_values(endpoint, n, d, loaded.mixture.components, packed))

    def answer() -> ASGIApp:
        try:
            return reply(POINT_ENDPOINTS[endpoint](loaded, X, packed), answer_format)
        except ValueError as error:
            raise core_error(error) from None

    return await run(seconds, answer)


def _decoded(body: bytes, body_format: Format) -> tuple[Points | np.ndarray, Any]:
    """The points (rows, packed, or read straight from MessagePack) or the records."""
    points: Points | np.ndarray | None = (
        msgpack_points(body) if body_format.msgpack else None)
    if points is not None:
        return points, None
    request = decode(body, PointsRequest, body_format)
    if request.points is not None and request.records is None:
        return request.points, None
    if request.records is not None and request.points is None:
        return [], request.records
    raise InvalidInput.field("points", "give points (rows in the model's feature order) or "
                             "records (objects keyed by feature name), one of the two")


def _answer_values(endpoint: str, rows: int, dimension: int, components: int,
                   packed: bool) -> int:
    """Numbers of the answer encoded one by one (packed arrays are copied whole)."""
    if packed:
        return 0
    per_row = {"log-density": 2, "responsibilities": components + 1,
               "conditional": dimension, "explanations": 4 * dimension + 1}[endpoint]
    return rows * per_row


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
    packed = answer_format.msgpack and body.packed
    d = loaded.mixture.dimension

    def answer() -> ASGIApp:
        points, components = loaded.mixture.sample(body.count, seed=seed)
        return reply(SamplesResponse(model=name, version=loaded.version, seed=seed,
                                     points=as_wire(points, packed),
                                     components=as_wire(components, packed)), answer_format)

    values = 0 if packed else body.count * (d + 1)
    return await run(estimated_s("samples", loaded.mixture, body.count, 0, values), answer)


ROUTES = [samples]
