"""Fit jobs end to end: HTTP, a real Redis stream and real worker processes."""

from __future__ import annotations

import asyncio
import signal
import time
from typing import Any

import msgspec
import numpy as np
import pytest

from core import Mixture, fit, select
from service.embedded import EmbeddedRedis
from service.jobs import Claimed, JobLost
from service.redis_clients import close
from service.settings import Settings
from service.worker import Worker

from .servers import worker_process
from .wire import MSGPACK, packed


@pytest.fixture
def env(redis_server: EmbeddedRedis, key_prefix: str) -> tuple[str, str]:
    return redis_server.url, key_prefix


def training(rows: int, seed: int = 0, d: int = 2) -> np.ndarray:
    truth = Mixture([0.5, 0.5], np.array([[0.0] * d, [6.0] * d]),
                    [1.0, 2.0], "spherical")
    return truth.sample(rows, seed=seed)[0]


def submit_raw(client: Any, X: np.ndarray, key: str | None = None, **options: Any) -> Any:
    headers = {"Content-Type": MSGPACK, "Accept": "application/json"}
    if key:
        headers["Idempotency-Key"] = key
    return client.post("/v1/models/plant/fits",
                       content=msgspec.msgpack.encode({"points": packed(X), **options}),
                       headers=headers)


def submit(client: Any, X: np.ndarray, key: str | None = None, **options: Any) -> dict[str, Any]:
    reply = submit_raw(client, X, key, **options)
    assert reply.status_code == 202, reply.text
    assert reply.headers["location"] == f"/v1/jobs/{reply.json()['id']}"
    return reply.json()  # type: ignore[no-any-return]


def wait_for(client: Any, job_id: str, states: tuple[str, ...], limit_s: float = 60) -> dict[
        str, Any]:
    deadline = time.monotonic() + limit_s
    while time.monotonic() < deadline:
        job = client.get(f"/v1/jobs/{job_id}").json()
        if job["state"] in states:
            return job  # type: ignore[no-any-return]
        time.sleep(0.05)
    raise AssertionError(f"job {job_id} never reached {states}: {job}")


def test_a_fit_job_writes_the_version_core_fit_would(client: Any, env: tuple[str, str]) -> None:
    X = training(600)
    job = submit(client, X, components=2, structure="full", seed=11, restarts=2)
    assert job["state"] == "queued"
    with worker_process(*env, until_empty=True) as worker:
        assert worker.wait(60) == 0
    done = client.get(f"/v1/jobs/{job['id']}").json()
    assert (done["state"], done["attempts"], done["version"]) == ("succeeded", 1, 1)
    assert done["progress"]["iteration"] >= 1

    direct = fit(X, components=2, structure="full", seed=11, restarts=2)
    version = client.get("/v1/models/plant/versions/1").json()
    np.testing.assert_array_equal(np.array(version["parameters"]["means"]),
                                  direct.mixture.means)
    np.testing.assert_array_equal(np.array(version["parameters"]["covariances"]),
                                  direct.mixture.covariances)
    assert version["source"] == "fit"
    assert version["tail_fraction_available"] is True
    assert version["training_sample_rows"] == 600
    assert version["fit_report"]["log_likelihood"] == direct.log_likelihood
    provenance = version["provenance"]
    assert provenance["job"] == job["id"]
    assert provenance["rows"] == 600
    assert provenance["seed"] == 11
    import hashlib

    assert provenance["data_sha256"] == hashlib.sha256(X.astype("<f8").tobytes()).hexdigest()
    scored = client.post("/v1/models/plant/log-density", json={"points": [
        [0.0, 0.0], [40.0, -9.0], [None, 0.0]]}).json()
    assert scored["tail_fraction"][1] == 0.0 < scored["tail_fraction"][0]
    # A row with a missing feature: the fraction of the kept training rows (all 600)
    # whose same marginal log-density is lower.
    marginal = direct.mixture.marginal([1])
    assert scored["tail_fraction"][2] == pytest.approx(np.mean(
        marginal.log_density(X[:, [1]]) < marginal.log_density([[0.0]])[0]), rel=1e-12)


