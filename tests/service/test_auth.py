"""API keys: salted digests only, 401 without or with a wrong key, 403 without the
scope; with no keys at all the server keeps to loopback; keys rotate with no restart."""

from __future__ import annotations

import json
import logging
import subprocess
import sys
import time
from typing import Any

import httpx
import pytest
from litestar.testing import TestClient

from service.app import create_app
from service.auth import KeyRing, new_key
from service.errors import Unauthorized
from service.settings import Settings, SettingsError

from .servers import api_process
from .wire import post

BODY = {"structure": "spherical", "weights": [1.0], "means": [[0.0]], "covariances": [1.0]}


@pytest.fixture
def tokens(tmp_path: Any, settings: Settings) -> tuple[dict[str, str], Settings]:
    made = {scope: new_key(f"k-{scope}", [scope]) for scope in ("score", "fit", "admin")}
    keys_file = tmp_path / "keys.json"
    keys_file.write_text(json.dumps({"keys": [entry.to_json() for _, entry in made.values()]}))
    assert all(token not in keys_file.read_text() for token, _ in made.values())
    settings = Settings.from_env({}, redis_url=settings.redis_url, key_prefix=settings.key_prefix,
                                 api_keys_file=str(keys_file))
    return {scope: token for scope, (token, _) in made.items()}, settings


def bearer(token: str) -> dict[str, str]:
    return {"Authorization": f"Bearer {token}"}


def test_scopes_are_enforced(tokens: tuple[dict[str, str], Settings]) -> None:
    token, settings = tokens
    with TestClient(create_app(settings)) as client:
        assert client.get("/v1/models").status_code == 401
        assert client.get("/v1/models", headers=bearer("msk.k-score.wrong")).status_code == 401
        assert client.get("/v1/models", headers=bearer("garbage")).status_code == 401
        assert client.get("/healthz").status_code == 200  # probes need no key
        denied = post(client, "/v1/models/a/versions", BODY, headers=bearer(token["score"]))
        assert denied.status_code == 403
        assert "lacks the 'fit' scope" in denied.json()["detail"]
        assert post(client, "/v1/models/a/versions", BODY,
                    headers=bearer(token["fit"])).status_code == 201
        assert client.get("/v1/models/a", headers=bearer(token["score"])).status_code == 200
        promote = client.put("/v1/models/a/serving", json={"version": 1},
                             headers=bearer(token["fit"]))
        assert promote.status_code == 403
        assert client.put("/v1/models/a/serving", json={"version": 1},
                          headers=bearer(token["admin"])).status_code == 200
        # admin implies the other scopes
        assert post(client, "/v1/models/a/log-density", {"points": [[0.0]]},
                    headers=bearer(token["admin"])).status_code == 200


def test_without_keys_the_server_binds_loopback(monkeypatch: Any,
                                                caplog: pytest.LogCaptureFixture) -> None:
    from service import cli

    bound = {}
    monkeypatch.setattr("uvicorn.run", lambda *args, **kwargs: bound.update(kwargs))
    with caplog.at_level(logging.WARNING, logger="mixscore"):
        cli.run_server(Settings.from_env({}), "0.0.0.0", 8000, 1)
    assert bound["host"] == "127.0.0.1"
    assert "no API keys are configured" in caplog.text


def test_keys_rotate_without_a_restart(redis_server: Any, key_prefix: str, tmp_path: Any) -> None:
    """`mixscore keys` rewrites the file; a running server follows within a second or so."""
    keys_file = str(tmp_path / "keys.json")

    def keys(*args: str) -> str:
        done = subprocess.run([sys.executable, "-m", "service.cli", "keys", "--file", keys_file,
                               *args], capture_output=True, text=True, check=True)
        return done.stdout.strip()

    old = keys("add", "old-pipeline", "--scopes", "score")
    assert keys("list") == "old-pipeline\tscore"
    with api_process(redis_server.url, key_prefix, MIXSCORE_API_KEYS_FILE=keys_file) as url:
        assert httpx.get(f"{url}/v1/models", headers=bearer(old)).status_code == 200
        new = keys("add", "new-pipeline", "--scopes", "score")
        keys("revoke", "old-pipeline")
        assert wait_for_status(f"{url}/v1/models", new, 200)
        assert httpx.get(f"{url}/v1/models", headers=bearer(old)).status_code == 401
        good = (tmp_path / "keys.json").read_text()
        (tmp_path / "keys.json").write_text("{not json")  # a broken file keeps what was read
        time.sleep(1.5)
        assert httpx.get(f"{url}/v1/models", headers=bearer(new)).status_code == 200
        (tmp_path / "keys.json").write_text(good)
        keys("revoke", "new-pipeline")  # an emptied file shuts everyone out, never opens up
        assert wait_for_status(f"{url}/v1/models", new, 401)
        assert httpx.get(f"{url}/v1/models").status_code == 401


