"""Idempotency-Keys belong to the API key and the route (method and path) that sent them:
two teams sending the same header value get their own versions, jobs, datasets and
chunks; a repeat of the same request returns what the first made; the same key with
another body behind it answers 422 naming the key; a dataset's id cannot be derived
from the header."""

from __future__ import annotations

import hashlib
import json
from collections.abc import Iterator
from typing import Any

import pytest
from litestar.testing import TestClient

from service.app import create_app
from service.auth import new_key
from service.settings import Settings

from .wire import post

BODY = {"structure": "spherical", "weights": [1.0], "means": [[0.0]], "covariances": [1.0]}
OTHER = {**BODY, "means": [[1.0]]}
ROWS = [[float(i), float(i % 7)] for i in range(60)]


@pytest.fixture
def teams(tmp_path: Any, settings: Settings) -> Iterator[tuple[Any, dict[str, str],
                                                               dict[str, str]]]:
    """A client and the headers of two API keys with the fit and score scopes."""
    made = {team: new_key(f"team-{team}", ["fit", "score"]) for team in ("a", "b")}
    keys_file = tmp_path / "keys.json"
    keys_file.write_text(json.dumps({"keys": [entry.to_json() for _, entry in made.values()]}))
    settings = Settings.from_env({}, redis_url=settings.redis_url,
                                 key_prefix=settings.key_prefix, api_keys_file=str(keys_file))
    with TestClient(create_app(settings)) as client:
        yield client, *({"Authorization": f"Bearer {made[team][0]}"} for team in ("a", "b"))


def keyed(headers: dict[str, str], key: str) -> dict[str, str]:
    return {**headers, "Idempotency-Key": key}


def reused(answer: Any, key: str) -> None:
    assert answer.status_code == 422, answer.text
    problem = answer.json()
    assert problem["errors"][0]["field"] == "Idempotency-Key"
    assert f"{key!r} was sent before by this API key to this path" in problem["detail"]


def test_imports_of_two_keys_with_one_header_are_two_imports(teams: Any) -> None:
    client, a, b = teams
    first = post(client, "/v1/models/alpha/versions", BODY, headers=keyed(a, "same"))
    assert first.status_code == 201 and first.json()["version"] == 1
    theirs = post(client, "/v1/models/alpha/versions", BODY, headers=keyed(b, "same"))
    assert theirs.status_code == 201 and theirs.json()["version"] == 2  # not team a's
    again = post(client, "/v1/models/alpha/versions", BODY, headers=keyed(a, "same"))
    assert again.status_code == 201 and again.json()["version"] == 1
    reused(post(client, "/v1/models/alpha/versions", OTHER, headers=keyed(a, "same")), "same")
    # Another path is another route: the header names a request of its own there.
    assert post(client, "/v1/models/beta/versions", BODY,
                headers=keyed(a, "same")).status_code == 201
    versions = client.get("/v1/models/alpha", headers=a).json()["versions"]
    assert [v["version"] for v in versions] == [1, 2]


def test_jobs_of_two_keys_with_one_header_are_two_jobs(teams: Any) -> None:
    client, a, b = teams
    fit = {"points": ROWS, "components": 1, "seed": 1}
    mine = client.post("/v1/models/alpha/fits", json=fit, headers=keyed(a, "job"))
    theirs = client.post("/v1/models/beta/fits", json=fit, headers=keyed(b, "job"))
    assert mine.status_code == theirs.status_code == 202
    assert mine.json()["id"] != theirs.json()["id"]
    assert theirs.json()["model"] == "beta"
    again = client.post("/v1/models/alpha/fits", json=fit, headers=keyed(a, "job"))
    assert again.status_code == 202 and again.json()["id"] == mine.json()["id"]
    reused(client.post("/v1/models/alpha/fits", json={**fit, "seed": 2},
                       headers=keyed(a, "job")), "job")
    # Another route is another scope: the same header may name an import, or a job of
    # another model.
    assert client.post("/v1/models/beta/fits", json=fit,
                       headers=keyed(a, "job")).json()["id"] != mine.json()["id"]
    assert post(client, "/v1/models/alpha/versions", BODY,
                headers=keyed(a, "job")).status_code == 201


def test_datasets_and_chunks_of_two_keys_with_one_header_are_their_own(teams: Any) -> None:
    client, a, b = teams
    mine = client.post("/v1/datasets", json={"dimension": 2}, headers=keyed(a, "data"))
    theirs = client.post("/v1/datasets", json={"dimension": 2}, headers=keyed(b, "data"))
    assert mine.status_code == theirs.status_code == 201
    dataset = mine.json()["id"]
    assert dataset != theirs.json()["id"]
    # Not the header's digest any more (it was its first 24 hex digits).
    assert dataset != hashlib.sha256(b"data").hexdigest()[:24]
    again = client.post("/v1/datasets", json={"dimension": 2}, headers=keyed(a, "data"))
    assert again.status_code == 201 and again.json()["id"] == dataset
    reused(client.post("/v1/datasets", json={"dimension": 3}, headers=keyed(a, "data")),
           "data")
    chunks = f"/v1/datasets/{dataset}/chunks"
    assert client.post(chunks, json={"points": ROWS}, headers=keyed(a, "c1")).json()["rows"] == 60
    assert client.post(chunks, json={"points": ROWS}, headers=keyed(a, "c1")).json()["rows"] == 60
    reused(client.post(chunks, json={"points": ROWS[:10]}, headers=keyed(a, "c1")), "c1")
    assert client.get(f"/v1/datasets/{dataset}", headers=a).json()["chunks"] == 1
