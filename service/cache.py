"""Compiled mixtures kept in each API worker, keyed by (model, version).

Versions are immutable, so a cached entry is only ever wrong when its version is
deleted or the serving pointer moves. Both publish an event that drops the
model's entries at once; in case an event is missed, each model's pointer is
re-read from Redis at most every ``stamp_check_s`` seconds (one HMGET), which is
the only Redis call on the scoring path. When Redis is unreachable, cached models
keep scoring.
"""

from __future__ import annotations

import asyncio
import contextlib
import logging
import time
from collections import OrderedDict
from dataclasses import dataclass

import redis.asyncio as aioredis

from core import Mixture, TailFractions

from .errors import NotFound, Unavailable
from .metrics import CACHE_EVENTS, DRIFT, labelled
from .redis_clients import subscription
from .store import ModelStore, VersionRecord

log = logging.getLogger("mixscore.cache")
RECONNECT_DELAY_S = 1.0
#: How often the events listener looks up from the channel (and at its stop flag).
EVENT_POLL_S = 0.25


@dataclass(frozen=True)
class Loaded:
    """A version ready to score."""

    name: str
    version: int
    mixture: Mixture
    nbytes: int
    feature_names: list[str] | None
    tails: TailFractions | None  # None for imports: they have no training quantiles


@dataclass
class _Pointer:
    serving: int | None
    stamp: int
    checked_at: float


