"""Health, readiness, metrics, and the OpenAPI document kept true."""

from __future__ import annotations

import json
from pathlib import Path
from typing import Any

from service.app import create_app
from service.lane import TEMPLATES
from service.openapi import OPERATIONS, document, document_bytes
from service.settings import Settings

ROOT = Path(__file__).resolve().parents[2]


def test_health_readiness_and_metrics(client: Any) -> None:
    assert client.get("/healthz").json() == {"status": "ok", "detail": ""}
    assert client.get("/readyz").json()["status"] == "ok"
    client.post("/v1/models/none/log-density", json={"points": [[1.0]]})
    text = client.get("/metrics").text
    assert "# TYPE mixscore_http_request_duration_seconds histogram" in text
    assert 'route="/v1/models/{name}/log-density"' in text
    assert 'le="0.0005"' in text


def test_readiness_fails_without_redis(key_prefix: str) -> None:
    from litestar.testing import TestClient

    settings = Settings.from_env({}, redis_url="redis://127.0.0.1:1/0", key_prefix=key_prefix,
                                 ready_timeout_s=0.3, redis_timeout_s=0.2)
    with TestClient(create_app(settings)) as client:
        answer = client.get("/readyz")
        assert answer.status_code == 503
        assert answer.json()["status"] == "unavailable"
        assert client.get("/healthz").status_code == 200


def test_the_checked_in_openapi_document_is_current() -> None:
    checked_in = (ROOT / "openapi" / "openapi.json").read_bytes()
    assert checked_in == document_bytes(), "run `mixscore openapi` and commit the result"


def test_every_route_is_documented_and_every_documented_route_exists(settings: Settings) -> None:
    app = create_app(settings)
    served = {(method.lower(), route.path.replace(":str", "").replace(":int", ""))
              for route in app.routes for method in route.methods if method not in ("HEAD",
                                                                                     "OPTIONS")}
    served |= {("post", template) for template in TEMPLATES.values()}  # the point lane
    documented = {(o.method, o.path) for o in OPERATIONS}
    assert served == documented


def test_the_document_is_valid_openapi_3_1() -> None:
    from openapi_spec_validator import validate

    validate(document())  # raises on any violation of the OpenAPI 3.1 schema


def test_the_document_is_served_and_refers_to_defined_schemas(client: Any) -> None:
    served = client.get("/openapi.json").json()
    assert served == json.loads(document_bytes())
    text = json.dumps(document())
    schemas = document()["components"]["schemas"]
    for ref in {part.split('"')[0] for part in text.split("#/components/schemas/")[1:]}:
        assert ref in schemas, ref


def test_the_readme_documents_every_setting() -> None:
    from service.settings import documented

    readme = (ROOT / "README.md").read_text()
    for variable, _, _ in documented():
        assert f"`{variable}`" in readme, variable


def test_options_lists_every_method_of_a_path(client: Any) -> None:
    for path, methods in (("/v1/datasets/some-id", "DELETE, GET, OPTIONS"),
                          ("/v1/jobs/some-id", "DELETE, GET, OPTIONS"),
                          ("/v1/models/m/versions/1", "DELETE, GET, OPTIONS"),
                          ("/v1/models/m/log-density", "OPTIONS, POST")):
        answer = client.options(path)
        assert (answer.status_code, answer.headers["allow"]) == (204, methods)
