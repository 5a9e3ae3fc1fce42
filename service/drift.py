"""The drift statistic, one per model version across all API processes.

Each process notes the tail fractions of the complete rows it scores (``DRIFT``) and
appends them at once, in the background, to the version's window in Redis: a string of
the last MIXSCORE_DRIFT_WINDOW of them in arrival order (``drift_append.lua`` trims it).
Rows scored while an append is on its way go together in the next, so a busy process
makes about one Redis call per round trip, not one per request, and scoring never
waits for Redis. A scrape appends its own process's notes, reads every version's window
and sets ``mixscore_drift_ks_statistic`` from it: the same value whichever process
answers the scrape, and current, for every process appended its rows as it answered.
"""

from __future__ import annotations

import asyncio
import logging
from typing import Any

import numpy as np

from .keys import Keys
from .metrics import DRIFT, DRIFT_KS, ks_uniform, unlabel
from .redis_clients import outage
from .store import script

log = logging.getLogger("mixscore.drift")
APPEND = script("drift_append")
#: After an append that Redis refused, the wait before the next.
OUTAGE_WAIT_S = 1.0
#: A window not appended to for this long expires, and its gauge goes.
WINDOW_LIFE_S = 7 * 24 * 3600


class SharedWindows:
    def __init__(self, client: Any, keys: Keys, window: int) -> None:
        self.redis = client
        self.keys = keys
        self.window = window
        self._listed: set[tuple[str, int]] = set()  # in the index, by this process
        self._lock = asyncio.Lock()  # one flush at a time keeps the arrival order

    async def run(self, stop: asyncio.Event) -> None:
        """Append what is noted as it is noted, until ``stop`` (then once more); an
        outage only delays the next append."""
        loop = asyncio.get_running_loop()
        noted = asyncio.Event()

        def wake() -> None:
            loop.call_soon_threadsafe(noted.set)

        DRIFT.noted = wake
        watcher = asyncio.ensure_future(stop.wait())
        watcher.add_done_callback(lambda _: noted.set())
        try:
            while not stop.is_set():
                await noted.wait()
                noted.clear()
                await self._flush_logged()
            await self._flush_logged()
        finally:
            DRIFT.noted = lambda: None
            watcher.cancel()

    async def _flush_logged(self) -> None:
        try:
            await self.flush()
        except Exception as error:
            if not outage(error):
                raise
            log.warning("drift windows not appended to: %s", error)
            await asyncio.sleep(OUTAGE_WAIT_S)  # what is noted meanwhile goes in one append

    async def flush(self) -> None:
        """Append what this process scored since the last flush."""
        async with self._lock:
            pending = DRIFT.take_pending()
            if not pending:
                return
            async with self.redis.pipeline(transaction=False) as pipe:
                for (model, version), values in pending.items():
                    pipe.eval(APPEND, 1, self.keys.drift_window(model, version),
                              values.astype("<f8").tobytes(), 8 * self.window, WINDOW_LIFE_S)
                new = [key for key in pending if key not in self._listed]
                if new:
                    pipe.sadd(self.keys.drift_windows, *(f"{m} {v}" for m, v in new))
                await pipe.execute()
            self._listed.update(new)

    async def refresh(self) -> None:
        """At a scrape: append this process's notes, then set every version's KS gauge
        from its shared window (once full); versions whose window expired leave."""
        await self.flush()
        members = sorted(m.decode() for m in await self.redis.smembers(self.keys.drift_windows))
        versions = [(m.rpartition(" ")[0], int(m.rpartition(" ")[2])) for m in members]
        async with self.redis.pipeline(transaction=False) as pipe:
            for model, version in versions:
                pipe.get(self.keys.drift_window(model, version))
            windows = await pipe.execute()
        gone = []
        for member, (model, version), raw in zip(members, versions, windows, strict=True):
            if raw is None:
                gone.append(member)
                self._listed.discard((model, version))
                unlabel(DRIFT_KS, model, str(version))
                continue
            values = np.frombuffer(raw, dtype="<f8")
            if values.size >= self.window:
                DRIFT_KS.labels(model, str(version)).set(ks_uniform(values[-self.window:]))
        if gone:
            await self.redis.srem(self.keys.drift_windows, *gone)
