"""Fit jobs in Redis: the job hash, the stream that workers read, and idempotency.

A job's life: ``queued`` (hash written, stream entry added in one transaction),
``running`` (a worker took it; ``attempts`` counts its runs), then ``succeeded``,
``failed`` or ``cancelled``. Delivery is at least once: an entry whose worker
falls silent for ``MIXSCORE_JOB_CLAIM_IDLE_S`` is claimed by another worker.

The states move in Redis scripts only: a final state is final, a cancel is one step,
and a worker changes a job only while its stream entry is pending in the worker's own
name, so that a worker that was silent and comes back cannot take back, end or queue
again a job another worker took over (``JobLost``).
"""

from __future__ import annotations

import secrets
import time
from dataclasses import dataclass
from typing import Any, cast

import msgspec
import numpy as np
import redis.asyncio as aioredis
from redis.exceptions import ResponseError

from .errors import Conflict, NotFound, NotReplicated, TooManyRequests, reused_key
from .keys import Keys
from .replicas import ReplicatedWriter
from .schemas import FitSource, Job, JobProblem, JobProgress, JobState
from .store import RequestKey, current_structure, redis_errors, script, utc_now

#: Jobs kept in the listing index; older ids drop out of ``GET /v1/jobs``.
RECENT_JOBS = 10_000
IDEMPOTENCY_TTL_S = 24 * 3600
#: Retry-After of a submission refused for the model's number of active jobs.
ACTIVE_RETRY_AFTER_S = 30


class FitSpec(msgspec.Struct, frozen=True):
    """Everything a worker needs besides the data, fixed at submission (seed included,
    so that every run of the job fits the same model)."""

    model: str
    components: list[int]
    structures: list[str]
    criterion: str
    restarts: int
    max_iterations: int
    tolerance: float
    ridge: float
    init: str
    seed: int
    serve: bool
    feature_names: list[str] | None
    rows: int
    dimension: int
    weighted: bool
    dataset: str | None = None
    resolution: list[float] | None = None
    source: FitSource | None = None  # rows and dimension 0 until the worker reads it


@dataclass(frozen=True)
class Claimed:
    """A stream entry a worker (``consumer``) holds, and its job."""

    entry: str
    job_id: str
    consumer: str


class JobLost(Exception):
    """The job is no longer this worker's to change: another worker took its entry over
    (``taken``), or it has ended (its final ``state``)."""

    def __init__(self, job_id: str, reply: list[bytes]) -> None:
        self.taken = reply[0] == b"lost"
        self.state = reply[1].decode() if len(reply) > 1 else None
        super().__init__(f"job {job_id} was taken over by another worker" if self.taken
                         else f"job {job_id} has already {self.state}")


QUEUE_JOB, FINISH_JOB = script("queue_job"), script("finish_job")
CANCEL_JOB, HOLD_JOB = script("cancel_job"), script("hold_job")


