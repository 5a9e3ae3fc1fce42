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
from service.jobs import JobStore
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
