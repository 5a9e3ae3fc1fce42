"""Settings for tests that build the app without serving it."""

from __future__ import annotations

import pytest

from service.settings import Settings


@pytest.fixture
def settings() -> Settings:
    return Settings.from_env({})
