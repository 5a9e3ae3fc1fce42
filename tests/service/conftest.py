"""An app per test, with real HTTP through the ASGI app and a real Redis."""

from __future__ import annotations

from collections.abc import Iterator
from typing import Any

import pytest
from litestar.testing import TestClient

from service.app import create_app
from service.embedded import EmbeddedRedis
from service.settings import Settings


@pytest.fixture
def settings(redis_server: EmbeddedRedis, key_prefix: str) -> Settings:
    return Settings.from_env({}, redis_url=redis_server.url, key_prefix=key_prefix)


@pytest.fixture
def client(settings: Settings) -> Iterator[TestClient[Any]]:
    with TestClient(create_app(settings)) as test_client:
        yield test_client
