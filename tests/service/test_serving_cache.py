"""The compiled-model cache across real API processes: promotes reach every worker
within a second, the hot path leaves Redis alone, and cached models outlive a
Redis outage."""

from __future__ import annotations

import time
from typing import Any

import httpx
import numpy as np
import redis

from service.embedded import EmbeddedRedis

from ..core.helpers import random_mixture
from .servers import api_process
from .wire import mixture_body

POINT = {"points": [[0.1, 0.2, 0.3]]}


def serving_version(url: str) -> int:
    reply = httpx.post(f"{url}/v1/models/fleet/log-density", json=POINT)
    assert reply.status_code == 200, reply.text
    return reply.json()["version"]  # type: ignore[no-any-return]


def wait_for_version(url: str, version: int, limit_s: float) -> float:
    start = time.monotonic()
    while time.monotonic() - start < limit_s + 2:
        if serving_version(url) == version:
            return time.monotonic() - start
        time.sleep(0.01)
    raise AssertionError(f"version {version} never served")


def test_a_promote_reaches_a_second_process_within_a_second(redis_server: EmbeddedRedis,
                                                            key_prefix: str) -> None:
    rng = np.random.default_rng(6)
    with api_process(redis_server.url, key_prefix) as first, \
            api_process(redis_server.url, key_prefix) as second:
        for _ in range(2):
            body = mixture_body(random_mixture(rng, "full", 2, 3))
            assert httpx.post(f"{first}/v1/models/fleet/versions", json=body).status_code == 201
        assert serving_version(second) == 1  # the second process now caches version 1
        for target in (2, 1, 2):  # promote, roll back, promote again
            httpx.put(f"{first}/v1/models/fleet/serving", json={"version": target})
            assert wait_for_version(second, target, 1.0) < 1.0

        # A change that publishes no event (a missed message) still shows within the
        # stamp interval: 0.5 s by default.
        with redis.Redis.from_url(redis_server.url) as client:
            model_key = f"{key_prefix}:{{fleet}}:model"
            client.hset(model_key, "serving", 1)
            client.hincrby(model_key, "stamp", 1)
        assert wait_for_version(second, 1, 1.0) < 1.0


def test_scoring_reads_redis_only_for_the_stamp_check(redis_server: EmbeddedRedis,
                                                      key_prefix: str) -> None:
    body = mixture_body(random_mixture(np.random.default_rng(7), "full", 2, 3))
    with api_process(redis_server.url, key_prefix) as url:
        httpx.post(f"{url}/v1/models/fleet/versions", json=body)
        serving_version(url)  # warm the cache
        with redis.Redis.from_url(redis_server.url) as client:
            before = client.info("stats")["total_commands_processed"]
            start = time.monotonic()
            with httpx.Client(base_url=url) as http:
                for _ in range(400):
                    reply = http.post("/v1/models/fleet/log-density", json=POINT)
                    assert reply.status_code == 200
            elapsed = time.monotonic() - start
            commands = client.info("stats")["total_commands_processed"] - before - 1
        # At most one pointer read per 0.5 s interval (and one to spare), whatever the load.
        assert commands <= 2 + elapsed / 0.5, (commands, elapsed)
        print(f"400 scoring requests in {elapsed:.2f} s used {commands} Redis commands")


def test_cached_models_keep_scoring_while_redis_is_down(tmp_path: Any) -> None:
    from litestar.testing import TestClient

    from service.app import create_app
    from service.settings import Settings

    server = EmbeddedRedis(tmp_path / "redis")
    server.start()
    settings = Settings.from_env({}, redis_url=server.url, stamp_check_s=0.2,
                                 redis_timeout_s=0.5)
    body = mixture_body(random_mixture(np.random.default_rng(8), "full", 2, 3))
    try:
        with TestClient(create_app(settings)) as client:
            assert client.post("/v1/models/fleet/versions", json=body).status_code == 201
            assert client.post("/v1/models/fleet/log-density", json=POINT).status_code == 200
            server.stop()
            time.sleep(0.3)  # past the stamp interval: the next request tries Redis
            for _ in range(3):
                assert client.post("/v1/models/fleet/log-density", json=POINT).status_code == 200
            write = client.post("/v1/models/fleet/versions", json=body)
            assert write.status_code == 503
            assert write.headers["retry-after"] == "5"
            assert client.get("/readyz").status_code == 503
            server.start()  # same folder: the append-only file brings the data back
            assert client.get("/readyz").status_code == 200
            again = client.post("/v1/models/fleet/versions", json=body)
            assert again.json()["version"] == 2
    finally:
        server.stop()


