"""Training data uploaded in chunks, for data too large for one request.

Chunks are stored as raw little-endian float64 rows in a Redis list; a worker
reads them back one at a time on every EM pass, so its memory is bounded by the
chunk size, the model and the core's reservoir sample, not by the dataset.
"""

from __future__ import annotations

import json
from collections.abc import Iterator
from typing import cast

import numpy as np
import redis.asyncio as aioredis

from .errors import InvalidInput, NotFound, TooLarge, reused_key
from .keys import DatasetKeys, Keys
from .redis_clients import close_sync, sync_client
from .replicas import ReplicatedWriter
from .schemas import Dataset
from .settings import Settings
from .store import RequestKey, redis_errors, script, utc_now

CREATE_DATASET, APPEND_CHUNK = script("create_dataset"), script("append_chunk")


async def dataset_keys(client: aioredis.Redis, keys: Keys, dataset_id: str) -> DatasetKeys:
    """Where a dataset is: under its own hash tag, or under ``{jobs}`` where an earlier
    release put it."""
    legacy = keys.dataset(dataset_id, legacy=True)
    if not await client.exists(keys.dataset(dataset_id).info) and await client.exists(
            legacy.info):
        return legacy
    return keys.dataset(dataset_id)


class DatasetStore:
    def __init__(self, client: aioredis.Redis, keys: Keys, writer: ReplicatedWriter,
                 ttl_s: float, max_bytes: int) -> None:
        self.redis = client
        self.keys = keys
        self.writer = writer
        self.ttl_s = int(ttl_s)
        self.max_bytes = max_bytes

    async def create(self, request: RequestKey, dimension: int,
                     feature_names: list[str] | None) -> Dataset:
        """Create a dataset whose id comes from the ``request`` key; a repeat of the
        request returns the one the first made, another request with its key a 422."""
        dataset_id = request.digest[:24]
        info = self.keys.dataset(dataset_id).info
        fields = {"id": dataset_id, "dimension": dimension, "rows": 0, "bytes": 0, "chunks": 0,
                  "feature_names": json.dumps(feature_names), "created_at": utc_now(),
                  "request": request.fingerprint}
        async with redis_errors():
            reply = await self.writer.write(
                f"dataset {dataset_id}", info, "EVAL", CREATE_DATASET, 1, info, self.ttl_s,
                *(item for pair in fields.items() for item in pair))
        if reply == b"reused" and request.given:
            raise reused_key(request.given)
        return await self.get(dataset_id)

    async def get(self, dataset_id: str) -> Dataset:
        async with redis_errors():
            info = (await dataset_keys(self.redis, self.keys, dataset_id)).info
            fields = cast(dict[bytes, bytes], await self.redis.hgetall(info))
            ttl = await self.redis.ttl(info)
        if not fields:
            raise NotFound(f"dataset {dataset_id!r} does not exist (or expired)")
        text = {key.decode(): value.decode() for key, value in fields.items()}
        return Dataset(id=text["id"], dimension=int(text["dimension"]),
                       feature_names=json.loads(text["feature_names"]), rows=int(text["rows"]),
                       bytes=int(text["bytes"]), chunks=int(text["chunks"]),
                       created_at=text["created_at"], expires_in_s=max(int(ttl), 0))

    async def append(self, dataset_id: str, X: np.ndarray, request: RequestKey) -> Dataset:
        """Append ``X`` once per ``request`` key: a repeat adds nothing and waits for the
        replicas again; another request with the key is a 422."""
        if np.isnan(X).any():
            row, column = (int(i) for i in np.argwhere(np.isnan(X))[0])
            raise InvalidInput.field(f"points[{row}][{column}]",
                                     "is missing; training data needs complete rows")
        raw = np.ascontiguousarray(X, dtype="<f8").tobytes()
        async with redis_errors():
            where = await dataset_keys(self.redis, self.keys, dataset_id)
            reply = await self.writer.write(
                f"a chunk of dataset {dataset_id}", where.info, "EVAL", APPEND_CHUNK, 3,
                *where.all, raw, X.shape[0], self.ttl_s, request.digest, self.max_bytes,
                request.fingerprint)
        if reply == b"reused" and request.given:
            raise reused_key(request.given)
        if reply == b"missing":
            raise NotFound(f"dataset {dataset_id!r} does not exist (or expired)")
        if isinstance(reply, list):
            raise TooLarge(f"the dataset holds {int(reply[1])} bytes; this chunk's {len(raw)} "
                           f"would pass the limit of {self.max_bytes} bytes a dataset "
                           "(MIXSCORE_DATASET_MAX_BYTES)")
        return await self.get(dataset_id)

    async def keep(self, dataset_id: str) -> None:
        """Restart the expiry clock (a job about to read it)."""
        async with redis_errors():
            where = await dataset_keys(self.redis, self.keys, dataset_id)
            async with self.redis.pipeline(transaction=True) as pipe:
                for key in where.all:
                    pipe.expire(key, self.ttl_s)
                await pipe.execute()

    async def delete(self, dataset_id: str) -> None:
        await self.get(dataset_id)
        async with redis_errors():
            await self.redis.delete(*(await dataset_keys(self.redis, self.keys, dataset_id)).all)


class StoredChunks:
    """A re-iterable source of a dataset's chunks for the core's fit, read with a
    blocking client from the fitting thread: one chunk in memory at a time."""

    def __init__(self, settings: Settings, key: str, dimension: int) -> None:
        self.client = sync_client(settings)
        self.key = key
        self.dimension = dimension

    def __iter__(self) -> Iterator[np.ndarray]:
        count = self.client.llen(self.key)
        if count == 0:
            raise ValueError("the dataset has no rows (or expired before the fit)")
        for index in range(count):
            raw = cast(bytes | None, self.client.lindex(self.key, index))
            if raw is None:
                raise ValueError("the dataset expired or was deleted during the fit")
            yield np.frombuffer(raw, dtype="<f8").reshape(-1, self.dimension)

    def close(self) -> None:
        close_sync(self.client)
