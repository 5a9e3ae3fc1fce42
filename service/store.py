"""Models and their immutable, numbered versions in Redis (layout in keys.py).

Parameter arrays are stored as raw little-endian float64 bytes. Every multi-key
write is one Lua script on keys of one hash tag, so it is atomic on a single
server and on a Cluster alike.
"""

from __future__ import annotations

import json
import logging
import re
from collections.abc import AsyncIterator, Callable
from contextlib import asynccontextmanager
from dataclasses import dataclass
from datetime import UTC, datetime
from pathlib import Path
from typing import Any, cast

import numpy as np
import redis.asyncio as aioredis

from core import Mixture, TrainingQuantiles, TrainingSample

from .errors import BeingFitted, Conflict, InvalidInput, NotFound, Unavailable, reused_key
from .keys import Keys
from .redis_clients import FAILOVER_ERRORS, outage
from .replicas import ReplicatedWriter

log = logging.getLogger("mixscore.store")
MODEL_NAME = re.compile(r"^[a-z0-9][a-z0-9_.-]{0,63}$")
#: Version of the layout of a version hash. Schema 1 named the shared structure "tied".
RECORD_SCHEMA = "2"
#: Structure names of earlier releases, read as today's (stored versions and queued jobs).
RENAMED_STRUCTURES = {"tied": "shared"}
LUA = Path(__file__).with_name("lua")
#: Attempts at taking the next version number when writers race for it.
CREATE_ATTEMPTS = 20


def check_model_name(name: str) -> str:
    if not MODEL_NAME.match(name):
        raise InvalidInput.field(
            "name", f"{name!r} must match {MODEL_NAME.pattern} (lower-case letters, digits, "
                    "'_', '.', '-'; at most 64 characters)")
    return name


def utc_now() -> str:
    return datetime.now(UTC).isoformat(timespec="milliseconds").replace("+00:00", "Z")


@dataclass(frozen=True)
class VersionRecord:
    """One stored version: parameters, what was learned at fit time, and provenance."""

    mixture: Mixture
    feature_names: list[str] | None
    quantiles: TrainingQuantiles | None
    report: dict[str, Any] | None
    provenance: dict[str, Any]
    source: str
    created_at: str = ""
    #: Training rows kept for the tail fractions of incomplete rows (fitted versions).
    sample: TrainingSample | None = None

    def fields(self, created_at: str) -> dict[str, bytes | str]:
        mixture = self.mixture
        fields: dict[str, bytes | str] = {
            "schema": RECORD_SCHEMA,
            "structure": mixture.structure,
            "components": str(mixture.components),
            "dimension": str(mixture.dimension),
            "weights": _raw(mixture.weights),
            "means": _raw(mixture.means),
            "covariances": _raw(mixture.covariances),
            "feature_names": json.dumps(self.feature_names),
            "report": json.dumps(self.report),
            "provenance": json.dumps(self.provenance),
            "source": self.source,
            "created_at": created_at,
        }
        if self.quantiles is not None:
            fields["quantiles"] = _raw(self.quantiles.values)
            fields["quantiles_mean"] = repr(self.quantiles.mean)
        if self.sample is not None:
            fields["sample"] = _raw(self.sample.rows)
            fields["sample_weights"] = _raw(self.sample.weights)
        return fields

    @classmethod
    def from_fields(cls, fields: dict[bytes, bytes]) -> VersionRecord:
        text = {k.decode(): v for k, v in fields.items()}
        k, d = int(text["components"]), int(text["dimension"])
        structure = current_structure(text["structure"].decode())
        shape = {"full": (k, d, d), "diagonal": (k, d), "spherical": (k,), "shared": (d, d)}
        # Checked again on load: a corrupted record fails here, not while scoring.
        mixture = Mixture(_array(text["weights"], (k,)), _array(text["means"], (k, d)),
                          _array(text["covariances"], shape[structure]), structure)
        quantiles = None
        if "quantiles" in text:
            quantiles = TrainingQuantiles(values=_array(text["quantiles"], (-1,)),
                                          mean=float(text["quantiles_mean"]))
        sample = None
        if "sample" in text:
            sample = TrainingSample(_array(text["sample"], (-1, d)),
                                    _array(text["sample_weights"], (-1,)))
        return cls(
            mixture=mixture,
            sample=sample,
            feature_names=json.loads(text["feature_names"]),
            quantiles=quantiles,
            report=_current_report(json.loads(text["report"])),
            provenance=json.loads(text["provenance"]),
            source=text["source"].decode(),
            created_at=text["created_at"].decode(),
        )


