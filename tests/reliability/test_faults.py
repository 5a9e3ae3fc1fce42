"""Faults under a scoring load, with real processes: Redis down for 10 s, an API worker
killed, and Redis restarted from its append-only file."""

from __future__ import annotations

import os
import signal
import time
from pathlib import Path

import httpx

from service.embedded import EmbeddedRedis

from ..service.servers import api_process, worker_process
from .load import Load

MODEL = {"structure": "diagonal", "weights": [0.5, 0.5], "means": [[0, 0], [5, 6]],
         "covariances": [[1, 1], [2, 2]]}
OUTAGE_S = 10.0


def wait_until(check: object, limit_s: float = 15.0) -> float:
    """Seconds until ``check()`` is true (it must be, within ``limit_s``)."""
    start = time.monotonic()
    while not check():  # type: ignore[operator]
        assert time.monotonic() - start < limit_s, "never happened"
        time.sleep(0.1)
    return time.monotonic() - start


def test_redis_down_for_ten_seconds_under_load(tmp_path: Path) -> None:
    redis = EmbeddedRedis(tmp_path / "redis")
    redis.start()
    try:
        with api_process(redis.url, "outage", MIXSCORE_REDIS_TIMEOUT_S="0.5") as url, \
                worker_process(redis.url, "outage"):
            httpx.post(f"{url}/v1/models/turbine/versions", json=MODEL).raise_for_status()
            fit = httpx.post(f"{url}/v1/models/turbine/fits", json={
                "points": [[0.0, 0.1], [0.2, -0.1], [5.0, 6.2], [5.3, 5.9]] * 10,
                "components": 2, "structure": "spherical", "seed": 1})
            job_id = fit.json()["id"]
            wait_until(lambda: httpx.get(f"{url}/v1/jobs/{job_id}").json()["state"]
                       == "succeeded")
            with Load(url, "turbine") as load:
                time.sleep(2)
                down = time.monotonic()
                redis.stop()  # SIGTERM: the append-only file is synced
                wait_until(lambda: httpx.get(f"{url}/readyz").status_code == 503, 5)
                write = httpx.post(f"{url}/v1/models/turbine/versions", json=MODEL)
                assert (write.status_code, write.headers["retry-after"]) == (503, "5")
                time.sleep(max(0.0, OUTAGE_S - (time.monotonic() - down)))
                redis.start()  # same folder and port
                up = time.monotonic()
                back_s = wait_until(lambda: httpx.get(f"{url}/readyz").status_code == 200)
                time.sleep(2)
            during, after = load.counts(down, up), load.counts(up + back_s)
            assert set(during) == {"200"} and during["200"] > 100, during
            assert set(after) == {"200"}, after
            # Nothing was lost: both versions, the serving pointer and the finished job.
            model = httpx.get(f"{url}/v1/models/turbine").json()
            assert [v["version"] for v in model["versions"]] == [1, 2]
            assert model["serving_version"] == 1
            assert httpx.get(f"{url}/v1/jobs/{job_id}").json()["state"] == "succeeded"
            again = httpx.post(f"{url}/v1/models/turbine/versions", json=MODEL)
            assert again.json()["version"] == 3
    finally:
        redis.stop()
    print(f"\nRedis down {OUTAGE_S:.0f} s: {sum(during.values())} scoring requests during "
          f"the outage, {sum(during.values()) - during['200']} failed; ready again "
          f"{back_s:.1f} s after Redis was")


def test_a_killed_api_worker_loses_only_its_requests_in_flight(redis_server: EmbeddedRedis,
                                                               tmp_path: Path) -> None:
    folder = tmp_path / "metrics"  # where each worker process leaves a file: their pids
    with api_process(redis_server.url, "kill", workers=2,
                     PROMETHEUS_MULTIPROC_DIR=str(folder)) as url:
        httpx.post(f"{url}/v1/models/turbine/versions", json=MODEL).raise_for_status()
        with Load(url, "turbine", threads=4) as load:
            time.sleep(2)
            pids = {int(p.stem.rsplit("_", 1)[1]) for p in folder.glob("*.db")}
            assert len(pids) == 2
            killed = time.monotonic()
            os.kill(min(pids), signal.SIGKILL)
            time.sleep(4)
        before, after = load.counts(until=killed), load.counts(since=killed)
        late = load.counts(since=killed + 1.0)
    failed = sum(after.values()) - after["200"]
    assert set(before) == {"200"}
    # Only the killed worker's connections fail, at once: the request in flight on each,
    # or the next one sent on it before the client notices; never a 5xx, nothing later.
    assert failed <= 2 * load.threads, after
    assert all(not outcome.isdigit() for outcome in after if outcome != "200"), after
    assert set(late) == {"200"} and late["200"] > 100, late
    print(f"\nAPI worker killed under load: {sum(after.values())} requests after the kill, "
          f"{failed} failed ({dict(after)})")
