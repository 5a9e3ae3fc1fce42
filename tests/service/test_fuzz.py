"""Fuzzing from the OpenAPI document (schemathesis): whatever a client sends, valid by
the schema or not, a real server answers with no 5xx, with a documented status, media
type and body, and never lets a request through without a valid key."""

from __future__ import annotations

import itertools
import json
from collections.abc import Iterator
from pathlib import Path
from typing import Any

import httpx
import pytest
import schemathesis
from hypothesis import HealthCheck, given, settings
from hypothesis.errors import Unsatisfiable
from schemathesis import GenerationMode
from schemathesis.checks import (
    content_type_conformance,
    ignored_auth,
    not_a_server_error,
    response_headers_conformance,
    response_schema_conformance,
    status_code_conformance,
)

from service.auth import new_key
from service.embedded import EmbeddedRedis

from .servers import api_process

#: Generated requests per operation: about 25 operations fit in CI's time this way; a
#: longer run is loadtests/fuzz.py.
EXAMPLES = 25
CHECKS = [not_a_server_error, status_code_conformance, content_type_conformance,
          response_schema_conformance, response_headers_conformance, ignored_auth]


@pytest.fixture(scope="module")
def fuzzed(redis_server: EmbeddedRedis, tmp_path_factory: pytest.TempPathFactory) -> Iterator[
        tuple[str, str]]:
    token, entry = new_key("fuzzer", ["admin"])
    keys = Path(tmp_path_factory.mktemp("keys")) / "keys.json"
    keys.write_text(json.dumps({"keys": [entry.to_json()]}))
    with api_process(redis_server.url, "fuzz", MIXSCORE_API_KEYS_FILE=str(keys)) as url:
        # Something to find: a model with a version (generated names mostly miss it).
        httpx.post(f"{url}/v1/models/example/versions",
                   headers={"Authorization": f"Bearer {token}"},
                   json={"structure": "spherical", "weights": [0.7, 0.3],
                         "means": [[0, 0], [6, 6]], "covariances": [1, 2]}).raise_for_status()
        yield url, token


def test_every_answer_is_documented_and_none_is_a_server_error(
        fuzzed: tuple[str, str]) -> None:
    url, token = fuzzed
    schema = schemathesis.openapi.from_url(f"{url}/openapi.json")
    failures: dict[str, str] = {}
    tried = 0
    for loaded, mode in itertools.product(schema.get_all_operations(), GenerationMode):
        operation = loaded.ok()

        @given(case=operation.as_strategy(mode))
        @settings(max_examples=EXAMPLES, deadline=None, suppress_health_check=list(HealthCheck))
        def fuzz(case: Any) -> None:
            case.call_and_validate(base_url=url, headers={"Authorization": f"Bearer {token}"},
                                   checks=CHECKS)

        try:
            fuzz()
        except Unsatisfiable:  # an operation without parameters has no invalid requests
            assert mode is GenerationMode.NEGATIVE and not operation.path_parameters
        except Exception as error:  # every failing operation is reported, not just the first
            failures[f"{operation.label} ({mode.value} data)"] = str(error)[:2000]
        tried += 1
    assert tried >= 2 * 20
    assert not failures, "\n\n".join(f"{label}:\n{text}" for label, text in failures.items())