def test_selection_keeps_the_whole_table_and_can_serve(client: Any,
                                                      env: tuple[str, str]) -> None:
    X = training(500, seed=2)
    first = submit(client, X, components=1, seed=1)
    second = submit(client, X, components={"min": 1, "max": 3},
                    structure=["full", "diagonal"], seed=5, serve=True)
    with worker_process(*env, until_empty=True) as worker:
        assert worker.wait(120) == 0
    assert client.get(f"/v1/jobs/{first['id']}").json()["version"] == 1
    assert client.get(f"/v1/jobs/{second['id']}").json()["version"] == 2
    report = client.get("/v1/models/plant/versions/2").json()["fit_report"]
    assert [(c["components"], c["structure"]) for c in report["candidates"]] == [
        (1, "full"), (2, "full"), (3, "full"), (1, "diagonal"), (2, "diagonal"),
        (3, "diagonal")]
    direct = select(X, components=[1, 2, 3], structures=["full", "diagonal"], seed=5)
    assert report["log_likelihood"] == direct.best.log_likelihood
    assert client.get("/v1/models/plant").json()["serving_version"] == 2


def test_a_fit_without_names_keeps_those_of_the_latest_version(client: Any,
                                                              env: tuple[str, str]) -> None:
    X = training(300, seed=3)
    submit(client, X, components=1, seed=1, feature_names=["power_kw", "oil_temp_c"])
    submit(client, X, components=2, seed=1)  # no names: the first version's carry over
    with worker_process(*env, until_empty=True) as worker:
        assert worker.wait(60) == 0
    names = [client.get(f"/v1/models/plant/versions/{v}").json()["parameters"]["feature_names"]
             for v in (1, 2)]
    assert names == [["power_kw", "oil_temp_c"]] * 2


def test_the_same_idempotency_key_returns_the_same_job(client: Any) -> None:
    X = training(100)
    first = submit(client, X, key="nightly-2026-12-02", seed=1)
    again = submit(client, X, key="nightly-2026-12-02", seed=1)
    other = submit(client, X, key="nightly-2026-12-03", seed=1)
    assert first["id"] == again["id"] != other["id"]
    listed = client.get("/v1/jobs?model=plant").json()["jobs"]
    assert sorted(j["id"] for j in listed) == sorted([first["id"], other["id"]])


def test_cancel_a_queued_job(client: Any, env: tuple[str, str]) -> None:
    job = submit(client, training(100), seed=1)
    cancelled = client.delete(f"/v1/jobs/{job['id']}").json()
    assert cancelled["state"] == "cancelled"
    assert client.delete(f"/v1/jobs/{job['id']}").status_code == 409
    with worker_process(*env, until_empty=True) as worker:
        assert worker.wait(60) == 0
    assert client.get(f"/v1/jobs/{job['id']}").json()["state"] == "cancelled"
    assert client.get("/v1/models/plant").status_code == 404


LONG_FIT = {"components": 8, "restarts": 1, "max_iterations": 5000, "tolerance": 0.0,
            "seed": 3}


def test_cancel_a_running_job(client: Any, env: tuple[str, str]) -> None:
    job = submit(client, training(60_000, d=4), **LONG_FIT)
    with worker_process(*env):
        wait_for(client, job["id"], ("running",))
        wait_until_progress(client, job["id"])
        started = time.monotonic()
        client.delete(f"/v1/jobs/{job['id']}")
        done = wait_for(client, job["id"], ("cancelled", "succeeded", "failed"))
        assert done["state"] == "cancelled"
        assert time.monotonic() - started < 5
    assert client.get("/v1/models/plant").status_code == 404  # no version written


def wait_until_progress(client: Any, job_id: str) -> None:
    deadline = time.monotonic() + 60
    while time.monotonic() < deadline:
        if client.get(f"/v1/jobs/{job_id}").json()["progress"]:
            return
        time.sleep(0.05)
    raise AssertionError("no progress reported")


