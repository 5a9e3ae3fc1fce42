"""Every Redis client of the service, for the three deployments an operator may run.

``MIXSCORE_REDIS_MODE`` picks one:

* ``single``: one endpoint, ``MIXSCORE_REDIS_URL``;
* ``sentinel``: ``MIXSCORE_REDIS_SENTINELS`` (host:port,...) say which server is the
  primary named ``MIXSCORE_REDIS_SENTINEL_PRIMARY``; the URL gives the password, TLS
  and database, and its host is not used. A client asks the Sentinels again after a
  connection to the old primary fails;
* ``cluster``: the URL names any one node; the client learns the others and follows
  slot moves.

The API, the fit worker, the dataset chunk reader (a blocking client in the fitting
thread) and the events follower all come from here.
"""

from __future__ import annotations

import asyncio
import traceback
from collections.abc import AsyncIterator
from contextlib import asynccontextmanager
from pathlib import Path
from typing import Any

import redis
import redis.asyncio as aioredis
from redis.asyncio.cluster import RedisCluster as AsyncRedisCluster
from redis.asyncio.retry import Retry
from redis.asyncio.sentinel import Sentinel as AsyncSentinel
from redis.backoff import ExponentialBackoff
from redis.connection import parse_url
from redis.exceptions import (
    ClusterError,
    RedisClusterException,
    SlotNotCoveredError,
    TryAgainError,
)
from redis.exceptions import ConnectionError as RedisConnectionError
from redis.exceptions import TimeoutError as RedisTimeoutError
from redis.retry import Retry as SyncRetry
from redis.sentinel import MasterNotFoundError, Sentinel

from .settings import Settings

REDIS_CODE = Path(redis.__file__).parent
#: Where the event loop's own frames come from (asyncio's streams, uvloop's handles).
EVENT_LOOP_CODE = (str(Path(asyncio.__file__).parent), "uvloop")
#: Retries of one command on a dropped connection, with backoff up to 0.5 s.
RETRIES = 2
#: What a failover raises while it lasts: the write is refused with 503 and Retry-After,
#: the worker waits and tries again. A Cluster client gives up with ClusterError after
#: too many redirections ("TTL exhausted"), and with RedisClusterException when no node
#: it knows answers while it reloads the slot map.
FAILOVER_ERRORS = (RedisConnectionError, RedisTimeoutError, OSError, ClusterError,
                   RedisClusterException, TryAgainError, SlotNotCoveredError,
                   MasterNotFoundError)


def outage(error: BaseException) -> bool:
    """Whether ``error`` says Redis cannot answer now: one of FAILOVER_ERRORS, or a state
    error the client library raised itself in the middle of a call. While a primary
    fails, redis-py's connections can be closed under a call by another task (its
    Cluster client reloads the slot map by closing them), and the call then fails with
    AttributeError or TypeError inside redis-py (redis/redis-py#3546, #3835) or with
    uvloop's RuntimeError for a closed transport (MagicStack/uvloop#506). Those are that
    call's outage, not our bug: the deepest frame outside the event loop is redis-py's."""
    if isinstance(error, FAILOVER_ERRORS):
        return True
    if not isinstance(error, (AttributeError, TypeError, RuntimeError, KeyError, IndexError)):
        return False
    for frame in reversed(traceback.extract_tb(error.__traceback__)):
        if not any(part in frame.filename for part in EVENT_LOOP_CODE):
            return Path(frame.filename).is_relative_to(REDIS_CODE)
    return False


def async_client(settings: Settings) -> Any:
    """The asyncio client of the API and the worker."""
    timeouts = _timeouts(settings)
    if settings.redis_mode == "cluster":
        return AsyncRedisCluster.from_url(settings.redis_url, **timeouts)
    retry = _retry(Retry)
    if settings.redis_mode == "sentinel":
        sentinel = AsyncSentinel(sentinels(settings), **timeouts)
        return sentinel.master_for(settings.redis_sentinel_primary, redis_class=aioredis.Redis,
                                   **_url_options(settings), **timeouts, **retry)
    return aioredis.Redis.from_url(settings.redis_url, **timeouts, **retry)


