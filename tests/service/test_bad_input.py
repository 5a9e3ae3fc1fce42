"""The bad-input catalogue: each request gets its exact status, and what Redis holds is
byte for byte what it held before."""

from __future__ import annotations

import threading
from collections.abc import Iterator
from typing import Any

import pytest
import redis

from service.settings import Settings

from .wire import MSGPACK, post

TWO_D = {"structure": "full", "weights": [0.5, 0.5], "means": [[0.0, 0.0], [4.0, 4.0]],
         "covariances": [[[1.0, 0.2], [0.2, 1.0]], [[2.0, 0.0], [0.0, 2.0]]]}
SCORE = "/v1/models/plant/log-density"


@pytest.fixture
def stored(client: Any, settings: Settings) -> Iterator[Any]:
    """A model with two versions (1 serving); yields a function that snapshots Redis."""
    assert post(client, "/v1/models/plant/versions", TWO_D).status_code == 201
    assert post(client, "/v1/models/plant/versions", TWO_D).status_code == 201
    connection = redis.Redis.from_url(settings.redis_url)

    def snapshot() -> dict[bytes, bytes | None]:
        return {key: connection.dump(key)
                for key in sorted(connection.scan_iter(f"{settings.key_prefix}*"))}

    yield snapshot
    connection.close()


def raw(client: Any, path: str, content: bytes, media: str = "application/json") -> Any:
    return client.post(path, content=content, headers={"Content-Type": media})


CATALOGUE: list[tuple[str, Any, int]] = [
    ("malformed JSON", lambda c: raw(c, SCORE, b'{"points": [[1, 2]'), 400),
    ("malformed MessagePack", lambda c: raw(c, SCORE, b"\x81\xa6points\x91", MSGPACK), 400),
    ("wrong content type", lambda c: raw(c, SCORE, b"1,2", "text/csv"), 415),
    ("wrong dimension", lambda c: post(c, SCORE, {"points": [[1.0, 2.0, 3.0]]}), 422),
    ("rows of different lengths", lambda c: post(c, SCORE, {"points": [[1.0, 2.0], [1.0]]}),
     422),
    ("empty points", lambda c: post(c, SCORE, {"points": []}), 422),
    ("infinity in points", lambda c: post(c, SCORE, {"points": [[float("inf"), 0.0]]},
                                          "msgpack"), 422),
    ("NaN in training points", lambda c: post(c, "/v1/models/plant/fits", {
        "points": [[float("nan"), 0.0]] * 20, "components": 1}, "msgpack"), 422),
    ("1e308 beside a missing value, responsibilities", lambda c: post(
        c, "/v1/models/plant/responsibilities", {"points": [[1e308, None]]}), 422),
    ("1e308, conditional", lambda c: post(c, "/v1/models/plant/conditional",
                                          {"points": [[1e308, None]]}), 422),
    # An encoded slash is a slash to the router: no such path.
    ("model name with a path separator", lambda c: post(c, "/v1/models/a%2Fb/versions",
                                                        TWO_D), 404),
    ("model name with a key separator", lambda c: post(c, "/v1/models/plant:1/versions",
                                                       TWO_D), 422),
    ("model name with a hash tag", lambda c: post(c, "/v1/models/%7Bplant%7D/versions",
                                                  TWO_D), 422),
    ("a covariance that is not positive definite", lambda c: post(
        c, "/v1/models/plant/versions", {**TWO_D, "covariances": [
            [[1.0, 2.0], [2.0, 1.0]], [[1.0, 0.0], [0.0, 1.0]]]}), 422),
    ("a singular covariance", lambda c: post(c, "/v1/models/plant/versions", {
        **TWO_D, "covariances": [[[1.0, 1.0], [1.0, 1.0]], [[1.0, 0.0], [0.0, 1.0]]]}), 422),
    ("weights not summing to 1", lambda c: post(c, "/v1/models/plant/versions",
                                                {**TWO_D, "weights": [0.5, 0.6]}), 422),
    ("negative variances", lambda c: post(c, "/v1/models/plant/versions", {
        "structure": "diagonal", "weights": [1.0], "means": [[0.0, 0.0]],
        "covariances": [[1.0, -2.0]]}), 422),
    ("a version that does not exist", lambda c: post(c, f"{SCORE}?version=9",
                                                     {"points": [[0.0, 0.0]]}), 404),
    ("promote a version that does not exist", lambda c: c.put(
        "/v1/models/plant/serving", json={"version": 9}), 404),
    ("delete the serving version", lambda c: c.delete("/v1/models/plant/versions/1"), 409),
    ("unknown fields", lambda c: post(c, SCORE, {"points": [[0.0, 0.0]], "pointz": 1}), 422),
]


@pytest.mark.parametrize(("case", "send", "status"), CATALOGUE,
                         ids=[case for case, _, _ in CATALOGUE])
def test_bad_input_gets_its_status_and_changes_nothing(client: Any, stored: Any, case: str,
                                                      send: Any, status: int) -> None:
    before = stored()
    answer = send(client)
    assert answer.status_code == status, answer.text
    assert answer.headers["content-type"] == "application/problem+json"
    assert stored() == before, f"{case} changed what Redis holds"


def test_1e308_points_score_as_below_the_float_range(client: Any, stored: Any) -> None:
    before = stored()
    answer = post(client, SCORE, {"points": [[1e308, 1e308], [1e308, None], [0.0, 0.0]]})
    assert answer.status_code == 200
    values = answer.json()["log_density"]
    assert values[:2] == [None, None] and values[2] < 0  # null: below the float range
    assert stored() == before


def race(client: Any, version: int) -> dict[str, int]:
    """Promote and delete ``version`` at the same moment; the two statuses."""
    outcomes: dict[str, int] = {}
    go = threading.Barrier(2)

    def promote() -> None:
        go.wait()
        outcomes["promote"] = client.put("/v1/models/plant/serving",
                                         json={"version": version}).status_code

    def delete() -> None:
        go.wait()
        outcomes["delete"] = client.delete(f"/v1/models/plant/versions/{version}").status_code

    threads = [threading.Thread(target=promote), threading.Thread(target=delete)]
    for thread in threads:
        thread.start()
    for thread in threads:
        thread.join()
    return outcomes


def test_a_concurrent_promote_and_delete_of_one_version_never_both_succeed(
        client: Any, stored: Any) -> None:
    """A version is promoted while it is deleted: one of the two wins, atomically."""
    for round_ in range(20):
        version = 2 + round_
        if round_:
            assert post(client, "/v1/models/plant/versions", TWO_D).json()["version"] == version
        assert client.put("/v1/models/plant/serving", json={"version": 1}).status_code == 200
        outcomes = race(client, version)
        detail = client.get("/v1/models/plant").json()
        kept = [v["version"] for v in detail["versions"]]
        if outcomes == {"promote": 200, "delete": 409}:
            assert detail["serving_version"] == version and version in kept
        else:
            assert outcomes == {"promote": 404, "delete": 200}, outcomes
            assert detail["serving_version"] == 1 and version not in kept