def test_bad_data_fails_the_job_and_the_worker_goes_on(client: Any,
                                                      env: tuple[str, str]) -> None:
    X = np.column_stack([training(200)[:, 0], np.ones(200)])  # a constant feature
    bad = submit(client, X, ridge=0.0, seed=1)
    good = submit(client, training(200), seed=1)
    with worker_process(*env, until_empty=True) as worker:
        assert worker.wait(60) == 0
    failed = client.get(f"/v1/jobs/{bad['id']}").json()
    assert failed["state"] == "failed"
    assert failed["problem"]["status"] == 422
    assert "feature 1 has no spread" in failed["problem"]["detail"]
    assert client.get(f"/v1/jobs/{good['id']}").json()["state"] == "succeeded"


def test_requests_are_checked_before_queueing(client: Any) -> None:
    holes = {"points": [[1.0, None], [2.0, 3.0]]}
    reply = client.post("/v1/models/plant/fits", json=holes)
    assert reply.status_code == 422
    assert reply.json()["errors"][0]["field"] == "points[0][1]"
    few = client.post("/v1/models/plant/fits", json={"points": [[1.0], [2.0]], "components": 5})
    assert "too few" in few.json()["detail"]
    assert client.post("/v1/models/plant/fits", json={"points": [[1.0], [2.0]],
                                                      "restarts": 0}).status_code == 422
    assert client.get("/v1/jobs").json()["jobs"] == []


def test_a_killed_worker_loses_its_job_to_another(client: Any, env: tuple[str, str]) -> None:
    job = submit(client, training(60_000, d=4), **{**LONG_FIT, "max_iterations": 60})
    quick = {"MIXSCORE_JOB_CLAIM_IDLE_S": "1"}
    with worker_process(*env, **quick) as first:
        wait_until_progress(client, job["id"])
        first.send_signal(signal.SIGKILL)
        first.wait()
    with worker_process(*env, until_empty=True, **quick) as second:
        done = wait_for(client, job["id"], ("succeeded", "failed"), limit_s=120)
        second.wait(60)
    assert (done["state"], done["attempts"]) == ("succeeded", 2)
    assert [v["version"] for v in client.get("/v1/models/plant").json()["versions"]] == [1]


def test_a_worker_back_from_a_stall_leaves_the_job_another_took_over(
        client: Any, env: tuple[str, str], tmp_path: Any) -> None:
    """Two workers and a forced stall: the first is stopped (SIGSTOP) mid-fit until the
    second has taken the job over (silent for the claim time), then resumed. It must not
    take the job back, end it or queue it again: the job runs to its end once, in the
    second worker, with one version."""
    job = submit(client, training(60_000, d=4), **{**LONG_FIT, "max_iterations": 300})
    quick = {"MIXSCORE_JOB_CLAIM_IDLE_S": "1"}
    with worker_process(*env, log_file=tmp_path / "first.log", **quick) as first:
        wait_until_progress(client, job["id"])
        first.send_signal(signal.SIGSTOP)
        try:
            with worker_process(*env, log_file=tmp_path / "second.log", **quick):
                deadline = time.monotonic() + 60
                while client.get(f"/v1/jobs/{job['id']}").json()["attempts"] < 2:
                    assert time.monotonic() < deadline
                    time.sleep(0.05)
                first.send_signal(signal.SIGCONT)
                done = wait_for(client, job["id"], ("succeeded", "failed", "cancelled"),
                                limit_s=120)
                time.sleep(1.0)  # the first worker's beats meanwhile
        finally:
            first.send_signal(signal.SIGCONT)
    first_log = (tmp_path / "first.log").read_text()
    second_log = (tmp_path / "second.log").read_text()
    assert (done["state"], done["attempts"], done["version"]) == ("succeeded", 2, 1)
    assert "taken over by another worker; this worker leaves it" in first_log
    assert f"job {job['id']}: version 1 of plant" in second_log
    assert f"job {job['id']}: version" not in first_log
    assert client.get(f"/v1/jobs/{job['id']}").json()["state"] == "succeeded"
    assert [v["version"] for v in client.get("/v1/models/plant").json()["versions"]] == [1]