def wait_for_status(url: str, token: str, status: int, limit_s: float = 5.0) -> bool:
    deadline = time.monotonic() + limit_s
    while time.monotonic() < deadline:
        if httpx.get(url, headers=bearer(token)).status_code == status:
            return True
        time.sleep(0.1)
    return False


@pytest.mark.parametrize("start", ["with keys", "open"])
def test_a_broken_or_emptied_keys_file_never_opens_the_service(
        tmp_path: Any, monkeypatch: pytest.MonkeyPatch, start: str) -> None:
    """From either start state (keys, or none: open on loopback until keys are added): a
    missing, truncated or half-written file keeps the keys in force; a valid file with no
    keys shuts everyone out; neither opens the service again."""
    monkeypatch.setattr(KeyRing, "RELOAD_CHECK_S", 0.0)
    keys_file = tmp_path / "keys.json"
    token, entry = new_key("pipeline", ["score"])
    document = json.dumps({"keys": [entry.to_json()]})
    keys_file.write_text(document if start == "with keys" else json.dumps({"keys": []}))
    ring = KeyRing.from_settings(Settings.from_env({}, api_keys_file=str(keys_file)))
    if start == "open":
        assert ring.check(None, "score") is None  # open: no key needed
        keys_file.write_text(document)
    assert ring.check(f"Bearer {token}", "score") == entry
    for broken in ("", '{"keys": [{"id": "pipel', "not json"):
        keys_file.write_text(broken)
        assert ring.check(f"Bearer {token}", "score") == entry
        with pytest.raises(Unauthorized):
            ring.check(None, "score")
    keys_file.unlink()
    assert ring.check(f"Bearer {token}", "score") == entry
    keys_file.write_text(json.dumps({"keys": []}))  # every key revoked
    for authorization in (f"Bearer {token}", None):
        with pytest.raises(Unauthorized):
            ring.check(authorization, "score")


def test_metrics_can_require_a_key_with_the_metrics_scope(tmp_path: Any,
                                                           settings: Settings) -> None:
    """MIXSCORE_METRICS_ACCESS=key: /metrics answers only a key with the metrics scope (or
    admin), as a scraper sends it in its Authorization header; by default it is open."""
    made = {scope: new_key(f"k-{scope}", [scope]) for scope in ("score", "metrics", "admin")}
    keys_file = tmp_path / "keys.json"
    keys_file.write_text(json.dumps({"keys": [entry.to_json() for _, entry in made.values()]}))
    for access in ("open", "key"):
        configured = Settings.from_env({}, redis_url=settings.redis_url,
                                       key_prefix=settings.key_prefix,
                                       api_keys_file=str(keys_file), metrics_access=access)
        with TestClient(create_app(configured)) as client:
            anonymous = client.get("/metrics")
            if access == "open":
                assert anonymous.status_code == 200
                continue
            assert anonymous.status_code == 401
            assert client.get("/metrics", headers=bearer(made["score"][0])).status_code == 403
            for scope in ("metrics", "admin"):
                answer = client.get("/metrics", headers=bearer(made[scope][0]))
                assert answer.status_code == 200
                assert "mixscore_" in answer.text
    with pytest.raises(SettingsError, match="MIXSCORE_METRICS_ACCESS must be one of"):
        Settings.from_env({"MIXSCORE_METRICS_ACCESS": "private"})