def sync_client(settings: Settings) -> Any:
    """A blocking client, for the thread that reads a dataset's chunks during a fit."""
    timeouts = _timeouts(settings)
    if settings.redis_mode == "cluster":
        return redis.RedisCluster.from_url(settings.redis_url, **timeouts)
    retry = _retry(SyncRetry)
    if settings.redis_mode == "sentinel":
        sentinel = Sentinel(sentinels(settings), **timeouts)
        return sentinel.master_for(settings.redis_sentinel_primary, **_url_options(settings),
                                   **timeouts, **retry)
    return redis.Redis.from_url(settings.redis_url, **timeouts, **retry)


def _timeouts(settings: Settings) -> dict[str, Any]:
    return {"socket_timeout": settings.redis_timeout_s,
            "socket_connect_timeout": settings.redis_timeout_s}


def _retry(kind: type[Retry] | type[SyncRetry]) -> dict[str, Any]:
    """Retries of a command on a dropped connection (``kind``: the asyncio or the
    blocking Retry); Cluster clients follow the cluster's own redirections instead."""
    return {"retry": kind(ExponentialBackoff(cap=0.5, base=0.05), RETRIES),
            "retry_on_error": [RedisConnectionError, RedisTimeoutError]}


async def close(client: Any) -> None:
    """Close ``client``, its pool (a Sentinel client's pool was given to it, so closing
    the client alone would leave the pool open) and its connections to the Sentinels."""
    if isinstance(client, AsyncRedisCluster):
        await client.aclose()
        return
    await client.aclose(close_connection_pool=True)
    for sentinel in _sentinel_clients(client):
        await sentinel.aclose()


def close_sync(client: Any) -> None:
    """``close`` for a blocking client."""
    client.close()
    if not isinstance(client, redis.RedisCluster):
        client.connection_pool.disconnect()
    for sentinel in _sentinel_clients(client):
        sentinel.close()


def _sentinel_clients(client: Any) -> list[Any]:
    """A sentinel-mode client's own clients of the Sentinels (none in other modes)."""
    manager = getattr(getattr(client, "connection_pool", None), "sentinel_manager", None)
    return list(getattr(manager, "sentinels", []))


async def ping_every_primary(client: Any, timeout_s: float) -> None:
    """Readiness: one ping, or in cluster mode one per primary (each owns slots)."""
    if isinstance(client, AsyncRedisCluster):
        await asyncio.wait_for(client.ping(target_nodes=AsyncRedisCluster.PRIMARIES),
                               timeout_s)
        return
    await asyncio.wait_for(client.ping(), timeout_s)


@asynccontextmanager
async def subscription(client: Any, channel: str) -> AsyncIterator[Any]:
    """A pub/sub connection subscribed to ``channel`` (the events follower's)."""
    if isinstance(client, AsyncRedisCluster):
        await client.initialize()  # its pub/sub needs the slot map, loaded lazily otherwise
    async with client.pubsub() as pubsub:
        await pubsub.subscribe(channel)
        yield pubsub


def sentinels(settings: Settings) -> list[tuple[str, int]]:
    """``MIXSCORE_REDIS_SENTINELS`` as (host, port) pairs; Settings checked the form."""
    found = []
    for item in settings.redis_sentinels.split(","):
        host, _, port = item.strip().rpartition(":")
        found.append((host, int(port)))
    return found


def _url_options(settings: Settings) -> dict[str, Any]:
    """Password, user, database and TLS from the URL (the Sentinels name the host)."""
    options = parse_url(settings.redis_url)
    options = {key: value for key, value in options.items()
               if key not in ("host", "port", "connection_class")}
    if settings.redis_url.startswith("rediss://"):
        options["ssl"] = True
    return options