def test_final_states_are_final_and_a_cancel_is_one_step(client: Any,
                                                        settings: Settings) -> None:
    """The job's states move in Redis scripts: a worker cannot start a job cancelled
    since it read it, nor end one that has ended; a cancel of an ended job is a 409."""
    first = submit(client, training(100), seed=1)
    second = submit(client, training(100), seed=2)

    async def main() -> None:
        worker = Worker(settings)
        try:
            jobs = worker.jobs
            await jobs.ensure_group()
            claimed = await jobs.claim("one", idle_ms=60_000, block_ms=100)
            assert claimed is not None and claimed.job_id == first["id"]
            # Cancelled between its load and its start: the start must not revive it.
            assert client.delete(f"/v1/jobs/{first['id']}").json()["state"] == "cancelled"
            with pytest.raises(JobLost, match="has already cancelled"):
                await jobs.start(claimed)
            await jobs.ack(claimed)  # as the worker does with an ended job's entry
            claimed = await jobs.claim("one", idle_ms=60_000, block_ms=100)
            assert claimed is not None and claimed.job_id == second["id"]
            assert await jobs.start(claimed) == 1
            await jobs.finish(claimed, "succeeded", version=1)
            with pytest.raises(JobLost, match="has already succeeded"):
                await jobs.finish(claimed, "failed")
            # Another consumer holds no entry of it: it may change nothing.
            with pytest.raises(JobLost, match="taken over"):
                await jobs.heartbeat(Claimed(claimed.entry, claimed.job_id, "two"), None)
        finally:
            await close(worker.client)

    asyncio.run(main())
    assert client.get(f"/v1/jobs/{first['id']}").json()["state"] == "cancelled"
    ended = client.get(f"/v1/jobs/{second['id']}").json()
    assert (ended["state"], ended["version"], ended["problem"]) == ("succeeded", 1, None)
    refused = client.delete(f"/v1/jobs/{second['id']}")
    assert refused.status_code == 409 and "has already succeeded" in refused.text


def test_sigterm_hands_the_job_back(client: Any, env: tuple[str, str]) -> None:
    job = submit(client, training(60_000, d=4), **{**LONG_FIT, "max_iterations": 60})
    with worker_process(*env) as first:
        wait_until_progress(client, job["id"])
        first.send_signal(signal.SIGTERM)
        assert first.wait(20) == 0
    assert client.get(f"/v1/jobs/{job['id']}").json()["state"] == "queued"
    with worker_process(*env, until_empty=True) as second:
        assert second.wait(120) == 0
    done = client.get(f"/v1/jobs/{job['id']}").json()
    assert (done["state"], done["attempts"], done["version"]) == ("succeeded", 2, 1)


def test_jobs_and_versions_survive_a_redis_restart(tmp_path: Any) -> None:
    from litestar.testing import TestClient

    from service.app import create_app
    from service.settings import Settings

    server = EmbeddedRedis(tmp_path / "redis")
    url = server.start()
    settings = Settings.from_env({}, redis_url=url)
    try:
        with TestClient(create_app(settings)) as client:
            first = submit(client, training(300), seed=1)
            with worker_process(url, "mixscore", until_empty=True) as worker:
                assert worker.wait(60) == 0
            assert client.get(f"/v1/jobs/{first['id']}").json()["state"] == "succeeded"
            queued = [submit(client, training(300, seed=s), seed=s) for s in range(2, 6)]
            with worker_process(url, "mixscore") as worker:
                server.stop()  # SIGTERM: redis-server syncs its append-only file and exits
                time.sleep(1.5)
                server.start()  # same folder, same port
                jobs = [wait_for(client, job["id"], ("succeeded", "failed"), limit_s=90)
                        for job in queued]
            assert {job["state"] for job in jobs} == {"succeeded"}
            versions = client.get("/v1/models/plant").json()["versions"]
            assert [v["version"] for v in versions] == [1, 2, 3, 4, 5]
    finally:
        server.stop()