def current_structure(name: str) -> str:
    return RENAMED_STRUCTURES.get(name, name)


def _current_report(report: dict[str, Any] | None) -> dict[str, Any] | None:
    """A stored fit report with today's structure names in its candidate table."""
    for row in (report or {}).get("candidates", []):
        row["structure"] = current_structure(row["structure"])
    return report


def _raw(array: np.ndarray) -> bytes:
    return np.ascontiguousarray(array, dtype="<f8").tobytes()


def _array(raw: bytes, shape: tuple[int, ...]) -> np.ndarray:
    return np.frombuffer(raw, dtype="<f8").reshape(shape).astype(np.float64)


@asynccontextmanager
async def redis_errors() -> AsyncIterator[None]:
    """Storage outages become a 503 problem with Retry-After."""
    try:
        yield
    except Exception as error:
        if not outage(error):
            raise
        if not isinstance(error, FAILOVER_ERRORS):
            log.warning("a Redis call failed inside the client: %r", error)
        raise Unavailable(f"Redis is unreachable ({type(error).__name__}); retry shortly") from None


def script(name: str) -> str:
    """A Lua script of ``lua/``, sent with EVAL: the server caches it, and a replica
    promoted by a failover needs no loading first."""
    return (LUA / f"{name}.lua").read_text()


CREATE_VERSION, SET_SERVING, DELETE_VERSION = (
    script(name) for name in ("create_version", "set_serving", "delete_version"))


@dataclass(frozen=True)
class RequestKey:
    """A request's Idempotency-Key, scoped to its caller and its route (method and path).

    ``digest`` names what the first request made: an HMAC of the route and the header
    keyed by the caller's stored key digest, so another API key, or another path,
    sending the same header gets its own, and no one can derive it (a dataset's id, say)
    from the header alone. ``fingerprint`` is the body's digest, so that a repeat with
    another body behind the same key is refused. ``given`` is the header; None gives a
    fresh key, so that a write repeated inside the service still happens once."""

    digest: str
    fingerprint: str
    given: str | None


