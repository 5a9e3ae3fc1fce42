"""Every error path of the contract: the right status, an RFC 9457 problem body that
names the field, and stored data left as it was."""

from __future__ import annotations

from typing import Any

import httpx
import msgspec
import pytest

from service.openapi import document

from .servers import api_process
from .wire import MSGPACK, body_of, post

TWO_D = {"structure": "spherical", "weights": [0.5, 0.5], "means": [[0.0, 0.0], [4.0, 4.0]],
         "covariances": [1.0, 1.0]}


@pytest.fixture
def model(client: Any) -> str:
    assert post(client, "/v1/models/plant/versions", TWO_D).status_code == 201
    return "plant"


def problem(response: Any, status: int) -> dict[str, Any]:
    assert response.status_code == status, response.text
    assert response.headers["content-type"] == "application/problem+json"
    body = response.json()
    assert body["status"] == status
    assert body["type"].startswith("urn:mixscore:problem:")
    assert body["title"] and body["detail"]
    return body  # type: ignore[no-any-return]


def field_of(body: dict[str, Any]) -> str:
    return body["errors"][0]["field"]  # type: ignore[no-any-return]


def raw(client: Any, path: str, content: bytes, content_type: str = "application/json",
        **headers: str) -> Any:
    return client.post(path, content=content, headers={"Content-Type": content_type, **headers})


def test_malformed_bodies_are_400(client: Any, model: str) -> None:
    path = f"/v1/models/{model}/log-density"
    assert "not valid JSON" in problem(raw(client, path, b'{"points": [[1, 2]'), 400)["detail"]
    bad_msgpack = problem(raw(client, path, b"\xc1\xc1", MSGPACK), 400)
    assert "not valid MessagePack" in bad_msgpack["detail"]
    assert problem(raw(client, path, b""), 400)["detail"] == "the request body is empty"


def test_media_types(client: Any, model: str) -> None:
    path = f"/v1/models/{model}/log-density"
    body = b'{"points": [[1, 2]]}'
    unsupported = problem(raw(client, path, body, "text/csv"), 415)
    assert "'text/csv' is not supported" in unsupported["detail"]
    problem(raw(client, path, body, "application/json", Accept="text/html"), 406)
    for spelling in ("application/msgpack", "application/vnd.msgpack", "application/x-msgpack"):
        answer = raw(client, path, msgspec.msgpack.encode({"points": [[1.0, 2.0]]}), spelling,
                     Accept=spelling)
        assert answer.status_code == 200
        assert answer.headers["content-type"] == spelling


@pytest.mark.parametrize(
    ("body", "field", "status"),
    [
        ({"points": [[1.0, 2.0, 3.0]]}, "points", 422),
        ({"points": [[1.0, 2.0], [1.0]]}, "points[1]", 422),
        ({"points": []}, "points", 422),
        ({"points": [["a", 1.0]]}, "points[0][0]", 422),
        ({"points": [[1.0, 2.0]], "extra": 1}, "extra", 422),
        ({}, "points", 422),  # neither points nor records
        ({"points": {"dtype": "<f8", "shape": [1, 2], "data": "AAAA"}}, "points.data", 422),
        ({"points": {"dtype": "<i8", "shape": [1, 2], "data": ""}}, "points.dtype", 422),
    ],
)
def test_bad_points_are_named(client: Any, model: str, body: dict[str, Any], field: str,
                              status: int) -> None:
    found = problem(post(client, f"/v1/models/{model}/log-density", body), status)
    assert field_of(found) == field


def test_infinite_values_are_422_but_nan_is_missing(client: Any, model: str) -> None:
    path = f"/v1/models/{model}/log-density"
    infinite = post(client, path, {"points": [[1.0, 2.0], [float("inf"), 0.0]]}, "msgpack")
    assert field_of(problem(infinite, 422)) == "points[1][0]"
    missing = post(client, path, {"points": [[float("nan"), 2.0]]}, "msgpack")
    assert missing.status_code == 200
    nothing = post(client, path, {"points": [[None, None]]})
    assert field_of(problem(nothing, 422)) == "points[0]"


def test_limits_are_413_and_name_the_limit(client: Any, model: str) -> None:
    many = post(client, f"/v1/models/{model}/log-density", {"points": [[0.0, 0.0]] * 100_001})
    assert "MIXSCORE_MAX_POINTS" in problem(many, 413)["detail"]
    samples = post(client, f"/v1/models/{model}/samples", {"count": 10**6})
    assert "MIXSCORE_MAX_SAMPLES" in problem(samples, 413)["detail"]
    assert field_of(problem(post(client, f"/v1/models/{model}/samples", {"count": 0}),
                            422)) == "count"
    wide = {**TWO_D, "means": [[0.0] * 600, [1.0] * 600]}
    assert "MIXSCORE_MAX_DIMENSION" in problem(post(client, "/v1/models/w/versions", wide),
                                               413)["detail"]


def test_the_body_size_limit(redis_server: Any, key_prefix: str) -> None:
    from litestar.testing import TestClient

    from service.app import create_app
    from service.settings import Settings

    settings = Settings.from_env({}, redis_url=redis_server.url, key_prefix=key_prefix,
                                 max_body_bytes=1000)
    with TestClient(create_app(settings)) as small:
        big = post(small, "/v1/models/x/log-density", {"points": [[0.0, 0.0]] * 200})
        assert "MIXSCORE_MAX_BODY_BYTES" in problem(big, 413)["detail"]


