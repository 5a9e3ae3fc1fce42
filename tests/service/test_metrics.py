"""The metrics of the design brief: drift per model and version from the API, job
outcomes, fit durations and jobs waiting from each fit worker's own /metrics."""

from __future__ import annotations

import asyncio
import os
import re
import signal
import time
from pathlib import Path
from typing import Any

import httpx
import numpy as np

from core import fit
from service.app import redis_client
from service.embedded import EmbeddedRedis, free_port
from service.keys import Keys
from service.settings import Settings
from service.store import ModelStore, VersionRecord

from .servers import api_process, scrape_until, worker_process
from .test_jobs import submit, training


def metric(text: str, name: str, labels: str = "") -> float:
    match = re.search(rf"^{re.escape(name)}{re.escape(labels)} (\S+)$", text, re.MULTILINE)
    assert match, f"{name}{labels} not exported"
    return float(match.group(1))


def test_drift_is_the_scored_mean_minus_the_training_mean(client: Any, settings: Settings) -> None:
    X = training(2_000, seed=6)
    result = fit(X, components=2, seed=1)
    record = VersionRecord(mixture=result.mixture, feature_names=None,
                           quantiles=result.quantiles, report=None, provenance={},
                           source="fit")

    async def store() -> None:
        redis = redis_client(settings)
        try:
            await ModelStore(redis, Keys(settings.key_prefix)).create("drifty", record, False)
        finally:
            await redis.aclose()

    asyncio.run(store())
    shifted = X[:500] + 3.0  # live data that left the training distribution
    scored = client.post("/v1/models/drifty/log-density", json={"points": shifted.tolist()})
    live_mean = float(np.mean(scored.json()["log_density"]))
    text = client.get("/metrics").text
    drift = metric(text, "mixscore_log_density_drift", '{model="drifty",version="1"}')
    # After one batch the rolling mean is that batch's mean, so the gauge is exactly the
    # batch mean minus the training mean stored with the version.
    assert drift == np.float64(live_mean - result.quantiles.mean)
    assert drift < -1.0


def test_a_worker_exports_its_job_outcomes(client: Any, redis_server: EmbeddedRedis,
                                           key_prefix: str) -> None:
    port = free_port()
    submit(client, training(300), seed=1)
    with worker_process(redis_server.url, key_prefix,
                        MIXSCORE_WORKER_METRICS_PORT=str(port)) as worker:
        text = scrape_until(f"http://127.0.0.1:{port}/metrics",
                            'mixscore_fit_jobs_total{state="succeeded"} 1.0')
        assert worker.poll() is None
    assert metric(text, "mixscore_fit_jobs_total", '{state="succeeded"}') == 1.0
    assert metric(text, "mixscore_fit_duration_seconds_count") == 1.0
    assert metric(text, "mixscore_jobs_waiting") == 0.0


def test_several_api_workers_merge_their_metrics_and_forget_a_killed_one(
        redis_server: EmbeddedRedis, key_prefix: str, tmp_path: Path) -> None:
    folder = tmp_path / "metrics"
    with api_process(redis_server.url, key_prefix, workers=2,
                     PROMETHEUS_MULTIPROC_DIR=str(folder)) as url:
        model = {"structure": "spherical", "weights": [1.0], "means": [[0.0, 0.0]],
                 "covariances": [1.0]}
        httpx.post(f"{url}/v1/models/merged/versions", json=model).raise_for_status()
        for _ in range(40):  # a connection each, so the kernel spreads them over the workers
            httpx.post(f"{url}/v1/models/merged/log-density",
                       json={"points": [[0.0, 0.1]] * 5}).raise_for_status()
        pids = {int(p.stem.rsplit("_", 1)[1]) for p in folder.glob("counter_*.db")}
        assert len(pids) == 2, "both workers should have scored"
        text = httpx.get(f"{url}/metrics").text
        assert metric(text, "mixscore_points_scored_total",
                      '{endpoint="log-density",model="merged"}') == 200.0
        assert metric(text, "mixscore_http_request_duration_seconds_count",
                      '{method="POST",route="/v1/models/{name}/log-density",'
                      'status="200"}') == 40.0

        victim = pids.pop()
        assert list(folder.glob(f"gauge_live*_{victim}.db")), "its drift gauge is live"
        os.kill(victim, signal.SIGKILL)
        deadline = time.monotonic() + 30  # granian starts a new worker, which cleans up
        while list(folder.glob(f"gauge_live*_{victim}.db")) and time.monotonic() < deadline:
            time.sleep(0.1)
        assert not list(folder.glob(f"gauge_live*_{victim}.db"))
        text = httpx.get(f"{url}/metrics").text
        assert metric(text, "mixscore_points_scored_total",
                      '{endpoint="log-density",model="merged"}') == 200.0, "totals never go back"
