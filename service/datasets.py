"""Training data uploaded in chunks, for data too large for one request.

Chunks are stored as raw little-endian float64 rows in a Redis list; a worker
reads them back one at a time on every EM pass, so its memory is bounded by the
chunk size, the model and the core's reservoir sample, not by the dataset.
"""

from __future__ import annotations

import json
import secrets
from collections.abc import Iterator
from typing import cast

import numpy as np
import redis.asyncio as aioredis

from .errors import InvalidInput, NotFound
from .keys import Keys
from .redis_clients import close_sync, sync_client
from .schemas import Dataset
from .settings import Settings
from .store import redis_errors, utc_now


class DatasetStore:
    def __init__(self, client: aioredis.Redis, keys: Keys, ttl_s: float) -> None:
        self.redis = client
        self.keys = keys
        self.ttl_s = int(ttl_s)

    async def create(self, dimension: int, feature_names: list[str] | None) -> Dataset:
        dataset_id = secrets.token_hex(12)
        async with redis_errors():
            await self.redis.hset(self.keys.dataset(dataset_id), mapping={
                "id": dataset_id, "dimension": dimension, "rows": 0, "bytes": 0, "chunks": 0,
                "feature_names": json.dumps(feature_names), "created_at": utc_now()})
            await self.redis.expire(self.keys.dataset(dataset_id), self.ttl_s)
        return await self.get(dataset_id)

    async def get(self, dataset_id: str) -> Dataset:
        async with redis_errors():
            fields = cast(dict[bytes, bytes],
                          await self.redis.hgetall(self.keys.dataset(dataset_id)))
            ttl = await self.redis.ttl(self.keys.dataset(dataset_id))
        if not fields:
            raise NotFound(f"dataset {dataset_id!r} does not exist (or expired)")
        text = {key.decode(): value.decode() for key, value in fields.items()}
        return Dataset(id=text["id"], dimension=int(text["dimension"]),
                       feature_names=json.loads(text["feature_names"]), rows=int(text["rows"]),
                       bytes=int(text["bytes"]), chunks=int(text["chunks"]),
                       created_at=text["created_at"], expires_in_s=max(int(ttl), 0))

    async def append(self, dataset_id: str, X: np.ndarray) -> Dataset:
        if np.isnan(X).any():
            row, column = (int(i) for i in np.argwhere(np.isnan(X))[0])
            raise InvalidInput.field(f"points[{row}][{column}]",
                                     "is missing; training data needs complete rows")
        raw = np.ascontiguousarray(X, dtype="<f8").tobytes()
        k = self.keys
        await self.get(dataset_id)
        async with redis_errors(), self.redis.pipeline(transaction=True) as pipe:
            pipe.rpush(k.dataset_chunks(dataset_id), raw)
            pipe.hincrby(k.dataset(dataset_id), "rows", X.shape[0])
            pipe.hincrby(k.dataset(dataset_id), "bytes", len(raw))
            pipe.hincrby(k.dataset(dataset_id), "chunks", 1)
            pipe.expire(k.dataset(dataset_id), self.ttl_s)
            pipe.expire(k.dataset_chunks(dataset_id), self.ttl_s)
            await pipe.execute()
        return await self.get(dataset_id)

    async def keep(self, dataset_id: str) -> None:
        """Restart the expiry clock (a job about to read it)."""
        async with redis_errors(), self.redis.pipeline(transaction=True) as pipe:
            pipe.expire(self.keys.dataset(dataset_id), self.ttl_s)
            pipe.expire(self.keys.dataset_chunks(dataset_id), self.ttl_s)
            await pipe.execute()

    async def delete(self, dataset_id: str) -> None:
        await self.get(dataset_id)
        async with redis_errors():
            await self.redis.delete(self.keys.dataset(dataset_id),
                                    self.keys.dataset_chunks(dataset_id))


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
