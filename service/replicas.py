"""Writes that count as done only once replicas hold them.

Redis replicates asynchronously: a write its primary answered is lost if the primary
fails before a replica received it. So every write the service acknowledges (a version, a
serving change or deletion, a fit job, its result, a dataset chunk) is followed by
``WAIT <MIXSCORE_REDIS_MIN_REPLICAS> <timeout>``; with fewer confirmations in
MIXSCORE_REDIS_REPLICA_TIMEOUT_S the request is answered 503 ``not-replicated``.

WAIT counts the writes of the connection it runs on, so a write and its WAIT go down one
connection as one pipeline; in Cluster mode on a connection of the node that owns the
written key's slot, taken from the cluster client's pool and sent to directly: its
pipelines resend, after a broken connection, only the commands that got no answer, and
route a WAIT resent alone by its own policy, to a connection that wrote nothing, which
confirms at once (an acknowledged serving change was lost that way at a failover). So
in Cluster mode a broken connection is an outage (503), never a retry. Each write is one
command (a Lua script where several keys change together), and each is idempotent, so
that repeating it, by redis-py after a dropped connection (the pair together) or by the
client after a 503, writes nothing twice and waits for the replicas again (Redis 6.2
sets a connection's offset by every command, a repeat that writes nothing included).
"""

from __future__ import annotations

import contextlib
import time
from collections.abc import Callable, Sequence
from typing import Any

from redis.asyncio.cluster import ClusterNode, RedisCluster
from redis.exceptions import (
    AskError,
    ReadOnlyError,
    RedisError,
    ResponseError,
    SlotNotCoveredError,
)
from redis.exceptions import ConnectionError as RedisConnectionError
from redis.exceptions import TimeoutError as RedisTimeoutError

from .errors import NotReplicated
from .metrics import REPLICA_WAIT
from .settings import Settings

#: Attempts at a Cluster write whose slot moved (each first learns the new owner).
MOVED_ATTEMPTS = 3


class ReplicatedWriter:
    def __init__(self, client: Any, min_replicas: int, timeout_s: float) -> None:
        self.redis = client
        self.min_replicas = min_replicas
        self.timeout_ms = max(int(timeout_s * 1000), 1)

    @classmethod
    def from_settings(cls, client: Any, settings: Settings) -> ReplicatedWriter:
        return cls(client, settings.min_replicas, settings.redis_replica_timeout_s)

    async def write(self, what: str | Callable[[Any], str], key: str, *command: Any) -> Any:
        """Run ``command`` (it writes ``key``), then wait for the replicas; returns its
        reply. ``what`` names the write in the 503 answer (or names it from the reply)."""
        started = time.perf_counter()
        reply, confirmed = await self._run(key, command)
        if self.min_replicas:
            outcome = "confirmed" if confirmed >= self.min_replicas else "unconfirmed"
            REPLICA_WAIT.labels(outcome).observe(time.perf_counter() - started)
        if confirmed < self.min_replicas:
            named = what(reply) if callable(what) else what
            raise NotReplicated(
                f"{named} is stored on the Redis primary, but {confirmed} of "
                f"{self.min_replicas} replicas confirmed it within {self.timeout_ms} ms "
                "(MIXSCORE_REDIS_MIN_REPLICAS); it may be lost if the primary fails now. "
                "Repeat the request (with the same Idempotency-Key where it takes one): it "
                "writes nothing twice and waits for the replicas again")
        return reply

    async def _run(self, key: str, command: Sequence[Any]) -> tuple[Any, int]:
        try:
            return await self._routed(key, command)
        except ResponseError as error:
            if not (isinstance(error, ReadOnlyError) or "READONLY" in str(error)):
                raise
            # A write sent to a primary that a failover has just made a replica: redis-py
            # asks the Sentinels again after a plain command's READONLY, not a script's.
            pool = getattr(self.redis, "connection_pool", None)
            if pool is not None:
                await pool.disconnect()
            raise RedisConnectionError(f"the primary was demoted: {error}") from None

    async def _routed(self, key: str, command: Sequence[Any]) -> tuple[Any, int]:
        if not isinstance(self.redis, RedisCluster):
            async with self.redis.pipeline(transaction=False) as pipe:
                return await self._send(pipe, command)
        await self.redis.initialize()  # the slot map, loaded lazily otherwise
        attempt = 1
        while True:
            node = self.redis.get_node_from_key(key)
            if node is None:
                raise SlotNotCoveredError(f"no node serves the slot of {key!r} now")
            try:
                return await self._on_node(node, command)
            except AskError:  # MOVED too: the slot has a new owner since the map
                if attempt == MOVED_ATTEMPTS:
                    raise
            except (RedisConnectionError, RedisTimeoutError):
                # The owner is gone or hung: the next request asks the cluster again.
                with contextlib.suppress(RedisError, OSError):
                    await self.redis.nodes_manager.initialize()
                raise
            attempt += 1
            await self.redis.exists(key)  # follows the redirection, updates the map

    async def _send(self, pipe: Any, command: Sequence[Any]) -> tuple[Any, int]:
        """The command and its WAIT down one connection; (its reply, replicas that
        confirmed)."""
        pipe.execute_command(*command)
        if not self.min_replicas:
            return (await pipe.execute())[0], 0
        pipe.execute_command("WAIT", self.min_replicas, self.timeout_ms)
        reply, confirmed = await pipe.execute()
        return reply, int(confirmed)

    async def _on_node(self, node: ClusterNode, command: Sequence[Any]) -> tuple[Any, int]:
        """The command and its WAIT on one connection of ``node``, sent once."""
        pair = [command, ("WAIT", self.min_replicas, self.timeout_ms)][
            : 2 if self.min_replicas else 1]
        connection = node.acquire_connection()
        try:
            await connection.send_packed_command(connection.pack_commands(pair))
            replies = [await _reply(connection) for _ in pair]
        except BaseException:
            await connection.disconnect()  # replies may still be on their way
            raise
        finally:
            node.release(connection)
        for reply in replies:
            if isinstance(reply, ResponseError):
                raise reply
        return replies[0], int(replies[1]) if self.min_replicas else 0


async def _reply(connection: Any) -> Any:
    """The next reply on ``connection``; an error reply returned, not raised, so that the
    replies after it are read too."""
    try:
        return await connection.read_response()
    except ResponseError as error:
        return error