def test_a_job_fails_with_the_reason_after_its_last_attempt(client: Any,
                                                           env: tuple[str, str]) -> None:
    job = submit(client, training(60_000, d=4), **{**LONG_FIT, "max_iterations": 60})
    limits = {"MIXSCORE_JOB_CLAIM_IDLE_S": "1", "MIXSCORE_JOB_MAX_ATTEMPTS": "1"}
    with worker_process(*env, **limits) as first:
        wait_until_progress(client, job["id"])
        first.send_signal(signal.SIGKILL)
        first.wait()
    with worker_process(*env, until_empty=True, **limits) as second:
        assert second.wait(60) == 0
    failed = client.get(f"/v1/jobs/{job['id']}").json()
    assert failed["state"] == "failed"
    assert "MIXSCORE_JOB_MAX_ATTEMPTS" in failed["problem"]["detail"]
    assert client.get("/v1/models/plant").status_code == 404


def test_one_job_writes_at_most_one_version(redis_server: EmbeddedRedis,
                                            key_prefix: str) -> None:
    """A worker that stored the version but died before acknowledging runs the job again;
    the second write must return the first number, not add a version."""
    import asyncio

    from service.keys import Keys
    from service.redis_clients import async_client
    from service.replicas import ReplicatedWriter
    from service.settings import Settings
    from service.store import ModelStore, VersionRecord

    record = VersionRecord(mixture=fit(training(200), components=2, seed=1).mixture,
                           feature_names=None, quantiles=None, report=None, provenance={},
                           source="fit")

    async def twice() -> list[tuple[int, int]]:
        client = async_client(Settings.from_env({}, redis_url=redis_server.url))
        store = ModelStore(client, Keys(key_prefix), ReplicatedWriter(client, 0, 1))
        try:
            return [await store.create("plant", record, False, writer="job-1"),
                    await store.create("plant", record, False, writer="job-1"),
                    await store.create("plant", record, False, writer="job-2")]
        finally:
            await client.aclose()

    assert asyncio.run(twice()) == [(1, 1), (1, 1), (2, 1)]


def test_a_resolution_reaches_the_fit_and_the_report_names_what_was_held(
        client: Any, env: tuple[str, str]) -> None:
    """Invented rows: in one of two regimes the second sensor reads exactly 5.0."""
    rng = np.random.default_rng(7)
    stuck = np.column_stack([rng.normal(0, 1, 300), np.full(300, 5.0)])
    moving = rng.normal([8.0, 0.0], 1.0, (300, 2))
    X = np.vstack([stuck, moving])
    bad = submit_raw(client, X, resolution=[0.1])
    assert bad.status_code == 422
    assert bad.json()["errors"] == [{"field": "resolution",
                                     "message": "has 1 values; the points have 2 features"}]
    negative = submit_raw(client, X, resolution=[0.1, -2.0])
    assert negative.json()["errors"][0]["field"] == "resolution[1]"
    job = submit(client, X, components=2, seed=3, resolution=[None, 0.5],
                 feature_names=["speed", "setpoint"])
    with worker_process(*env, until_empty=True) as worker:
        assert worker.wait(60) == 0
    version = client.get("/v1/models/plant/versions/1").json()
    assert version["provenance"]["options"]["resolution"] == [0.0, 0.5]
    direct = fit(X, components=2, seed=3, resolution=[0.0, 0.5])
    np.testing.assert_array_equal(np.array(version["parameters"]["covariances"]),
                                  direct.mixture.covariances)
    held = version["fit_report"]["held"]
    assert [(h["features"], round(h["rows"])) for h in held] == [([1], 300)]
    component = held[0]["component"]
    assert version["parameters"]["covariances"][component][1][1] == pytest.approx(
        0.5**2 / 12 + 1e-9 * X[:, 1].var(), rel=1e-9)  # the default ridge, of the variance
    page = client.get("/v1/models/plant/versions/1/report").text
    assert f"<td>{component}</td><td>setpoint</td><td>300.0</td>" in page
    assert job["state"] == "queued"