def test_a_version_compiled_while_an_event_replaced_its_pointer_is_kept_for_an_outage(
        tmp_path: Any) -> None:
    """Found by the failover test: a promotion event that lands while a request compiles
    the new serving version used to leave that version compiled but named by neither the
    pointer nor the fallback, so the next request during an outage got a 503. The event
    is made to land inside the compile by the store's own load, here."""
    import asyncio

    from service.cache import ModelCache
    from service.keys import Keys
    from service.redis_clients import async_client, close
    from service.replicas import ReplicatedWriter
    from service.settings import Settings
    from service.store import ModelStore, VersionRecord

    server = EmbeddedRedis(tmp_path / "redis")
    server.start()
    settings = Settings.from_env({}, redis_url=server.url, redis_timeout_s=0.5)
    record = VersionRecord(mixture=random_mixture(np.random.default_rng(8), "full", 2, 3),
                           feature_names=None, quantiles=None, report=None, provenance={},
                           source="import")

    async def scenario() -> int:
        client = async_client(settings)
        store = ModelStore(client, Keys("race"), ReplicatedWriter(client, 0, 1))
        cache = ModelCache(store, 2**26, stamp_check_s=0.0)
        load = store.load

        async def load_while_an_event_lands(name: str, version: int) -> VersionRecord:
            cache.invalidate(name)  # what the events follower does, mid-compile
            return await load(name, version)

        try:
            await store.create("fleet", record, serve=True, writer="a")
            await cache.get("fleet", None)  # v1 compiled
            await store.create("fleet", record, serve=True, writer="b")  # v2 serves
            store.load = load_while_an_event_lands  # type: ignore[method-assign]
            assert (await cache.get("fleet", None)).version == 2
            server.stop()  # an outage: the pointer cannot be read
            return (await cache.get("fleet", None)).version
        finally:
            await close(client)

    try:
        assert asyncio.run(scenario()) == 2
    finally:
        server.stop()


def test_requests_that_miss_together_load_a_version_once_off_the_loop(
        client: Any, settings: Any, monkeypatch: Any) -> None:
    """Twenty requests for a version no worker has compiled: one read of Redis, one
    compilation, and that on a thread, not on the event loop."""
    import asyncio
    import threading

    from service import cache as cache_module
    from service.cache import ModelCache
    from service.keys import Keys
    from service.redis_clients import async_client, close
    from service.replicas import ReplicatedWriter
    from service.store import ModelStore

    rng = np.random.default_rng(2)
    body = mixture_body(random_mixture(rng, "full", 4, 6))
    assert client.post("/v1/models/fleet/versions", json=body).status_code == 201
    loads: list[int] = []
    threads: list[str] = []
    original_load, original_compiled = ModelStore.load, cache_module._compiled

    async def counting_load(self: ModelStore, name: str, version: int) -> Any:
        loads.append(version)
        return await original_load(self, name, version)

    def recording(*args: Any) -> Any:
        threads.append(threading.current_thread().name)
        return original_compiled(*args)

    monkeypatch.setattr(ModelStore, "load", counting_load)
    monkeypatch.setattr(cache_module, "_compiled", recording)

    async def many() -> set[int]:
        redis_client = async_client(settings)
        store = ModelStore(redis_client, Keys(settings.key_prefix),
                           ReplicatedWriter.from_settings(redis_client, settings))
        cache = ModelCache(store, settings.cache_bytes, settings.stamp_check_s)
        try:
            found = await asyncio.gather(*(cache.get("fleet", None) for _ in range(20)))
            return {id(entry) for entry in found}
        finally:
            await close(redis_client)

    assert len(asyncio.run(many())) == 1
    assert loads == [1]
    assert len(threads) == 1 and threads[0] != threading.main_thread().name
