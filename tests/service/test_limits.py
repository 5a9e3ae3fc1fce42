"""Limits that protect the service from one busy client: fit jobs per model."""

from __future__ import annotations

from typing import Any

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
