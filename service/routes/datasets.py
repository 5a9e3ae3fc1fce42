"""Datasets: create, append chunks, read, delete."""

from __future__ import annotations

from typing import Any, cast

from litestar import Request, delete, get, post
from litestar.types import ASGIApp

from ..codec import points_matrix
from ..datasets import DatasetStore
from ..errors import InvalidInput, TooLarge, dimension_over
from ..schemas import ChunkRequest, DatasetRequest
from ..state import Services, authorize, body_as, reply, request_key


def datasets_of(found: Services) -> DatasetStore:
    return DatasetStore(found.redis, found.store.keys, found.store.writer,
                        found.settings.dataset_ttl_s, found.settings.dataset_max_bytes)


@post("/v1/datasets", status_code=201)
async def create_dataset(request: Request[Any, Any, Any]) -> ASGIApp:
    found, body_format, answer_format = await authorize(request, "fit")
    body = await body_as(request, DatasetRequest, found, body_format)
    if not body.dimension >= 1:
        raise InvalidInput.field("dimension", "must be at least 1")
    if body.dimension > found.settings.max_dimension:
        raise TooLarge(dimension_over(body.dimension, found.settings.max_dimension))
    if body.feature_names is not None and len(body.feature_names) != body.dimension:
        raise InvalidInput.field("feature_names", f"has {len(body.feature_names)} names for "
                                                  f"dimension {body.dimension}")
    # The id comes from the request key: a repeated Idempotency-Key names the same one.
    dataset = await datasets_of(found).create(request_key(request), body.dimension,
                                              body.feature_names)
    return reply(dataset, answer_format, status=201,
                 headers={"Location": f"/v1/datasets/{dataset.id}"})


@post("/v1/datasets/{dataset_id:str}/chunks", status_code=200)
async def append_chunk(request: Request[Any, Any, Any]) -> ASGIApp:
    found, body_format, answer_format = await authorize(request, "fit")
    store = datasets_of(found)
    dataset = await store.get(request.path_params["dataset_id"])
    body = await body_as(request, ChunkRequest, found, body_format)
    X = points_matrix(cast(Any, body.points), dataset.dimension, max_points=2**62)
    return reply(await store.append(dataset.id, X, request_key(request)), answer_format)


@get("/v1/datasets/{dataset_id:str}")
async def read_dataset(request: Request[Any, Any, Any]) -> ASGIApp:
    found, _, answer_format = await authorize(request, "fit")
    return reply(await datasets_of(found).get(request.path_params["dataset_id"]), answer_format)


@delete("/v1/datasets/{dataset_id:str}", status_code=200)
async def delete_dataset(request: Request[Any, Any, Any]) -> ASGIApp:
    found, _, answer_format = await authorize(request, "fit")
    store = datasets_of(found)
    dataset = await store.get(request.path_params["dataset_id"])
    await store.delete(dataset.id)
    return reply(dataset, answer_format)


ROUTES = [create_dataset, append_chunk, read_dataset, delete_dataset]