class ModelCache:
    def __init__(self, store: ModelStore, max_bytes: int, stamp_check_s: float) -> None:
        self.store = store
        self.max_bytes = max_bytes
        self.stamp_check_s = stamp_check_s
        self._entries: OrderedDict[tuple[str, int], Loaded] = OrderedDict()
        self._bytes = 0
        self._pointers: dict[str, _Pointer] = {}
        #: The pointer a change event replaced, its version kept compiled: what scores
        #: while Redis cannot say what serves now (an outage or a failover).
        self._fallbacks: dict[str, _Pointer] = {}
        #: Versions being loaded: requests that miss together share one load.
        self._loading: dict[tuple[str, int], asyncio.Future[Loaded]] = {}

    async def get(self, name: str, version: int | None) -> Loaded:
        pointer = await self._pointer(name)
        if version is None:
            if pointer.serving is None:
                raise NotFound(f"model {name!r} has no serving version")
            version = pointer.serving
        entry = self._entries.get((name, version))
        if entry is not None:
            self._entries.move_to_end((name, version))
            labelled(CACHE_EVENTS, "hit").inc()
        else:
            labelled(CACHE_EVENTS, "miss").inc()
            try:
                entry = self._insert(await self._load_once(name, version))
            except Unavailable:
                # Another request may have compiled it meanwhile; else the kept version.
                kept = self._entries.get((name, version)) or self._kept(name)
                if kept is None or version != pointer.serving:
                    log.warning("%s v%d cannot be loaded and no compiled version of it is "
                                "kept to fall back on (fallback %s)", name, version,
                                self._fallbacks.get(name))
                    raise
                return kept  # a new serving version that Redis cannot give yet
        if version != pointer.serving:
            return entry
        if self._pointers.get(name) is not pointer:
            # An event replaced the pointer while this version compiled, and dropped the
            # model's versions but the old fallback: this newer one is kept instead.
            self._fallbacks[name] = pointer
            self._drop(name, keep=version)
        elif self._fallbacks.pop(name, None) is not None:
            # What serves is compiled; the kept version may be deleted from now on.
            self._drop(name, keep=version)
        return entry

    def _kept(self, name: str) -> Loaded | None:
        fallback = self._fallbacks.get(name)
        if fallback is None or fallback.serving is None:
            return None
        return self._entries.get((name, fallback.serving))

    async def _pointer(self, name: str) -> _Pointer:
        pointer = self._pointers.get(name)
        now = time.monotonic()
        if pointer is not None and now - pointer.checked_at < self.stamp_check_s:
            return pointer
        try:
            serving, stamp = await self.store.pointer(name)
        except Unavailable:
            pointer = pointer or self._fallbacks.get(name)
            if pointer is None:
                log.warning("the serving version of %s cannot be read, and none is kept to "
                            "fall back on", name)
                raise
            # Redis is down: keep scoring with what this worker has (the answer names the
            # version), and look again only after another interval, not on every request.
            pointer.checked_at = now
            self._pointers[name] = pointer
            return pointer
        if pointer is not None and pointer.stamp != stamp:
            self.invalidate(name)
        fresh = _Pointer(serving, stamp, now)
        self._pointers[name] = fresh
        return fresh

    async def _load_once(self, name: str, version: int) -> Loaded:
        """Load and compile a version once, however many requests miss it together; a
        request that goes away does not cancel the others' load."""
        key = (name, version)
        loading = self._loading.get(key)
        if loading is None:
            loading = self._loading[key] = asyncio.ensure_future(self._load(name, version))
            loading.add_done_callback(lambda done: self._loaded(key, done))
        return await asyncio.shield(loading)

    def _loaded(self, key: tuple[str, int], done: asyncio.Future[Loaded]) -> None:
        self._loading.pop(key, None)
        if not done.cancelled():
            done.exception()  # retrieved: whoever awaited it has it too

    async def _load(self, name: str, version: int) -> Loaded:
        record = await self.store.load(name, version)
        # Factorising is CPU work of up to seconds for a large model: off the event loop.
        return await asyncio.to_thread(_compiled, name, version, record)

    def _insert(self, entry: Loaded) -> Loaded:
        key = (entry.name, entry.version)
        if key not in self._entries:
            self._entries[key] = entry
            self._bytes += entry.nbytes
        while self._bytes > self.max_bytes and len(self._entries) > 1:
            _, evicted = self._entries.popitem(last=False)
            self._bytes -= evicted.nbytes
            DRIFT.forget(evicted.name, evicted.version)
            labelled(CACHE_EVENTS, "eviction").inc()
        return entry

    def invalidate(self, name: str) -> None:
        """Forget the model's pointer and compiled versions (after a change event), but
        the version it served, kept as the fallback while Redis cannot be asked."""
        old = self._pointers.pop(name, None)
        if old is not None and (name, old.serving) in self._entries:
            self._fallbacks[name] = old  # else an earlier fallback, still compiled, stays
        fallback = self._fallbacks.get(name)
        self._drop(name, keep=fallback.serving if fallback is not None else None)
        labelled(CACHE_EVENTS, "invalidation").inc()

    def _drop(self, name: str, keep: int | None) -> None:
        for key in [key for key in self._entries if key[0] == name and key[1] != keep]:
            self._bytes -= self._entries.pop(key).nbytes
            DRIFT.forget(*key)

    async def follow_events(self, client: aioredis.Redis, channel: str,
                            stop: asyncio.Event) -> None:
        """Drop models named on the events channel until ``stop`` is set; reconnect on loss.

        It polls with a short timeout rather than blocking in redis-py's ``listen()``,
        which does not give way to a task cancel, so shutdown stays prompt.
        """
        while not stop.is_set():
            try:
                async with subscription(client, channel) as pubsub:
                    # Anything published while not subscribed was missed: recheck all,
                    # keeping what they point at in case Redis cannot answer yet.
                    for pointer in self._pointers.values():
                        pointer.checked_at = float("-inf")
                    while not stop.is_set():
                        message = await pubsub.get_message(ignore_subscribe_messages=True,
                                                           timeout=EVENT_POLL_S)
                        if message is not None:
                            self.invalidate(message["data"].decode())
            except Exception as error:  # connection loss: retry; the stamp check covers the gap
                if stop.is_set():
                    return
                log.warning("events channel lost (%s); reconnecting", type(error).__name__)
                with contextlib.suppress(TimeoutError):
                    await asyncio.wait_for(stop.wait(), RECONNECT_DELAY_S)


def _compiled(name: str, version: int, record: VersionRecord) -> Loaded:
    """A version ready to score: factors built now, not on its first request; its size
    counts all it may compile while scoring (marginals of missing patterns too)."""
    mixture = record.mixture
    nbytes = mixture.nbytes_at_most()
    tails = None
    if record.quantiles is not None:
        tails = TailFractions(mixture, record.quantiles, record.sample)
        nbytes += tails.nbytes
    return Loaded(name, version, mixture, nbytes, record.feature_names, tails)