class JobStore:
    def __init__(self, client: aioredis.Redis, keys: Keys, writer: ReplicatedWriter,
                 retention_s: float) -> None:
        self.redis = client
        self.keys = keys
        self.writer = writer
        #: How long a finished job's record is kept (MIXSCORE_JOB_RETENTION_S).
        self.retention_s = max(1, round(retention_s))

    async def submit(self, spec: FitSpec, X: np.ndarray | None, weights: np.ndarray | None,
                     request: RequestKey, max_active: int) -> tuple[str, bool]:
        """Queue a job; returns (job id, whether it is new). A repeated request (its
        Idempotency-Key) within 24 hours returns the first job instead of queueing
        another; another request with the key is a 422. A model with ``max_active`` jobs
        queued or running gets a 429.

        Inline rows go under the job's own hash tag first, so that ``{jobs}`` holds only
        small records: on a Cluster, rows of many jobs spread over the nodes."""
        k = self.keys
        job_id = secrets.token_hex(12)
        data: list[Any] = []
        if X is not None:
            data += ["points", np.ascontiguousarray(X, dtype="<f8").tobytes()]
        if weights is not None:
            data += ["weights", np.ascontiguousarray(weights, dtype="<f8").tobytes()]
        fields = {"id": job_id, "model": spec.model, "state": "queued", "attempts": 0,
                  "created_at": utc_now(), "spec": msgspec.msgpack.encode(spec)}
        given = request.given is not None
        request_key = k.idempotency(request.digest)
        async with redis_errors():
            if given and await self.redis.exists(request_key):
                data = []  # queued before: only confirm it below
            if data:
                try:
                    await self.writer.write(f"the rows of fit job {job_id}",
                                            k.job_data(job_id), "HSET", k.job_data(job_id),
                                            *data)
                except NotReplicated:  # no job will read them: a repeat writes its own
                    await self.redis.delete(k.job_data(job_id))
                    raise
            reply = await self.writer.write(
                f"fit job {job_id}", k.job(job_id), "EVAL", QUEUE_JOB, 5, k.job(job_id),
                k.recent_jobs, k.active_jobs(spec.model), k.jobs, request_key, job_id,
                time.time(), RECENT_JOBS, max_active, IDEMPOTENCY_TTL_S if given else "",
                request.fingerprint,
                *(item for pair in fields.items() for item in pair))
            status = reply[0].decode()
            if status != "queued" and data:
                await self.redis.delete(k.job_data(job_id))
        if status == "reused" and request.given:
            raise reused_key(request.given)
        if status == "full":
            raise TooManyRequests(
                f"model {spec.model!r} has {int(reply[1])} fit jobs queued or running, the "
                f"limit (MIXSCORE_MAX_JOBS_PER_MODEL); retry when one ends",
                ACTIVE_RETRY_AFTER_S)
        if status == "existing":
            return reply[1].decode(), False
        return job_id, True

    async def get(self, job_id: str) -> Job:
        async with redis_errors():
            fields = await self.redis.hmget(self.keys.job(job_id), list(_JOB_FIELDS))
        if fields[0] is None:
            raise NotFound(f"job {job_id!r} does not exist")
        return _job(dict(zip(_JOB_FIELDS, fields, strict=True)))

    async def list(self, model: str | None, state: str | None, limit: int = 100) -> list[Job]:
        async with redis_errors():
            ids = cast(list[bytes],
                       await self.redis.zrevrange(self.keys.recent_jobs, 0, RECENT_JOBS))
            async with self.redis.pipeline(transaction=False) as pipe:
                for job_id in ids:
                    pipe.hmget(self.keys.job(job_id.decode()), list(_JOB_FIELDS))
                rows = await pipe.execute()
        jobs = [_job(dict(zip(_JOB_FIELDS, row, strict=True))) for row in rows if row[0]]
        return [job for job in jobs
                if (model is None or job.model == model) and (state is None or job.state == state)
                ][:limit]

    async def cancel(self, job_id: str) -> Job:
        """Cancel at once if queued; ask the worker to stop if running (one script)."""
        k = self.keys
        job = await self.get(job_id)
        async with redis_errors():
            reply = await self.writer.write(
                f"the cancellation of fit job {job_id}", k.job(job_id), "EVAL", CANCEL_JOB, 2,
                k.job(job_id), k.active_jobs(job.model), job_id, self.retention_s, utc_now())
        if reply[0] == b"missing":
            raise NotFound(f"job {job_id!r} does not exist")
        if reply[0] == b"final":
            raise Conflict(f"job {job_id!r} has already {reply[1].decode()}")
        return await self.get(job_id)

    # -- the worker's side -------------------------------------------------------------

    async def ensure_group(self) -> None:
        try:
            await self.redis.xgroup_create(self.keys.jobs, self.keys.workers_group, id="0",
                                           mkstream=True)
        except ResponseError as error:
            if "BUSYGROUP" not in str(error):
                raise

    async def claim(self, consumer: str, idle_ms: int, block_ms: int) -> Claimed | None:
        """An entry of our own that nobody works on, then one abandoned by a silent worker,
        else a new one (blocking).

        A worker claims only between jobs, so an entry already pending in its own name is
        orphaned: its delivery reply was lost (a command retried after a timeout). Taking
        it at once saves waiting out the claim interval.
        """
        k = self.keys
        own = await self.redis.xpending_range(k.jobs, k.workers_group, min="-", max="+",
                                              count=1, consumername=consumer)
        reply = await self.redis.xautoclaim(k.jobs, k.workers_group, consumer,
                                            0 if own else idle_ms,
                                            start_id=own[0]["message_id"] if own else "0-0",
                                            count=1)
        # Redis 6.2 answers (cursor, entries), 7.0 adds deleted ids: read by index. An
        # entry deleted from the stream but still pending comes back without fields on
        # 6.2: acknowledge it so that it stops counting as in flight.
        entries = [entry for entry in reply[1] if entry[1]]
        for entry_id, fields in reply[1]:
            if not fields:
                await self.redis.xack(k.jobs, k.workers_group, entry_id)
        if not entries:
            found: Any = await self.redis.xreadgroup(k.workers_group, consumer, {k.jobs: ">"},
                                                     count=1, block=block_ms)
            entries = found[0][1] if found else []
        if not entries:
            return None
        entry_id, values = entries[0]
        return Claimed(entry_id.decode(), values[b"job"].decode(), consumer)

    async def waiting(self) -> int:
        """Entries not yet delivered to any worker (acknowledged entries are deleted)."""
        async with self.redis.pipeline(transaction=False) as pipe:
            pipe.xlen(self.keys.jobs)
            pipe.xpending(self.keys.jobs, self.keys.workers_group)
            length, summary = await pipe.execute()
        return max(int(length) - int(summary["pending"]), 0)

    async def pending(self) -> int:
        """Entries delivered to some worker and not yet acknowledged."""
        summary: Any = await self.redis.xpending(self.keys.jobs, self.keys.workers_group)
        return int(summary["pending"])

    async def load(self, job_id: str) -> tuple[FitSpec, np.ndarray | None, np.ndarray | None,
                                                dict[str, str]]:
        """The spec, the inline rows (None for a dataset job), weights and state fields."""
        fields = cast(dict[bytes, bytes], await self.redis.hgetall(self.keys.job(job_id)))
        spec = msgspec.msgpack.decode(fields[b"spec"], type=FitSpec)
        if b"points" not in fields and spec.dataset is None and spec.source is None:
            # Inline rows under the job's own tag (jobs of earlier releases kept them here).
            fields |= cast(dict[bytes, bytes],
                           await self.redis.hgetall(self.keys.job_data(job_id)))
        spec = msgspec.structs.replace(
            spec, structures=[current_structure(name) for name in spec.structures])
        X = (np.frombuffer(fields[b"points"], dtype="<f8").reshape(spec.rows, spec.dimension)
             if b"points" in fields else None)
        weights = (np.frombuffer(fields[b"weights"], dtype="<f8")
                   if b"weights" in fields else None)
        state = {key.decode(): value.decode() for key, value in fields.items()
                 if key in (b"state", b"cancel", b"attempts")}
        return spec, X, weights, state

    async def start(self, claimed: Claimed) -> int:
        """Mark the job running; returns this run's attempt number."""
        return int(await self._hold(claimed, "start", utc_now()))

    async def heartbeat(self, claimed: Claimed, progress: JobProgress | None) -> bool:
        """Keep the entry ours (reset its idle time), store progress; True if cancelled."""
        extra = [msgspec.json.encode(progress)] if progress is not None else []
        return await self._hold(claimed, "beat", *extra) != b""

    async def _hold(self, claimed: Claimed, action: str, *extra: Any) -> Any:
        """``hold_job.lua``'s ``action`` while the entry is ours; JobLost otherwise."""
        k = self.keys
        reply = await self.redis.eval(HOLD_JOB, 2, k.jobs, k.job(claimed.job_id),
                                      claimed.entry, k.workers_group, claimed.consumer,
                                      action, *extra)
        if reply[0] != b"ours":
            raise JobLost(claimed.job_id, reply)
        return reply[1]

    async def finish(self, claimed: Claimed, state: JobState, version: int | None = None,
                     problem: JobProblem | None = None,
                     progress: JobProgress | None = None,
                     rows: tuple[int, int] | None = None) -> None:
        """End the job (JobLost if it is no longer ours). ``rows``: rows read from the
        job's source, and how many were skipped."""
        job_id = claimed.job_id
        fields: dict[str, str | bytes | int] = {"state": state, "finished_at": utc_now()}
        if rows is not None:
            fields["rows_read"], fields["rows_skipped"] = rows
        if progress is not None:  # the last word, even when the fit beat the heartbeat
            fields["progress"] = msgspec.json.encode(progress)
        if version is not None:
            fields["version"] = version
        if problem is not None:
            fields["problem"] = msgspec.json.encode(problem)
        model = cast(bytes, await self.redis.hget(self.keys.job(job_id), "model")).decode()
        k = self.keys
        reply = await self.writer.write(
            f"the {state} state of fit job {job_id}", k.job(job_id), "EVAL", FINISH_JOB, 3,
            k.job(job_id), k.active_jobs(model), k.jobs, job_id, self.retention_s,
            claimed.entry, k.workers_group, claimed.consumer,
            *(item for pair in fields.items() for item in pair))
        if reply[0] != b"ok":
            raise JobLost(job_id, reply)
        # Its rows are no longer needed once its end is on the replicas too.
        await self.redis.delete(self.keys.job_data(job_id))

    async def ack(self, claimed: Claimed) -> None:
        """Done with the entry: acknowledge and delete it (XACK alone keeps it)."""
        async with self.redis.pipeline(transaction=True) as pipe:
            pipe.xack(self.keys.jobs, self.keys.workers_group, claimed.entry)
            pipe.xdel(self.keys.jobs, claimed.entry)
            await pipe.execute()

    async def hand_back(self, claimed: Claimed) -> None:
        """A stopping worker returns its job to the queue for another worker, at once."""
        await self._hold(claimed, "hand back", claimed.job_id)


_JOB_FIELDS = ("id", "model", "state", "attempts", "created_at", "started_at", "finished_at",
               "progress", "rows_read", "rows_skipped", "version", "problem")


def _job(fields: dict[str, Any]) -> Job:
    text = {key: value.decode() if isinstance(value, bytes) else value
            for key, value in fields.items()}
    return Job(
        id=text["id"], model=text["model"], state=cast(JobState, text["state"]),
        attempts=int(text["attempts"] or 0), created_at=text["created_at"],
        started_at=text["started_at"], finished_at=text["finished_at"],
        progress=msgspec.json.decode(text["progress"], type=JobProgress)
        if text["progress"] else None,
        rows_read=int(text["rows_read"]) if text["rows_read"] else None,
        rows_skipped=int(text["rows_skipped"]) if text["rows_skipped"] else None,
        version=int(text["version"]) if text["version"] else None,
        problem=msgspec.json.decode(text["problem"], type=JobProblem)
        if text["problem"] else None,
    )
