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
import pytest
from litestar.testing import TestClient
from prometheus_client import CollectorRegistry, Histogram
from scipy import stats

from core import FitResult, fit
from service.app import create_app
from service.embedded import EmbeddedRedis, free_port
from service.keys import Keys
from service.metrics import TAIL_FRACTION_BUCKETS, DriftTracker, observe_many
from service.redis_clients import async_client
from service.replicas import ReplicatedWriter
from service.settings import Settings
from service.store import ModelStore, VersionRecord

from .servers import api_process, scrape_until, worker_process
from .test_jobs import submit, training


def metric(text: str, name: str, labels: str = "") -> float:
    match = re.search(rf"^{re.escape(name)}{re.escape(labels)} (\S+)$", text, re.MULTILINE)
    assert match, f"{name}{labels} not exported"
    return float(match.group(1))


def store_fitted(settings: Settings, name: str, result: FitResult) -> None:
    """A fitted version written to the store as a fit job would (without the job)."""
    record = VersionRecord(mixture=result.mixture, feature_names=None,
                           quantiles=result.quantiles, report=None, provenance={},
                           source="fit", sample=result.sample)

    async def store() -> None:
        redis = async_client(settings)
        try:
            await ModelStore(redis, Keys(settings.key_prefix), ReplicatedWriter(redis, 0, 1)
                             ).create(name, record, False, writer="test")
        finally:
            await redis.aclose()

    asyncio.run(store())


def test_drift_is_the_scored_mean_minus_the_training_mean(client: Any, settings: Settings) -> None:
    X = training(2_000, seed=6)
    result = fit(X, components=2, seed=1)
    store_fitted(settings, "drifty", result)
    shifted = X[:500] + 3.0  # live data that left the training distribution
    scored = client.post("/v1/models/drifty/log-density", json={"points": shifted.tolist()})
    live_mean = float(np.mean(scored.json()["log_density"]))
    text = client.get("/metrics").text
    drift = metric(text, "mixscore_log_density_drift", '{model="drifty",version="1"}')
    # After one batch the rolling mean is that batch's mean, so the gauge is exactly the
    # batch mean minus the training mean stored with the version.
    assert drift == np.float64(live_mean - result.quantiles.mean)
    assert drift < -1.0


def test_many_observations_at_once_equal_one_by_one() -> None:
    """observe_many against prometheus_client's own Histogram.observe, bounds included."""
    values = np.concatenate([np.random.default_rng(9).random(500), TAIL_FRACTION_BUCKETS,
                             [0.0, 0.0]])
    registry = CollectorRegistry()
    bulk = Histogram("bulk", "", buckets=TAIL_FRACTION_BUCKETS, registry=registry)
    single = Histogram("single", "", buckets=TAIL_FRACTION_BUCKETS, registry=registry)
    observe_many(bulk, values)
    for value in values:
        single.observe(value)
    samples = {family.name: {(s.name.split("_", 1)[-1], s.labels.get("le")): s.value
                             for s in family.samples if not s.name.endswith("_created")}
               for family in registry.collect()}
    bulk_sum = samples["bulk"].pop(("sum", None))
    assert bulk_sum == pytest.approx(samples["single"].pop(("sum", None)), rel=1e-12)
    assert samples["bulk"] == samples["single"]  # every bucket and the count, exactly


