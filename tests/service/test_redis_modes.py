"""The service's core paths on Redis Cluster (3 primaries, 3 replicas) and on a primary
and replica behind 3 Sentinels, all real servers (tests/topologies.py): readiness,
import, promote, score (checked against scipy), an inline fit job, a dataset upload
and its fit (read by the blocking chunk reader), and a cancel."""

from __future__ import annotations

import time
from collections.abc import Iterator
from pathlib import Path
from typing import Any

import httpx
import numpy as np
import pytest
from litestar.testing import TestClient
from scipy.special import logsumexp
from scipy.stats import multivariate_normal

from core import Mixture
from service.app import create_app
from service.settings import Settings, SettingsError

from ..topologies import cluster, sentinels
from .servers import api_process, worker_process
from .wire import mixture_body

TRUTH = Mixture([0.4, 0.6], [[0.0, 0.0], [6.0, 2.0]], [[1.0, 0.5], [2.0, 1.0]], "diagonal")


@pytest.fixture(scope="module", params=["cluster", "sentinel"])
def deployment(request: pytest.FixtureRequest, tmp_path_factory: pytest.TempPathFactory
               ) -> Iterator[dict[str, str]]:
    """The MIXSCORE_REDIS_* settings of a running deployment of that kind."""
    folder = tmp_path_factory.mktemp(request.param)
    if request.param == "cluster":
        with cluster(folder) as nodes:
            yield {"MIXSCORE_REDIS_MODE": "cluster",
                   "MIXSCORE_REDIS_URL": f"redis://127.0.0.1:{nodes.ports[1]}/0"}
    else:
        with sentinels(folder) as servers:
            yield {"MIXSCORE_REDIS_MODE": "sentinel",
                   "MIXSCORE_REDIS_URL": "redis://ignored:1/0",
                   "MIXSCORE_REDIS_SENTINELS": ",".join(f"127.0.0.1:{port}"
                                                        for port in servers.ports[-3:]),
                   "MIXSCORE_REDIS_SENTINEL_PRIMARY": "mixscore"}


def scipy_log_density(X: np.ndarray) -> np.ndarray:
    """Reference: scipy.stats.multivariate_normal per component, then logsumexp."""
    parts = [np.log(w) + multivariate_normal(m, np.diag(c)).logpdf(X)
             for w, m, c in zip(TRUTH.weights, TRUTH.means, TRUTH.covariances, strict=True)]
    return logsumexp(np.column_stack(parts), axis=1)  # type: ignore[no-any-return]


def wait_for(api: Any, job_id: str, limit_s: float = 60) -> dict[str, Any]:
    deadline = time.monotonic() + limit_s
    while True:
        job: dict[str, Any] = api.get(f"/v1/jobs/{job_id}").json()
        if job["state"] in ("succeeded", "failed", "cancelled"):
            return job
        assert time.monotonic() < deadline, job
        time.sleep(0.1)


def test_the_core_paths_work(deployment: dict[str, str], key_prefix: str) -> None:
    settings = Settings.from_env(deployment, key_prefix=key_prefix)
    # An API that trusts its cached serving version for an hour learns of a promotion
    # by another API only through the events channel.
    trusting = Settings.from_env(deployment, key_prefix=key_prefix, stamp_check_s=3600.0)
    X, _ = TRUTH.sample(600, seed=1)
    with TestClient(create_app(settings)) as api, \
            TestClient(create_app(trusting)) as cached:
        assert api.get("/readyz").json()["status"] == "ok"
        first = api.post("/v1/models/gearbox/versions", json=mixture_body(TRUTH))
        assert first.status_code == 201, first.text
        second = api.post("/v1/models/gearbox/versions",
                          json=mixture_body(TRUTH, serve=False))
        assert second.status_code == 201, second.text
        body = {"points": X[:50].tolist()}
        assert cached.post("/v1/models/gearbox/log-density", json=body).json()["version"] == 1
        assert api.put("/v1/models/gearbox/serving", json={"version": 2}).status_code == 200
        deadline = time.monotonic() + 5
        while (scored := cached.post("/v1/models/gearbox/log-density", json=body)
               ).json()["version"] != 2:
            assert time.monotonic() < deadline, "the promotion's event never arrived"
            time.sleep(0.05)
        np.testing.assert_allclose(scored.json()["log_density"], scipy_log_density(X[:50]),
                                   rtol=1e-9)

        inline = api.post("/v1/models/inline/fits", json={
            "points": X.tolist(), "components": 2, "structure": "diagonal", "seed": 3})
        dataset = api.post("/v1/datasets", json={"dimension": 2}).json()
        for chunk in np.array_split(X, 3):
            appended = api.post(f"/v1/datasets/{dataset['id']}/chunks",
                                json={"points": chunk.tolist()})
            assert appended.status_code == 200, appended.text
        chunked = api.post("/v1/models/chunked/fits", json={
            "dataset": dataset["id"], "components": 2, "structure": "diagonal", "seed": 3})
        cancelled = api.post("/v1/models/cancelled/fits", json={
            "points": X.tolist(), "components": 2, "seed": 3})
        assert api.delete(f"/v1/jobs/{cancelled.json()['id']}").json()["state"] == "cancelled"

        with worker_process(deployment["MIXSCORE_REDIS_URL"], key_prefix, until_empty=True,
                            **deployment) as worker:
            assert worker.wait(120) == 0
        for job in (inline, chunked):
            assert wait_for(api, job.json()["id"])["state"] == "succeeded"
        inline_means = api.get("/v1/models/inline/versions/1").json()["parameters"]["means"]
        chunked_means = api.get("/v1/models/chunked/versions/1").json()["parameters"]["means"]
        np.testing.assert_allclose(inline_means, chunked_means, rtol=1e-9)
        assert api.get("/v1/models/cancelled").status_code == 404


def test_sentinel_settings_are_checked() -> None:
    with pytest.raises(SettingsError, match="MIXSCORE_REDIS_SENTINEL_PRIMARY"):
        Settings.from_env({"MIXSCORE_REDIS_MODE": "sentinel",
                           "MIXSCORE_REDIS_SENTINELS": "127.0.0.1:26379"})
    with pytest.raises(SettingsError, match="host:port,host:port"):
        Settings.from_env({"MIXSCORE_REDIS_MODE": "sentinel",
                           "MIXSCORE_REDIS_SENTINELS": "127.0.0.1",
                           "MIXSCORE_REDIS_SENTINEL_PRIMARY": "mixscore"})
    with pytest.raises(SettingsError, match="one of single, sentinel, cluster"):
        Settings.from_env({"MIXSCORE_REDIS_MODE": "sharded"})


def test_a_cluster_that_lost_a_primary_is_not_ready(tmp_path: Path, key_prefix: str) -> None:
    """In a `mixscore serve` of its own: the client's connections to the dead node are
    that process's to close."""
    with cluster(tmp_path) as nodes:
        url = f"redis://127.0.0.1:{nodes.ports[0]}"
        with api_process(url, key_prefix, MIXSCORE_REDIS_MODE="cluster") as base:
            assert httpx.get(f"{base}/readyz").status_code == 200
            nodes.processes[nodes.ports[2]].kill()  # a primary, before any failover
            nodes.processes[nodes.ports[2]].wait()
            ready = httpx.get(f"{base}/readyz")
            assert ready.status_code == 503, ready.text
