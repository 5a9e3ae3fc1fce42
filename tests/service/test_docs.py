"""The API reference: every operation's example request, sent to a real app in the order
of ``service.examples``, answers as its example says; /docs renders every operation's
fields, defaults and examples from the OpenAPI document, with nothing from the internet."""

from __future__ import annotations

import json
import math
import re
from typing import Any

import msgspec
import pytest

from service.examples import DATASET_ID, EXAMPLES, GEARBOX, JOB_ID, TIME
from service.openapi import OPERATIONS, document

from .browser import opened
from .servers import api_process
from .wire import post

#: Example values that differ per run: compared by type only.
VARYING = {JOB_ID, DATASET_ID, TIME}


def same(actual: Any, expected: Any, where: str = "") -> None:
    """``actual`` has the example's shape and values (ids and times by type, floats to
    1e-5 relative; a value shown rounded counts to its printed digits)."""
    if isinstance(expected, dict):
        assert isinstance(actual, dict) and actual.keys() == expected.keys(), (where, actual)
        for key, value in expected.items():
            same(actual[key], value, f"{where}.{key}")
    elif isinstance(expected, list):
        assert isinstance(actual, list) and len(actual) == len(expected), (where, actual)
        for i, (a, e) in enumerate(zip(actual, expected, strict=True)):
            same(a, e, f"{where}[{i}]")
    elif isinstance(expected, float):
        decimals = len(repr(expected).split(".")[1]) if "." in repr(expected) else 0
        assert isinstance(actual, float), (where, actual)
        assert math.isclose(actual, expected, rel_tol=1e-5) or round(actual, decimals) == \
            expected, (where, actual, expected)
    elif expected in VARYING:
        assert isinstance(actual, str), (where, actual)
    else:
        assert actual == expected, (where, actual, expected)


def same_text(actual: str, expected: str) -> None:
    """Every shown line but "..." is in the answer; a metric sample by its series."""
    for line in expected.splitlines():
        if line.endswith("..."):
            assert actual.startswith(line[:-3]) or line[:-3] in actual, line
        elif line.startswith("mixscore_"):
            assert line.rsplit(" ", 1)[0] + " " in actual, line
        else:
            assert line in actual, line


def test_every_operation_has_an_example() -> None:
    assert set(EXAMPLES) == {(o.method, o.path) for o in OPERATIONS}


def test_every_example_answers_as_shown(client: Any) -> None:
    ids: dict[str, str] = {}
    statuses = {(o.method, o.path): o.status for o in OPERATIONS}
    for (method, template), example in EXAMPLES.items():
        if (method, template) == ("put", "/v1/models/{name}/serving"):
            assert post(client, "/v1/models/gearbox/versions", GEARBOX).status_code == 201
        path = example.path
        body = None if example.request is None else msgspec.json.encode(example.request)
        for placeholder, actual in ids.items():
            path = path.replace(placeholder, actual)
            body = body and body.replace(placeholder.encode(), actual.encode())
        answer = client.request(method.upper(), path, content=body,
                                headers={"Content-Type": "application/json"} if body else {})
        assert answer.status_code == statuses[(method, template)], (path, answer.text)
        if isinstance(example.answer, str):
            same_text(answer.text, example.answer)
            continue
        found = answer.json()
        if template == "/openapi.json":
            assert found["openapi"] == example.answer["openapi"]
            continue
        same(found, example.answer, f"{method} {template}")
        if template == "/v1/datasets":
            ids[DATASET_ID] = found["id"]
        if template == "/v1/models/{name}/fits":
            ids[JOB_ID] = found["id"]


def test_examples_are_in_the_openapi_document() -> None:
    for operation in OPERATIONS:
        item = document()["paths"][operation.path][operation.method]
        example = EXAMPLES[(operation.method, operation.path)]
        if example.request is not None:
            shown = item["requestBody"]["content"]["application/json"]["example"]
            assert shown == json.loads(msgspec.json.encode(example.request))
        success = item["responses"][str(operation.status)]["content"]
        assert next(iter(success.values()))["example"] == json.loads(
            msgspec.json.encode(example.answer))


@pytest.fixture
def page(client: Any) -> str:
    answer = client.get("/docs")
    assert answer.status_code == 200
    assert answer.headers["content-type"] == "text/html; charset=utf-8"
    return str(answer.text)


def test_the_reference_page_shows_fields_defaults_limits_and_examples(page: str) -> None:
    # Nothing is fetched: no script, style sheet, font or image from another origin.
    assert not re.search(r"""(src|href)=["']?(https?:)?//""", page)
    for operation in OPERATIONS:
        anchor = operation.method + operation.path.replace("/", "-").replace("{", "").replace(
            "}", "").replace(".", "-")
        assert f'id="{anchor}"' in page, anchor
    fit = page.split('id="post-v1-models-name-fits"')[1].split('<section class="operation"')[0]
    row = re.search(r"<tr><td><code>restarts</code></td>(.*?)</tr>", fit)
    assert row and "<td>integer</td>" in row.group(1) and "<td><code>4</code></td>" in \
        row.group(1), row
    assert "one of <code>diagonal</code>, <code>full</code>, <code>shared</code>, " \
           "<code>spherical</code>" in fit
    assert "Example request" in fit and "Example answer" in fit and "&quot;seed&quot;: 7" in fit
    assert "MIXSCORE_MAX_POINTS" in page


def test_the_reference_page_renders_offline_in_chromium(redis_server: Any) -> None:
    with api_process(redis_server.url, "docs-page") as url, \
            opened(f"{url}/docs", "api-reference.png") as (page, problems):
        sections = page.eval_on_selector_all("section.operation", "all => all.length")
        page.click('a[href="#post-v1-models-name-fits"]')
        shown = page.eval_on_selector("#post-v1-models-name-fits h2", "h => h.textContent")
    assert sections == len(OPERATIONS)
    assert shown == "POST/v1/models/{name}/fits"
    assert problems == []
