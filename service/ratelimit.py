"""A per-key request rate limit, counted in Redis in one-second windows.

Every API process takes requests from a key's window in leases (a twentieth of the
limit), so Redis sees one call per lease rather than one per request, and all
processes together never admit more than the limit. A process may hold part of a
lease unused when the window ends, so a key can be refused up to a twentieth of the
limit early per process. While Redis cannot count (unreachable, or refusing the call),
each process counts a key's window on its own: scoring goes on in an outage, and a key
still gets at most the limit per second from each process, with no Redis call per
request meanwhile.
"""

from __future__ import annotations

import logging
import math
import time
from dataclasses import dataclass
from pathlib import Path

import redis.asyncio as aioredis
from redis.exceptions import RedisError

from .errors import TooManyRequests
from .keys import Keys
from .redis_clients import outage

log = logging.getLogger("mixscore.ratelimit")
LEASE_SHARE = 0.05
WINDOW_TTL_MS = 3000


@dataclass
class _Window:
    second: int
    left: int
    spent: bool = False


class RateLimiter:
    def __init__(self, client: aioredis.Redis, keys: Keys, limit_per_s: int) -> None:
        self.keys = keys
        self.limit = limit_per_s
        self.lease = max(1, math.ceil(limit_per_s * LEASE_SHARE))
        self._script = client.register_script(
            (Path(__file__).with_name("lua") / "rate_lease.lua").read_text())
        self._windows: dict[str, _Window] = {}

    async def admit(self, key_id: str) -> None:
        """Count one request of ``key_id``; 429 with Retry-After once its window is spent."""
        now = time.time()
        second = int(now)
        window = self._windows.get(key_id)
        if window is None or window.second != second:
            window = self._windows[key_id] = _Window(second, 0)
        if window.left > 0:
            window.left -= 1
            return
        if not window.spent:
            granted = await self._take(key_id, second)
            if granted is None:  # Redis could not count: this process counts the second
                window.left, window.spent = self.limit - 1, True
                return
            window.left = granted - 1
            window.spent = window.left < 0
            if not window.spent:
                return
        raise TooManyRequests(
            f"the API key {key_id!r} is over its limit of {self.limit} requests per second "
            f"(MIXSCORE_RATE_LIMIT)", max(1, math.ceil(second + 1 - now)))

    async def _take(self, key_id: str, second: int) -> int | None:
        """Requests granted to this process from the key's window; None when Redis did
        not count them."""
        try:
            granted = await self._script(keys=[self.keys.rate_window(key_id, second)],
                                         args=[self.lease, self.limit, WINDOW_TTL_MS])
        except Exception as error:
            if not (isinstance(error, RedisError) or outage(error)):
                raise
            log.warning("rate limit counted by this process alone this second, Redis did "
                        "not count it: %s", error)
            return None
        return int(granted)
