"""Faults injected into each step of a fit job (read, fit, store, record its end), in a
worker running in this process against a real redis-server: the job fails with a
problem that names the cause, and the worker goes on to the next job. Nothing of
Redis is faked; the fault replaces one of our own steps for one call."""

from __future__ import annotations

import asyncio
from collections.abc import Callable
from typing import Any

import pytest

from service import worker as worker_module
from service.errors import Conflict
from service.jobs import FitSpec, JobStore
from service.redis_clients import close
from service.settings import Settings
from service.store import ModelStore
from service.worker import Worker

from .test_jobs import submit, training


def once(original: Callable[..., Any], error: BaseException) -> Callable[..., Any]:
    """``original``, but its first call raises ``error``."""
    calls = []

    def replaced(*args: Any, **kwargs: Any) -> Any:
        calls.append(1)
        if len(calls) == 1:
            raise error
        return original(*args, **kwargs)

    async def replaced_async(*args: Any, **kwargs: Any) -> Any:
        calls.append(1)
        if len(calls) == 1:
            raise error
        return await original(*args, **kwargs)

    return replaced_async if asyncio.iscoroutinefunction(original) else replaced


def run_until_empty(settings: Settings) -> None:
    async def main() -> None:
        await asyncio.wait_for(Worker(settings).run(until_empty=True), 120)

    asyncio.run(main())


FAULTS = {
    # step: (what to replace, the error, status, words of the problem's detail)
    "read": (JobStore, "load", RuntimeError("the job record cannot be read"), 500,
             "RuntimeError: the job record cannot be read"),
    # A bare StopIteration cannot cross into a future: it used to hang the worker.
    "fit, StopIteration": (worker_module, "fit", StopIteration(), 500, "StopIteration"),
    # An OSError of the fit is not Redis being down: no endless retries.
    "fit, OSError": (worker_module, "fit", OSError(5, "Input/output error"), 500,
                     "OSError: [Errno 5] Input/output error"),
    "store": (ModelStore, "create",
              Conflict("model 'plant' has dimension 3; the parameter set has 2"), 409,
              "model 'plant' has dimension 3"),
    "record the end": (JobStore, "finish", RuntimeError("the end cannot be recorded"), 500,
                       "RuntimeError: the end cannot be recorded"),
}


@pytest.mark.parametrize("step", list(FAULTS))
def test_a_fault_in_any_step_fails_the_job_and_the_worker_goes_on(
        step: str, client: Any, settings: Settings, monkeypatch: pytest.MonkeyPatch) -> None:
    owner, name, error, status, detail = FAULTS[step]
    monkeypatch.setattr(owner, name, once(getattr(owner, name), error))
    faulty = submit(client, training(300), seed=1)
    fine = submit(client, training(300, seed=2), seed=2)
    run_until_empty(settings)
    failed = client.get(f"/v1/jobs/{faulty['id']}").json()
    assert failed["state"] == "failed", failed
    assert failed["problem"]["status"] == status
    assert detail in failed["problem"]["detail"]
    done = client.get(f"/v1/jobs/{fine['id']}").json()
    assert done["state"] == "succeeded", done


def test_a_heartbeat_that_fails_does_not_stop_the_fit(
        client: Any, settings: Settings, monkeypatch: pytest.MonkeyPatch) -> None:
    monkeypatch.setattr(JobStore, "heartbeat",
                        once(JobStore.heartbeat, RuntimeError("a beat is lost")))
    job = submit(client, training(300), seed=1)
    run_until_empty(settings)
    assert client.get(f"/v1/jobs/{job['id']}").json()["state"] == "succeeded"


def test_data_near_the_float_range_fails_with_the_feature_and_row_named(
        client: Any, settings: Settings) -> None:
    """One entry of 1e300 (the codec refuses only inf): a clear failed job, no hang."""
    X = training(300)
    X[17, 1] = 1e300
    job = submit(client, X, seed=1)
    run_until_empty(settings)
    failed = client.get(f"/v1/jobs/{job['id']}").json()
    assert failed["state"] == "failed"
    assert failed["problem"]["status"] == 422
    assert "feature 1" in failed["problem"]["detail"]
    assert "training row 17" in failed["problem"]["detail"]


def test_a_stop_that_came_before_the_fit_hands_the_job_back(
        client: Any, settings: Settings) -> None:
    """SIGTERM while the job's rows were being read: the fit does not start."""
    job = submit(client, training(300), seed=1)

    async def main() -> None:
        worker = Worker(settings)
        try:
            await worker.jobs.ensure_group()
            claimed = await worker.jobs.claim(worker.consumer, 30_000, 1000)
            assert claimed is not None and claimed.job_id == job["id"]
            worker.request_stop()
            await worker.process(claimed)
        finally:
            await close(worker.client)

    asyncio.run(main())
    handed = client.get(f"/v1/jobs/{job['id']}").json()
    assert (handed["state"], handed["attempts"], handed["progress"]) == ("queued", 1, None)


class FlipsAfter:
    """Ten chunks of rows; sets ``flag`` of ``control`` when it hands out chunk 3."""

    def __init__(self, control: worker_module.Control, flag: str) -> None:
        self.control, self.flag = control, flag
        self.chunks = [training(500, seed=s) for s in range(10)]
        self.read: list[int] = []

    def __iter__(self) -> Any:
        for index, chunk in enumerate(self.chunks):
            self.read.append(index)
            if index == 3:
                setattr(self.control, self.flag, True)
            yield chunk


def test_a_stop_lands_within_a_chunk_even_in_the_summary_pass() -> None:
    """The summary pass reads every chunk before the first EM iteration reports: a
    stop or a cancel is checked before each chunk, there as in every pass."""
    spec = FitSpec(model="plant", components=[2], structures=["full"], criterion="bic",
                   restarts=1, max_iterations=10, tolerance=1e-6, ridge=1e-9,
                   init="kmeans++", seed=1, serve=False, feature_names=None, rows=5000,
                   dimension=2, weighted=False)
    for flag, stops_with in (("stopping", worker_module.HandBack),
                             ("cancelled", worker_module.JobCancelled)):
        control = worker_module.Control()
        source = FlipsAfter(control, flag)
        with pytest.raises(stops_with):
            worker_module.fit_job(spec, source, None, control)
        assert source.read == [0, 1, 2, 3]