def test_the_ks_gauge_is_scipys_kstest_on_the_window(redis_server: EmbeddedRedis,
                                                     key_prefix: str) -> None:
    """mixscore_drift_ks_statistic against scipy.stats.kstest of the last window's tail
    fractions; below the 0.001 critical value 1.95 / sqrt(n) for rows like the training
    rows, above it for shifted rows. The tail-fraction histogram counts the same rows."""
    settings = Settings.from_env({}, redis_url=redis_server.url, key_prefix=key_prefix,
                                 drift_window=300)
    result = fit(training(3_000, seed=7), components=2, seed=1)
    store_fitted(settings, "calm", result)
    store_fitted(settings, "moved", result)
    fresh = training(400, seed=8)
    critical = 1.95 / np.sqrt(300)
    with TestClient(create_app(settings)) as client:
        tails = []
        for rows in (fresh[:250], fresh[250:]):  # the window fills in the second batch
            answer = client.post("/v1/models/calm/log-density", json={"points": rows.tolist()})
            tails.extend(answer.json()["tail_fraction"])
        moved = client.post("/v1/models/moved/log-density",
                            json={"points": (fresh[:300] + 2.0).tolist()}).json()
        text = client.get("/metrics").text
    calm = metric(text, "mixscore_drift_ks_statistic", '{model="calm",version="1"}')
    assert calm == pytest.approx(stats.kstest(tails[-300:], "uniform").statistic, abs=1e-12)
    assert calm < critical
    shifted = metric(text, "mixscore_drift_ks_statistic", '{model="moved",version="1"}')
    assert shifted == pytest.approx(
        stats.kstest(moved["tail_fraction"], "uniform").statistic, abs=1e-12)
    assert shifted > critical
    for bound in TAIL_FRACTION_BUCKETS:
        counted = metric(text, "mixscore_tail_fraction_bucket",
                         f'{{le="{bound}",model="calm",version="1"}}')
        assert counted == sum(t <= bound for t in tails)


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


def test_rows_below_the_float_range_still_count_as_tail_fraction_zero() -> None:
    """Their log-density (-inf) cannot enter the mean, but their tail fraction (0) is the
    most telling of all and must reach the histogram."""
    from prometheus_client import REGISTRY

    DriftTracker().observe("abyss", 1, np.array([-np.inf]), -3.0, np.array([0.0]))
    assert REGISTRY.get_sample_value("mixscore_tail_fraction_bucket",
                                     {"model": "abyss", "version": "1", "le": "0.001"}) == 1.0


@pytest.mark.parametrize("workers", [1, 2])
def test_the_ks_gauge_is_one_per_version_across_processes_and_current_at_each_scrape(
        redis_server: EmbeddedRedis, key_prefix: str, tmp_path: Path, workers: int) -> None:
    """1 000 rows like the training rows, then, within a second, 1 000 shifted rows, in
    requests that the kernel spreads over the API processes: the next scrape, whichever
    process answers it, shows the KS distance of the last 1 000 rows, equal to
    scipy.stats.kstest on them, above the 0.001 critical value 1.95 / sqrt(1000)."""
    settings = Settings.from_env({}, redis_url=redis_server.url, key_prefix=key_prefix)
    result = fit(training(3_000, seed=7), components=2, seed=1)
    store_fitted(settings, "shared", result)
    fresh = training(2_000, seed=9)
    fresh[1_000:] += 1.5
    critical = 1.95 / np.sqrt(1_000)
    folder = tmp_path / "metrics"
    folder.mkdir()
    with api_process(redis_server.url, key_prefix, workers=workers,
                     PROMETHEUS_MULTIPROC_DIR=str(folder)) as url:
        tails: list[float] = []

        def score(rows: np.ndarray) -> None:
            for part in np.array_split(rows, 10):  # a connection each: spread over workers
                answer = httpx.post(f"{url}/v1/models/shared/log-density",
                                    json={"points": part.tolist()}, timeout=10)
                tails.extend(answer.json()["tail_fraction"])

        def gauge() -> float:
            text = httpx.get(f"{url}/metrics", timeout=10).text
            return metric(text, "mixscore_drift_ks_statistic", '{model="shared",version="1"}')

        score(fresh[:1_000])
        calm = gauge()
        started = time.monotonic()
        score(fresh[1_000:])
        moved = gauge()
        assert time.monotonic() - started < 1.0
    if workers == 2:
        scored = {int(p.stem.rsplit("_", 1)[1]) for p in folder.glob("histogram_*.db")}
        assert len(scored) == 2, "both processes should have scored"
    assert calm == pytest.approx(stats.kstest(tails[:1_000], "uniform").statistic, abs=1e-6)
    assert calm < critical
    assert moved == pytest.approx(stats.kstest(tails[-1_000:], "uniform").statistic, abs=1e-6)
    assert moved > critical
