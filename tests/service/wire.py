"""Helpers to talk to the API in JSON and MessagePack (lists or packed arrays)."""

from __future__ import annotations

from typing import Any

import msgspec
import numpy as np

MSGPACK = "application/msgpack"


def packed(array: np.ndarray) -> dict[str, Any]:
    return {"dtype": "<f8", "shape": list(array.shape),
            "data": np.ascontiguousarray(array, dtype="<f8").tobytes()}


def unpacked(value: Any) -> np.ndarray:
    if isinstance(value, dict):
        return np.frombuffer(value["data"], dtype=value["dtype"]).reshape(value["shape"])
    return np.array([np.nan if v is None else v for v in value] if value and not isinstance(
        value[0], list) else value, dtype=float)


def post(client: Any, path: str, body: dict[str, Any], fmt: str = "json",
         headers: dict[str, str] | None = None) -> Any:
    """POST in JSON, MessagePack lists ('msgpack') or MessagePack packed ('packed')."""
    headers = dict(headers or {})
    if fmt == "json":
        return client.post(path, content=msgspec.json.encode(body),
                           headers={"Content-Type": "application/json", **headers})
    if fmt == "packed" and "points" in body:
        body = {**body, "points": packed(np.asarray(body["points"], dtype=float))}
    return client.post(path, content=msgspec.msgpack.encode(body),
                       headers={"Content-Type": MSGPACK, "Accept": MSGPACK, **headers})


def body_of(response: Any) -> Any:
    if response.headers["content-type"].startswith(MSGPACK):
        return msgspec.msgpack.decode(response.content)
    return response.json()


def mixture_body(mixture: Any, **extra: Any) -> dict[str, Any]:
    return {"structure": mixture.structure, "weights": mixture.weights.tolist(),
            "means": mixture.means.tolist(), "covariances": mixture.covariances.tolist(),
            **extra}