@pytest.mark.parametrize(
    ("change", "field"),
    [
        ({"weights": [0.5, 0.6]}, "weights"),
        ({"weights": [1.5, -0.5]}, "weights"),
        ({"covariances": [1.0, -1.0]}, "covariances[1]"),
        ({"structure": "full", "covariances": [[[1, 0], [0, 1]], [[1, 2], [2, 1]]]},
         "covariances[1]"),
        ({"structure": "full", "covariances": [[[1, 0], [0, 0]], [[1, 0], [0, 1]]]},
         "covariances[0]"),
        ({"means": [[0.0, 0.0], [1.0]]}, "means"),
        ({"structure": "round"}, "structure"),
        ({"feature_names": ["rpm"]}, "feature_names"),
        ({"weights": "half"}, "weights"),
    ],
)
def test_bad_parameter_sets_are_422_and_store_nothing(client: Any, change: dict[str, Any],
                                                      field: str) -> None:
    found = problem(post(client, "/v1/models/imported/versions", {**TWO_D, **change}), 422)
    assert field_of(found) == field
    problem(client.get("/v1/models/imported"), 404)


def test_names_versions_and_state(client: Any, model: str) -> None:
    assert field_of(problem(client.get("/v1/models/Bad%20Name"), 422)) == "name"
    assert field_of(problem(post(client, "/v1/models/a:b/versions", TWO_D), 422)) == "name"
    problem(client.get("/v1/models/nobody"), 404)
    problem(client.get(f"/v1/models/{model}/versions/7"), 404)
    problem(post(client, "/v1/models/nobody/log-density", {"points": [[0.0, 0.0]]}), 404)
    pinned = post(client, f"/v1/models/{model}/log-density?version=9", {"points": [[0.0, 0.0]]})
    assert "no version 9" in problem(pinned, 404)["detail"]
    bad_version = post(client, f"/v1/models/{model}/log-density?version=x", {"points": [[0, 0]]})
    assert field_of(problem(bad_version, 422)) == "version"
    three_d = {**TWO_D, "means": [[0.0, 0.0, 0.0], [1.0, 1.0, 1.0]]}
    assert "dimension 2" in problem(post(client, f"/v1/models/{model}/versions", three_d),
                                    409)["detail"]
    serving = client.delete(f"/v1/models/{model}/versions/1")
    assert "is serving" in problem(serving, 409)["detail"]
    problem(client.put(f"/v1/models/{model}/serving", content=b'{"version": 5}',
                       headers={"Content-Type": "application/json"}), 404)
    problem(client.get("/v1/nowhere"), 404)
    problem(client.patch(f"/v1/models/{model}"), 405)
    # Nothing above changed what is stored.
    detail = body_of(client.get(f"/v1/models/{model}"))
    assert [v["version"] for v in detail["versions"]] == [1]
    assert detail["serving_version"] == 1


def test_errors_that_teach(client: Any, model: str) -> None:
    """The exact words of the hints: allowed values, the closest field, null for NaN."""
    enum = problem(post(client, "/v1/models/plant/fits",
                        {"points": [[0.0, 0.0]] * 4, "structure": ["full", "round"]}), 422)
    assert enum["errors"] == [{"field": "structure[1]", "message": "Invalid enum value 'round'; "
                               "allowed: diagonal, full, shared, spherical"}]
    unknown = problem(post(client, f"/v1/models/{model}/log-density", {"point": [[0, 0]]}), 422)
    assert unknown["detail"] == "point: is not a field here; did you mean `points`? known " \
                                "fields: points, records"
    nested = problem(post(client, "/v1/models/plant/fits", {
        "points": [[0.0, 0.0]] * 4, "components": {"min": 1, "maxx": 3}}), 422)
    assert field_of(nested) == "components.maxx"
    assert "did you mean `max`? known fields: min, max" in nested["detail"]
    far = problem(post(client, f"/v1/models/{model}/log-density", {"wibble": 1}), 422)
    assert "did you mean" not in far["detail"]
    nan = problem(raw(client, f"/v1/models/{model}/log-density", b'{"points": [[NaN, 1]]}'), 400)
    assert nan["detail"].endswith("; `NaN` is not JSON: send null for a missing value")
    infinite = problem(raw(client, f"/v1/models/{model}/log-density",
                           b'{"points": [[1, -Infinity]]}'), 400)
    assert "`Infinity` is not JSON: infinite values are not accepted" in infinite["detail"]


def test_a_model_whose_first_fit_runs_says_so(client: Any) -> None:
    """No worker runs here, so the job stays queued: scoring names it, not "does not exist"."""
    job = post(client, "/v1/models/newcomer/fits", {"points": [[0.0, 0.0], [1.0, 1.0]] * 4,
                                                    "components": 1})
    assert job.status_code == 202
    for answer in (post(client, "/v1/models/newcomer/log-density", {"points": [[0, 0]]}),
                   client.get("/v1/models/newcomer")):
        found = problem(answer, 404)
        assert found["type"] == "urn:mixscore:problem:model-being-fitted"
        assert found["job"] == job.json()["id"]
        assert found["detail"] == (
            f"model 'newcomer' has no version yet: fit job {found['job']} is queued or running "
            f"(GET /v1/jobs/{found['job']}); retry when it has succeeded")
        assert answer.headers["retry-after"] == "5"
    assert client.delete(f"/v1/jobs/{job.json()['id']}").status_code == 200
    assert problem(client.get("/v1/models/newcomer"), 404)["detail"] == \
        "model 'newcomer' does not exist"


def test_a_malformed_host_header_is_a_documented_400(redis_server: Any, key_prefix: str) -> None:
    """Found by the fuzz test: the framework refuses it before routing. A real server,
    since the in-process test client does not send the header as given."""
    with api_process(redis_server.url, key_prefix) as url:
        answer = httpx.get(f"{url}/healthz", headers={"Host": "o#I}K"})
    assert problem(answer, 400)["detail"] == "Invalid host header"
    assert all("400" in operation["responses"] for path in document()["paths"].values()
               for operation in path.values())
