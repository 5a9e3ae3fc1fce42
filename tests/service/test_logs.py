"""Logs: one JSON object per line, with the request id that the answer carries."""

from __future__ import annotations

import json
import logging
import re
from collections.abc import Iterator
from typing import Any

import pytest
from litestar.testing import TestClient

from service.app import create_app
from service.auth import new_key
from service.logs import configure
from service.settings import Settings


@pytest.fixture
def json_logs() -> Iterator[None]:
    """The logging that every `mixscore` command sets up, undone after the test."""
    loggers = [logging.getLogger(name) for name in ("mixscore", "")]
    before = [(logger.handlers[:], logger.level, logger.propagate) for logger in loggers]
    configure("DEBUG")
    yield
    for logger, (handlers, level, propagate) in zip(loggers, before, strict=True):
        logger.handlers[:], logger.level, logger.propagate = handlers, level, propagate


def lines(text: str) -> list[dict[str, Any]]:
    return [json.loads(line) for line in text.splitlines() if line.startswith("{")]


@pytest.mark.usefixtures("json_logs")
def test_every_request_gets_an_id_and_one_access_line(
        settings: Settings, capfd: pytest.CaptureFixture[str]) -> None:
    with TestClient(create_app(settings)) as client:
        given = client.get("/healthz", headers={"X-Request-ID": "batch-7/row-12"})
        made = client.get("/no/such/path")
        refused = client.get("/healthz", headers={"X-Request-ID": "x" * 200})
    assert given.headers["x-request-id"] == "batch-7/row-12"
    assert re.fullmatch(r"[0-9a-f]{16}", made.headers["x-request-id"])
    assert re.fullmatch(r"[0-9a-f]{16}", refused.headers["x-request-id"]), "too long: replaced"

    access = [line for line in lines(capfd.readouterr().err)
              if line["logger"] == "mixscore.access"]
    assert [(a["request_id"], a["route"], a["method"], a["status"]) for a in access] == [
        ("batch-7/row-12", "/healthz", "GET", 200),
        (made.headers["x-request-id"], "unmatched", "GET", 404),
        (refused.headers["x-request-id"], "/healthz", "GET", 200),
    ]
    for line in access:
        assert line["level"] == "INFO" and line["message"] == "request"
        assert re.fullmatch(r"\d{4}-\d\d-\d\dT\d\d:\d\d:\d\d\.\d{3}Z", line["time"])
        assert 0 < line["duration_ms"] < 10_000


@pytest.mark.usefixtures("json_logs")
def test_keys_and_points_never_reach_the_log(
        redis_server: Any, key_prefix: str, tmp_path: Any,
        capfd: pytest.CaptureFixture[str]) -> None:
    token, entry = new_key("pipeline", ["score", "fit"])
    keys_file = tmp_path / "keys.json"
    keys_file.write_text(json.dumps({"keys": [entry.to_json()]}))
    settings = Settings.from_env({}, redis_url=redis_server.url, key_prefix=key_prefix,
                                 api_keys_file=str(keys_file))
    secret_value = 271828.182845
    with TestClient(create_app(settings)) as client:
        auth = {"Authorization": f"Bearer {token}"}
        client.post("/v1/models/m/versions", headers=auth, json={
            "structure": "spherical", "weights": [1.0], "means": [[0.0]], "covariances": [1.0]})
        client.post("/v1/models/m/log-density", headers=auth,
                    json={"points": [[secret_value]]})
        client.post("/v1/models/m/log-density", headers={"Authorization": "Bearer msk.x.y"},
                    json={"points": [[secret_value]]})
    err = capfd.readouterr().err
    assert len(lines(err)) >= 3
    assert token.rsplit(".", 1)[1] not in err
    assert "271828" not in err