class ModelStore:
    def __init__(self, client: aioredis.Redis, keys: Keys, writer: ReplicatedWriter) -> None:
        self.redis = client
        self.keys = keys
        self.writer = writer

    async def create(self, name: str, record: VersionRecord, serve: bool,
                     writer: str, request: RequestKey | None = None) -> tuple[int, int]:
        """Store a new version; returns (its number, the serving number).

        ``writer`` (a job id, or ``import:`` and an import's request key) writes at most
        one version: a repeated call returns the version it already wrote, unless the
        ``request`` behind it is another (422).
        """
        k = self.keys
        created_at = utc_now()
        flat = [item for pair in record.fields(created_at).items() for item in pair]
        async with redis_errors():
            if not await self.redis.sismember(k.models, name):  # listed before it exists
                await self.writer.write(f"the index entry of {name!r}", k.models,
                                        "SADD", k.models, name)
            for _ in range(CREATE_ATTEMPTS):
                latest = int(await self.redis.hget(k.model(name), "latest") or 0)
                number = latest + 1
                reply = await self.writer.write(
                    _written(name), k.model(name), "EVAL", CREATE_VERSION, 4,
                    k.model(name), k.versions(name), k.version(name, number), k.writers(name),
                    number, record.mixture.dimension, "1" if serve else "0", created_at,
                    name, k.events, writer, request.fingerprint if request else "", *flat)
                status = reply[0].decode()
                if status == "reused" and request is not None and request.given:
                    raise reused_key(request.given)
                if status == "ok":
                    return int(reply[1]), int(reply[2])
                if status == "dimension":
                    raise Conflict(
                        f"model {name!r} has dimension {int(reply[1])}; this parameter set "
                        f"has {record.mixture.dimension}")
        raise Conflict(f"could not allocate a version number for {name!r}; retry")

    async def pointer(self, name: str) -> tuple[int | None, int]:
        """(serving version, stamp): the cheap check behind every cached model."""
        async with redis_errors():
            serving, stamp, latest = await self.redis.hmget(
                self.keys.model(name), ["serving", "stamp", "latest"])
        if latest is None:
            raise await self._missing(name)
        return (int(serving) if serving else None), int(stamp or 0)

    async def _missing(self, name: str) -> NotFound:
        """The model does not exist: say so, or name the fit job that will create it."""
        async with redis_errors():
            active = cast(set[bytes], await self.redis.smembers(self.keys.active_jobs(name)))
        if active:
            return BeingFitted(name, min(job.decode() for job in active))
        return NotFound(f"model {name!r} does not exist")

    async def dimension(self, name: str) -> int | None:
        """The model's dimension, or None if it has no version yet (one HGET)."""
        async with redis_errors():
            found = await self.redis.hget(self.keys.model(name), "dimension")
        return int(found) if found is not None else None

    async def latest_feature_names(self, name: str) -> list[str] | None:
        """The feature names of the model's latest version; None without one."""
        async with redis_errors():
            latest = await self.redis.hget(self.keys.model(name), "latest")
            if latest is None:
                return None
            found = await self.redis.hget(self.keys.version(name, int(latest)), "feature_names")
        return None if found is None else cast(list[str] | None, json.loads(found))

    async def load(self, name: str, version: int) -> VersionRecord:
        async with redis_errors():
            fields = cast(dict[bytes, bytes],
                          await self.redis.hgetall(self.keys.version(name, version)))
        if not fields:
            await self.pointer(name)  # 404 for the model first, if it is the model that is missing
            raise NotFound(f"model {name!r} has no version {version}")
        return VersionRecord.from_fields(fields)

    async def model(self, name: str) -> tuple[dict[str, str], list[dict[str, str]]]:
        """The model hash and a summary of each version, oldest first."""
        k = self.keys
        async with redis_errors():
            model = cast(dict[bytes, bytes], await self.redis.hgetall(k.model(name)))
            if not model:
                raise await self._missing(name)
            found = cast(list[bytes], await self.redis.zrange(k.versions(name), 0, -1))
            numbers = [int(n) for n in found]
            async with self.redis.pipeline(transaction=False) as pipe:
                for number in numbers:
                    pipe.hmget(k.version(name, number),
                               ["structure", "components", "source", "created_at"])
                rows = await pipe.execute()
        summaries = [
            {"version": str(number), "structure": current_structure(row[0].decode()),
             "components": row[1].decode(), "source": row[2].decode(),
             "created_at": row[3].decode()}
            for number, row in zip(numbers, rows, strict=True) if row[0] is not None
        ]
        return _text(model), summaries

    async def models(self) -> list[dict[str, str]]:
        k = self.keys
        async with redis_errors():
            members = cast(set[bytes], await self.redis.smembers(k.models))
            names = sorted(n.decode() for n in members)
            async with self.redis.pipeline(transaction=False) as pipe:
                for name in names:
                    pipe.hgetall(k.model(name))
                found = await pipe.execute()
        return [_text(model) for model in found if model]

    async def set_serving(self, name: str, version: int) -> int | None:
        """Promote or roll back; returns the previous serving version."""
        k = self.keys
        async with redis_errors():
            reply = await self.writer.write(
                f"serving version {version} of {name!r}", k.model(name), "EVAL", SET_SERVING,
                2, k.model(name), k.versions(name), version, utc_now(), name, k.events)
        if reply[0] == b"missing":
            await self.pointer(name)
            raise NotFound(f"model {name!r} has no version {version}")
        return int(reply[1]) if reply[1] else None

    async def delete(self, name: str, version: int) -> None:
        k = self.keys
        async with redis_errors():
            reply = await self.writer.write(
                f"the deletion of version {version} of {name!r}", k.model(name), "EVAL",
                DELETE_VERSION, 3, k.model(name), k.versions(name), k.version(name, version),
                version, utc_now(), name, k.events)
        if reply[0] == b"missing":
            await self.pointer(name)
            raise NotFound(f"model {name!r} has no version {version}")
        if reply[0] == b"serving":
            raise Conflict(f"version {version} of {name!r} is serving; promote another "
                           "version before deleting it")


def _written(name: str) -> Callable[[Any], str]:
    """Names, from the create script's reply, the version it wrote (on a repeat, the
    version its writer made first)."""
    return lambda reply: (f"version {int(reply[1])} of {name!r}" if reply[0] == b"ok"
                          else f"a new version of {name!r}")


def _text(fields: dict[bytes, bytes]) -> dict[str, str]:
    return {key.decode(): value.decode() for key, value in fields.items()}
