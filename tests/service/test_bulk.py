"""Answers of many numbers are streamed in blocks and read back the same as a whole
body, in JSON, MessagePack lists and packed arrays (thresholds lowered here, so that
small answers take the streamed path: the code path is the same as for millions)."""

from __future__ import annotations

from typing import Any

import msgspec
import numpy as np
import pytest

from service import bulk, codec

from ..core.helpers import random_mixture
from .wire import MSGPACK, body_of, mixture_body, post, unpacked

FORMATS = ["json", "msgpack", "packed"]
CALLS = [("log-density", None), ("responsibilities", None), ("explanations", None),
         ("conditional", None), ("samples", {"count": 300, "seed": 5})]


def answers(client: Any, fmt: str, rows: np.ndarray) -> list[dict[str, Any]]:
    found = []
    for endpoint, body in CALLS:
        if body is None:
            body = {"points": rows.tolist() if fmt != "packed" else rows}
        elif fmt == "packed":
            body = {**body, "packed": True}
        answer = post(client, f"/v1/models/fleet/{endpoint}", body, fmt)
        assert answer.status_code == 200, answer.text
        found.append(body_of(answer))
    return found


@pytest.mark.parametrize("fmt", FORMATS)
def test_streamed_answers_read_as_whole_ones(client: Any, fmt: str,
                                             monkeypatch: pytest.MonkeyPatch) -> None:
    mixture = random_mixture(np.random.default_rng(3), "full", 3, 4)
    assert post(client, "/v1/models/fleet/versions", mixture_body(mixture)).status_code == 201
    rows = mixture.sample(200, seed=4)[0]
    rows[5, 2] = np.nan
    whole = answers(client, fmt, rows)
    monkeypatch.setattr(codec, "BULK_VALUES", 10)
    monkeypatch.setattr(bulk, "BLOCK_VALUES", 7)
    streamed = answers(client, fmt, rows)
    for expected, found in zip(whole, streamed, strict=True):
        assert expected.keys() == found.keys()
        for key, value in expected.items():
            if isinstance(value, (list, dict)) and key != "feature_names":
                np.testing.assert_array_equal(unpacked(found[key]), unpacked(value))
            else:
                assert found[key] == value


def test_a_streamed_answer_is_sent_without_a_length(
        client: Any, monkeypatch: pytest.MonkeyPatch) -> None:
    mixture = random_mixture(np.random.default_rng(5), "diagonal", 2, 3)
    assert post(client, "/v1/models/fleet/versions", mixture_body(mixture)).status_code == 201
    monkeypatch.setattr(codec, "BULK_VALUES", 10)
    with client.stream("POST", "/v1/models/fleet/samples",
                       content=msgspec.msgpack.encode({"count": 500, "seed": 1}),
                       headers={"Content-Type": MSGPACK, "Accept": MSGPACK}) as answer:
        assert answer.status_code == 200
        assert "content-length" not in answer.headers
        decoded = msgspec.msgpack.decode(answer.read())
    expected = mixture.sample(500, seed=1)
    np.testing.assert_array_equal(np.array(decoded["points"]), expected[0])
    np.testing.assert_array_equal(np.array(decoded["components"]), expected[1])
