"""Models and versions: numbering, reads, promote and roll back, delete."""

from __future__ import annotations

import asyncio
from typing import Any

import numpy as np
from litestar.testing import AsyncTestClient

from service.app import create_app
from service.settings import Settings

from ..core.helpers import random_mixture
from .wire import body_of, mixture_body, post


def test_versions_keep_their_parameters_exactly(client: Any) -> None:
    mixture = random_mixture(np.random.default_rng(3), "full", 3, 4)
    names = ["rotor_rpm", "power_kw", "oil_c", "vibration_mm_s"]
    post(client, "/v1/models/wind/versions", mixture_body(mixture, feature_names=names))
    detail = body_of(client.get("/v1/models/wind/versions/1"))
    assert detail["serving"] is True
    assert detail["source"] == "import"
    assert detail["tail_fraction_available"] is False
    parameters = detail["parameters"]
    assert parameters["feature_names"] == names
    for key in ("weights", "means", "covariances"):
        np.testing.assert_array_equal(np.array(parameters[key]), getattr(mixture, key))


def test_promote_roll_back_and_delete(client: Any) -> None:
    rng = np.random.default_rng(4)
    first, second = (random_mixture(rng, "diagonal", 2, 3) for _ in range(2))
    post(client, "/v1/models/m/versions", mixture_body(first))
    created = body_of(post(client, "/v1/models/m/versions", mixture_body(second)))
    assert created == {"model": "m", "version": 2, "serving": False}
    point = {"points": [[0.5, -1.0, 2.0]]}

    def scored_by() -> int:
        return body_of(post(client, "/v1/models/m/log-density", point))["version"]  # type: ignore[no-any-return]

    assert scored_by() == 1
    promote = client.put("/v1/models/m/serving", json={"version": 2})
    assert body_of(promote) == {"model": "m", "serving_version": 2, "previous_version": 1}
    assert scored_by() == 2
    client.put("/v1/models/m/serving", json={"version": 1})  # roll back
    assert scored_by() == 1
    pinned = body_of(post(client, "/v1/models/m/log-density?version=2", point))
    assert pinned["version"] == 2
    expected = second.log_density(np.array(point["points"]))
    np.testing.assert_allclose(pinned["log_density"], expected, rtol=1e-12)

    assert body_of(client.delete("/v1/models/m/versions/2")) == {"model": "m", "version": 2}
    assert client.get("/v1/models/m/versions/2").status_code == 404
    assert post(client, "/v1/models/m/log-density?version=2", point).status_code == 404
    third = body_of(post(client, "/v1/models/m/versions",
                         mixture_body(first, serve=True)))
    assert third == {"model": "m", "version": 3, "serving": True}  # numbers are never reused
    listing = body_of(client.get("/v1/models"))["models"]
    assert [(m["name"], m["serving_version"], m["latest_version"]) for m in listing] == [
        ("m", 3, 3)]


def test_concurrent_imports_get_distinct_consecutive_numbers(settings: Settings) -> None:
    mixture = random_mixture(np.random.default_rng(5), "spherical", 2, 2)

    async def run() -> list[int]:
        async with AsyncTestClient(create_app(settings)) as client:
            replies = await asyncio.gather(*[
                client.post("/v1/models/busy/versions", json=mixture_body(mixture))
                for _ in range(25)])
            return sorted(r.json()["version"] for r in replies)

    assert asyncio.run(run()) == list(range(1, 26))


def test_versions_stored_under_the_old_structure_name_read_as_shared(
        client: Any, settings: Settings) -> None:
    """Schema 1 records and queued specs named the shared structure "tied" (renamed)."""
    import json

    import redis

    from service.keys import Keys

    mixture = random_mixture(np.random.default_rng(5), "shared", 2, 3)
    post(client, "/v1/models/old/versions", mixture_body(mixture))
    report = {"candidates": [{"components": 2, "structure": "tied", "bic": 1.0}]}
    with redis.Redis.from_url(settings.redis_url) as direct:
        direct.hset(Keys(settings.key_prefix).version("old", 1), mapping={
            "schema": "1", "structure": "tied", "report": json.dumps(report)})
    detail = body_of(client.get("/v1/models/old/versions/1"))
    assert detail["parameters"]["structure"] == "shared"
    assert detail["fit_report"]["candidates"][0]["structure"] == "shared"
    assert body_of(client.get("/v1/models/old"))["versions"][0]["structure"] == "shared"
    scored = body_of(post(client, "/v1/models/old/log-density", {"points": [[0.0, 0.0, 0.0]]}))
    np.testing.assert_allclose(scored["log_density"],
                               mixture.log_density(np.zeros((1, 3))), rtol=1e-12)
