"""Limits that protect the service from one busy client: fit jobs per model, requests
per second per API key."""

from __future__ import annotations

import asyncio
import json
import time
from typing import Any

import httpx
from litestar.testing import TestClient

from service.app import create_app
from service.auth import new_key
from service.embedded import free_port
from service.settings import Settings

from .servers import api_process
from .test_jobs import submit, training


def test_a_model_takes_at_most_its_limit_of_jobs_at_once(client: Any) -> None:
    """No worker runs here, so submitted jobs stay queued."""
    X = training(50)
    queued = [submit(client, X, seed=i)["id"] for i in range(4)]
    refused = client.post("/v1/models/plant/fits", json={"points": X.tolist(), "seed": 9})
    assert refused.status_code == 429
    assert refused.headers["retry-after"] == "30"
    assert "MIXSCORE_MAX_JOBS_PER_MODEL" in refused.json()["detail"]
    other = client.post("/v1/models/other/fits", json={"points": X.tolist()})
    assert other.status_code == 202, "the limit is per model"
    assert client.delete(f"/v1/jobs/{queued[0]}").json()["state"] == "cancelled"
    assert client.post("/v1/models/plant/fits",
                       json={"points": X.tolist(), "seed": 9}).status_code == 202
    listed = client.get("/v1/jobs", params={"model": "plant", "state": "queued"}).json()
    assert len(listed["jobs"]) == 4


def test_a_refused_submission_leaves_its_idempotency_key_free(client: Any) -> None:
    X = training(50)
    for i in range(4):
        submit(client, X, seed=i)
    headers = {"Idempotency-Key": "nightly"}
    body = {"points": X.tolist(), "seed": 7}
    assert client.post("/v1/models/plant/fits", json=body, headers=headers).status_code == 429
    first = client.get("/v1/jobs", params={"model": "plant"}).json()["jobs"][-1]["id"]
    client.delete(f"/v1/jobs/{first}")
    assert client.post("/v1/models/plant/fits", json=body, headers=headers).status_code == 202


def test_each_key_has_its_own_rate_limit(redis_server: Any, key_prefix: str,
                                         tmp_path: Any) -> None:
    """20 requests per second per key: counted in Redis in one-second windows."""
    made = {name: new_key(name, ["score"]) for name in ("busy", "quiet")}
    keys_file = tmp_path / "keys.json"
    keys_file.write_text(json.dumps({"keys": [entry.to_json() for _, entry in made.values()]}))
    settings = Settings.from_env({}, redis_url=redis_server.url, key_prefix=key_prefix,
                                 api_keys_file=str(keys_file), rate_limit=20)
    busy, quiet = ({"Authorization": f"Bearer {made[name][0]}"} for name in ("busy", "quiet"))
    with TestClient(create_app(settings)) as client:
        while time.time() % 1 > 0.5:  # start early in a window: 30 requests fit in it
            time.sleep(0.01)
        second = int(time.time())
        statuses = [client.get("/v1/models", headers=busy).status_code for _ in range(30)]
        assert int(time.time()) == second, "the burst should fit in one window"
        assert statuses == [200] * 20 + [429] * 10
        refused = client.get("/v1/models", headers=busy)
        assert refused.headers["retry-after"] == "1"
        assert "limit of 20 requests per second (MIXSCORE_RATE_LIMIT)" in refused.json()["detail"]
        assert client.get("/v1/models", headers=quiet).status_code == 200, "limits are per key"
        time.sleep(second + 1.05 - time.time())
        assert client.get("/v1/models", headers=busy).status_code == 200, "a new window"


def test_the_rate_limit_holds_across_api_processes(redis_server: Any, key_prefix: str,
                                                   tmp_path: Any) -> None:
    token, entry = new_key("shared", ["score"])
    keys_file = tmp_path / "keys.json"
    keys_file.write_text(json.dumps({"keys": [entry.to_json()]}))
    with api_process(redis_server.url, key_prefix, workers=2, MIXSCORE_RATE_LIMIT="20",
                     MIXSCORE_API_KEYS_FILE=str(keys_file),
                     PROMETHEUS_MULTIPROC_DIR=str(tmp_path / "metrics")) as url:
        # A connection each (Connection: close): the kernel spreads them over both
        # processes. One client for all: building one costs 15-40 ms here, more than
        # the window allows.
        headers = {"Authorization": f"Bearer {token}", "Connection": "close"}
        with httpx.Client() as client:
            while time.time() % 1 > 0.4:
                time.sleep(0.01)
            second = int(time.time())
            statuses = [client.get(f"{url}/v1/models", headers=headers).status_code
                        for _ in range(30)]
            assert int(time.time()) == second, "the burst should fit in one window"
    served = {int(p.stem.rsplit("_", 1)[1]) for p in (tmp_path / "metrics").glob("*.db")}
    assert len(served) == 2, "both processes should have answered"
    assert statuses.count(200) == 20 and statuses.count(429) == 10


def test_components_beyond_the_limit_are_413_naming_it(client: Any) -> None:
    k = 65  # MIXSCORE_MAX_COMPONENTS is 64 by default
    many = {"structure": "spherical", "weights": [1 / k] * k,
            "means": [[float(i)] for i in range(k)], "covariances": [1.0] * k}
    imported = client.post("/v1/models/wide/versions", json=many)
    assert imported.status_code == 413
    assert "65 components exceed the limit of 64 (MIXSCORE_MAX_COMPONENTS)" in (
        imported.json()["detail"])
    fitted = client.post("/v1/models/wide/fits", json={
        "points": training(50).tolist(), "components": {"min": 1, "max": 65}})
    assert fitted.status_code == 413
    assert "MIXSCORE_MAX_COMPONENTS" in fitted.json()["detail"]
    assert client.get("/v1/models/wide").status_code == 404, "nothing stored"


def test_while_redis_cannot_count_each_process_holds_the_limit_alone() -> None:
    """The policy when Redis cannot count a window (here: nothing listens): the request
    is admitted, scoring goes on, but this process then counts the key's second itself,
    so a key still gets at most the limit from it, and Redis is asked once a second."""
    from redis.asyncio import Redis
    from redis.asyncio.retry import Retry
    from redis.backoff import NoBackoff

    from service.errors import TooManyRequests
    from service.keys import Keys
    from service.ratelimit import RateLimiter

    async def burst() -> list[bool]:
        client = Redis(port=free_port(), socket_connect_timeout=0.5, retry=Retry(NoBackoff(), 0))
        limiter = RateLimiter(client, Keys("limits"), limit_per_s=5)
        admitted = []
        try:
            while time.time() % 1 > 0.5:
                await asyncio.sleep(0.01)
            for _ in range(8):
                try:
                    await limiter.admit("offline")
                    admitted.append(True)
                except TooManyRequests:
                    admitted.append(False)
        finally:
            await client.aclose()
        return admitted

    assert asyncio.run(burst()) == [True] * 5 + [False] * 3
