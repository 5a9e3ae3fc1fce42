"""The fit worker: claim -> load -> fit (in a thread) -> store -> acknowledge.

While a fit runs, a heartbeat on the event loop keeps the stream entry claimed,
writes progress (a few times a second at most) and reads the cancel flag. The fit
thread and the loop share only a small ``Control``. SIGTERM hands the current job
back to the queue at the end of the running EM iteration; a worker that dies
without a word loses its entry to another worker after MIXSCORE_JOB_CLAIM_IDLE_S. One
that was only silent (stopped, swapped out) and comes back learns at its next beat or
write that the job is no longer its own (``JobLost``), and leaves it alone.
"""

from __future__ import annotations

import asyncio
import contextlib
import hashlib
import logging
import os
import signal
import socket
import threading
import time
from collections.abc import Awaitable, Callable, Iterator
from dataclasses import asdict
from importlib.metadata import version
from typing import Any

import msgspec
import numpy as np
from prometheus_client import start_http_server
from redis.exceptions import RedisError
from threadpoolctl import threadpool_limits

from core import DistributedData, FitProgress, FitResult, as_source, fit, select

from .datasets import StoredChunks, dataset_keys
from .distributed import DaskSource, EngineError, connect
from .errors import ServiceError, Unavailable, dimension_over
from .jobs import Claimed, FitSpec, JobLost, JobStore
from .keys import Keys
from .metrics import FIT_DURATION, FIT_JOBS, JOBS_WAITING
from .redis_clients import async_client, close, outage
from .replicas import ReplicatedWriter
from .schemas import JobProblem, JobProgress
from .settings import Settings
from .sources import Source, SourceError, SourceForbidden, open_source, roots_of
from .store import ModelStore, VersionRecord, utc_now

log = logging.getLogger("mixscore.worker")
#: How often progress is written and the cancel flag read while a fit runs.
PROGRESS_INTERVAL_S = 0.25
#: Longest wait for the heartbeat to notice that its job is over.
HEARTBEAT_STOP_S = 2.0
#: How long one read of the stream waits for a new job.
BLOCK_MS = 1000
#: Recorded in every version's provenance; read once (looking it up scans site-packages).
SOFTWARE_VERSION = version("mixscore")
#: Pause before trying Redis again after losing it.
REDIS_RETRY_S = 1.0
#: How long a finished fit keeps trying to store its version while Redis fails over
#: (the write is idempotent by job id); past that the job stays pending and is rerun.
WRITE_RETRY_S = 60.0


class JobCancelled(Exception):
    """The job's cancel flag was set while it ran."""


class HandBack(Exception):
    """The worker is stopping: return the job to the queue."""


class FitFailed(Exception):
    """The fit raised something other than the core's ValueError: the job fails with
    its cause named (never an outage, whatever the cause's type)."""


class Control:
    """What the fit thread and the event loop share."""

    def __init__(self, stopping: bool = False) -> None:
        self.cancelled = False
        self.stopping = stopping
        self.lost: JobLost | None = None
        self.progress: JobProgress | None = None
        self._lock = threading.Lock()

    def check(self) -> None:
        """Stop the fit here if the job was cancelled or taken over, or the worker is
        stopping."""
        if self.lost is not None:
            raise self.lost
        if self.cancelled:
            raise JobCancelled
        if self.stopping:
            raise HandBack

    def report(self, progress: FitProgress) -> None:
        """The EM progress callback: note progress, stop if asked to."""
        with self._lock:
            self.progress = JobProgress(progress.candidate, progress.candidates,
                                        progress.restart, progress.iteration,
                                        progress.log_likelihood)
        self.check()


class Checked:
    """The rows of a fit as a re-iterable source of (rows, weights) chunks that checks
    ``control`` before each chunk, so a stop or a cancel lands within a chunk's time in
    every pass (the summary pass too), not only between EM iterations. The chunks are
    the core's own (``as_source``), so the fit is the one the data give."""

    def __init__(self, data: Any, weights: np.ndarray | None, control: Control) -> None:
        self.chunks, self.control = as_source(data, weights), control

    def __iter__(self) -> Iterator[Any]:
        for chunk in self.chunks:
            self.control.check()
            yield chunk


def fit_job(spec: FitSpec, X: Any, weights: np.ndarray | None,
            control: Control) -> tuple[FitResult, list[dict[str, Any]]]:
    """The same call a user would make to the core, so results match it exactly."""
    if not isinstance(X, DistributedData):  # its passes run elsewhere, checked per pass
        X, weights = Checked(X, weights, control), None
    options: dict[str, Any] = dict(restarts=spec.restarts, max_iterations=spec.max_iterations,
                   tolerance=spec.tolerance, ridge=spec.ridge, init=spec.init, seed=spec.seed,
                   weights=weights, resolution=spec.resolution, progress=control.report)
    if len(spec.components) == 1 and len(spec.structures) == 1:
        result = fit(X, components=spec.components[0], structure=spec.structures[0], **options)
        table = [{"components": spec.components[0], "structure": spec.structures[0],
                  "log_likelihood": result.log_likelihood, "bic": result.bic,
                  "aic": result.aic, "parameter_count": result.parameter_count,
                  "converged": result.converged, "degenerate": result.degenerate,
                  "held": len(result.held)}]
        return result, table
    selection = select(X, components=spec.components, structures=spec.structures,
                       criterion=spec.criterion, **options)
    return selection.best, [asdict(row) for row in selection.table]


def data_digest(data: Any, weights: np.ndarray | None) -> str:
    """sha256 of the training rows as little-endian float64 (then of the weights)."""
    digest = hashlib.sha256()
    for chunk in data if isinstance(data, StoredChunks) else [data]:
        digest.update(np.ascontiguousarray(chunk, dtype="<f8").tobytes())
    if weights is not None:
        digest.update(np.ascontiguousarray(weights, dtype="<f8").tobytes())
    return digest.hexdigest()


def version_record(job_id: str, spec: FitSpec, digest: str, result: FitResult,
                   table: list[dict[str, Any]], read: dict[str, Any] | None = None
                   ) -> VersionRecord:
    """``read``: what reading a source found (rows read and skipped, its fingerprint)."""
    options = {key: value for key, value in msgspec.to_builtins(spec).items()
               if key not in ("model", "feature_names", "rows", "dimension")}
    return VersionRecord(
        mixture=result.mixture, feature_names=spec.feature_names, quantiles=result.quantiles,
        sample=result.sample,
        report={**result.report(), "criterion": spec.criterion, "candidates": table},
        provenance={"job": job_id, "data_sha256": digest, "rows": spec.rows,
                    "dataset": spec.dataset, **(read or {}),
                    "seed": spec.seed, "options": options,
                    "software_version": SOFTWARE_VERSION, "fitted_at": utc_now()},
        source="fit")


def source_description(source: Source) -> dict[str, Any]:
    """What the provenance keeps of a source: its files' identities, not their bytes."""
    return {"format": source.format, "columns": source.columns,
            "fingerprint": source.fingerprint,
            "files": [{"path": f.path, "size": f.size, "modified": f.modified}
                      for f in source.files]}


def redis_outage(error: Exception) -> bool:
    """Redis could not answer (the store's 503, or the client's own error): wait and
    try again, the job is still pending."""
    return isinstance(error, Unavailable) or outage(error)


def failure(error: Exception) -> tuple[int, str, str]:
    """The status, title and detail of the problem a job fails with."""
    if isinstance(error, ValueError):  # the core's word on bad data or options
        return 422, "The data cannot be fitted", str(error)
    if isinstance(error, EngineError):
        return 503, "The distributed engine failed", str(error)
    if isinstance(error, ServiceError):  # say, a version of another dimension meanwhile
        return error.status, error.title, error.detail
    cause = error.__cause__ if isinstance(error, FitFailed) and error.__cause__ else error
    return 500, "The fit job failed", f"{type(cause).__name__}: {cause}"


class Worker:
    def __init__(self, settings: Settings, consumer: str | None = None) -> None:
        self.settings = settings
        self.consumer = consumer or f"{socket.gethostname()}-{os.getpid()}"
        self.client = async_client(settings)
        keys = Keys(settings.key_prefix)
        writer = ReplicatedWriter.from_settings(self.client, settings)
        self.jobs = JobStore(self.client, keys, writer, settings.job_retention_s)
        self.models = ModelStore(self.client, keys, writer)
        self.stop = asyncio.Event()
        self.control: Control | None = None

    def request_stop(self) -> None:
        self.stop.set()
        if self.control is not None:
            self.control.stopping = True

    async def run(self, until_empty: bool = False) -> None:
        """Take jobs until stopped (or, with ``until_empty``, until no job is queued or held
        by any worker, so that a dead worker's job is still seen through)."""
        idle_ms = int(self.settings.job_claim_idle_s * 1000)
        log.info("worker %s taking fit jobs", self.consumer)
        connected = False
        try:
            while not self.stop.is_set():
                try:
                    if not connected:
                        await self.jobs.ensure_group()
                        connected = True
                    claimed = await self.jobs.claim(self.consumer, idle_ms, BLOCK_MS)
                    JOBS_WAITING.set(await self.jobs.waiting())
                    if claimed is None:
                        if until_empty:
                            held = await self.jobs.pending()
                            if not held:
                                return  # nothing new and nothing in flight anywhere
                            log.info("waiting for %d job(s) held by other workers", held)
                        continue
                    await self.process(claimed)
                except Exception as error:
                    if redis_outage(error):
                        # Redis restarting, loading its data or failing over: wait and go
                        # on; a job that was running is still pending and is taken again.
                        log.warning("Redis unreachable (%s); retrying in %g s",
                                    type(error).__name__, REDIS_RETRY_S)
                    else:  # even failing a job failed: it stays pending, to be retried
                        log.exception("the worker met an error it could not record")
                    connected = False
                    await self.pause()
        finally:
            await close(self.client)

    async def process(self, claimed: Claimed) -> None:
        """One job, to its end: whatever fails it fails the job with a problem naming
        the cause, and the worker takes the next one. Only Redis being unreachable
        leaves the job pending (it is taken again once Redis answers)."""
        try:
            try:
                await self.run_job(claimed)
            except JobLost:
                raise
            except Exception as error:
                if redis_outage(error):
                    raise
                log.exception("job %s failed", claimed.job_id)
                await self.fail(claimed, *failure(error))
        except JobLost as lost:
            if lost.taken:  # the entry is the other worker's now: not ours to acknowledge
                log.warning("%s; this worker leaves it", lost)
                return
            log.info("%s", lost)
            await self.jobs.ack(claimed)

    async def run_job(self, claimed: Claimed) -> None:
        spec, X, weights, state = await self.jobs.load(claimed.job_id)
        if state.get("cancel"):
            await self.jobs.finish(claimed, "cancelled")
            await self.jobs.ack(claimed)
            return
        attempts = await self.jobs.start(claimed)  # JobLost if it has ended
        if attempts > self.settings.job_max_attempts:
            await self.fail(claimed, 500, "Gave up", f"the job was started {attempts - 1} times "
                            "and its worker stopped each time (MIXSCORE_JOB_MAX_ATTEMPTS)")
            return
        log.info("job %s: fitting %s (attempt %d)", claimed.job_id, spec.model, attempts)
        found = await self.training_data(claimed, spec, X)
        if found is None:
            return
        spec, data = found
        # A stop that came before the fit began is kept: the fit hands back at once.
        self.control = control = Control(stopping=self.stop.is_set())
        done = asyncio.Event()
        beat = asyncio.create_task(self.heartbeat(claimed, control, done))
        started = time.perf_counter()
        try:
            try:
                result, table = await asyncio.to_thread(self.guarded_fit, spec, data, weights,
                                                        control)
            finally:
                FIT_DURATION.observe(time.perf_counter() - started)
            await self.storing(lambda: self.write_version(claimed, spec, data, weights, result,
                                                          table, control))
        except JobCancelled:
            await self.jobs.finish(claimed, "cancelled")
            await self.jobs.ack(claimed)
            FIT_JOBS.labels("cancelled").inc()
        except HandBack:
            await self.jobs.hand_back(claimed)
            FIT_JOBS.labels("handed_back").inc()
            log.info("job %s handed back to the queue", claimed.job_id)
        finally:
            if isinstance(data, StoredChunks):
                data.close()
            self.control = None
            done.set()
            await asyncio.wait([beat], timeout=HEARTBEAT_STOP_S)
            beat.cancel()  # only if a beat hangs: the flag is what stops the loop

    async def storing(self, write: Callable[[], Awaitable[None]]) -> None:
        """``write`` again while Redis is unreachable or failing over, for up to
        WRITE_RETRY_S, so a finished fit is not thrown away by a failover."""
        deadline = time.monotonic() + WRITE_RETRY_S
        while True:
            try:
                await write()
                return
            except Exception as error:
                if not redis_outage(error) or time.monotonic() > deadline or self.stop.is_set():
                    raise
                log.warning("storing the result failed (%s); retrying in %g s",
                            type(error).__name__, REDIS_RETRY_S)
                await self.pause()

    async def pause(self) -> None:
        """REDIS_RETRY_S before trying Redis again, cut short by a stop request."""
        with contextlib.suppress(TimeoutError):
            await asyncio.wait_for(self.stop.wait(), REDIS_RETRY_S)

    async def training_data(self, claimed: Claimed, spec: FitSpec, X: np.ndarray | None
                            ) -> tuple[FitSpec, Any] | None:
        """The job's rows (inline, a dataset or a source) and its spec completed from the
        source's columns; None when the job failed for its source."""
        if X is not None:
            return spec, X
        if spec.source is None:
            where = await dataset_keys(self.client, self.jobs.keys, str(spec.dataset))
            return spec, StoredChunks(self.settings, where.chunks, spec.dimension)
        source = await self.open_source(claimed, spec)
        if source is None:
            return None
        return msgspec.structs.replace(spec, dimension=len(source.columns),
                                       feature_names=spec.feature_names or source.columns), source

    def guarded_fit(self, spec: FitSpec, data: Any, weights: np.ndarray | None,
                    control: Control) -> tuple[FitResult, list[dict[str, Any]]]:
        """``fit_job`` in the fitting thread, its errors sorted for the event loop: the
        core's ValueError, a stop, a cancel, the Dask cluster and Redis (a dataset's
        chunks) as they are; anything else as FitFailed. StopIteration in particular
        must not leave the thread: a future cannot carry it, and the await would wait
        forever."""
        try:
            return self.fit_job(spec, data, weights, control)
        except (ValueError, JobCancelled, JobLost, HandBack, EngineError, RedisError):
            raise
        except OSError as error:
            if isinstance(data, Source) and self.settings.dask_scheduler:
                raise EngineError(f"the Dask cluster failed during the fit: {error}") from None
            raise FitFailed from error
        except Exception as error:
            raise FitFailed from error

    def fit_job(self, spec: FitSpec, data: Any, weights: np.ndarray | None, control: Control
                ) -> tuple[FitResult, list[dict[str, Any]]]:
        """``fit_job``, with a source's passes on Dask when MIXSCORE_DASK_SCHEDULER is set."""
        if not (isinstance(data, Source) and self.settings.dask_scheduler):
            return fit_job(spec, data, weights, control)
        with connect(self.settings.dask_scheduler) as client:
            log.info("passes on the Dask scheduler at %s", self.settings.dask_scheduler)
            return fit_job(spec, DaskSource(client, data), weights, control)

    async def write_version(self, claimed: Claimed, spec: FitSpec, data: Any,
                            weights: np.ndarray | None, result: FitResult,
                            table: list[dict[str, Any]], control: Control) -> None:
        read, rows = None, None
        if isinstance(data, Source):  # its files' identities, not terabytes of bytes
            digest = data.fingerprint
            rows = (data.rows_read, data.rows_skipped)
            spec = msgspec.structs.replace(spec, rows=data.rows_read - data.rows_skipped)
            read = {"source": source_description(data), "rows_read": data.rows_read,
                    "rows_skipped": data.rows_skipped}
        else:
            digest = await asyncio.to_thread(data_digest, data, weights)
        if spec.feature_names is None:  # the model's names carry over (same dimension)
            spec = msgspec.structs.replace(
                spec, feature_names=await self.models.latest_feature_names(spec.model))
        record = version_record(claimed.job_id, spec, digest, result, table, read)
        number, _ = await self.models.create(spec.model, record, spec.serve,
                                             writer=claimed.job_id)
        await self.jobs.finish(claimed, "succeeded", version=number,
                               progress=control.progress, rows=rows)
        await self.jobs.ack(claimed)
        FIT_JOBS.labels("succeeded").inc()
        log.info("job %s: version %d of %s", claimed.job_id, number, spec.model)

    async def open_source(self, claimed: Claimed, spec: FitSpec) -> Source | None:
        """The job's source, opened and checked (roots again, files, schema, the model's
        dimension); None when the job failed for it."""
        assert spec.source is not None
        try:
            source = await asyncio.to_thread(
                open_source, spec.source.uri, spec.source.format, spec.source.columns,
                roots_of(self.settings.source_roots))
        except SourceForbidden as error:
            await self.fail(claimed, 403, "The source is outside the allowed roots", str(error))
            return None
        except SourceError as error:
            await self.fail(claimed, 422, "The source cannot be read", str(error))
            return None
        if len(source.columns) > self.settings.max_dimension:
            await self.fail(claimed, 413, "The source has too many columns",
                            dimension_over(len(source.columns), self.settings.max_dimension))
            return None
        existing = await self.models.dimension(spec.model)
        if existing is not None and existing != len(source.columns):
            await self.fail(claimed, 409, "The source does not fit the model",
                            f"model {spec.model!r} has dimension {existing}; the source has "
                            f"{len(source.columns)} columns ({', '.join(source.columns)})")
            return None
        return source

    async def fail(self, claimed: Claimed, status: int, title: str, detail: str) -> None:
        problem = JobProblem(type="urn:mixscore:problem:fit-failed", title=title,
                             status=status, detail=detail)
        await self.jobs.finish(claimed, "failed", problem=problem)
        await self.jobs.ack(claimed)
        FIT_JOBS.labels("failed").inc()
        log.warning("job %s failed: %s", claimed.job_id, detail)

    async def heartbeat(self, claimed: Claimed, control: Control, done: asyncio.Event) -> None:
        """Progress and cancel checks every PROGRESS_INTERVAL_S until ``done``; the XCLAIM
        inside keeps the entry's idle time near zero, far below the claim threshold.

        It stops on the flag, not on a task cancel: redis-py can turn a cancel that lands
        in its timeout handling into an ordinary error, which a beat must survive.
        """
        while not done.is_set():
            try:
                if await self.jobs.heartbeat(claimed, control.progress):
                    control.cancelled = True
            except JobLost as lost:  # the fit stops at its next check
                control.lost = lost
                return
            except Exception as error:  # a missed beat is retried next time
                log.debug("job %s: a beat failed: %s", claimed.job_id, error)
            with contextlib.suppress(TimeoutError):
                await asyncio.wait_for(done.wait(), PROGRESS_INTERVAL_S)


def serve_metrics(settings: Settings) -> None:
    """This worker's /metrics for Prometheus; a taken port (two workers on one host) is
    logged, not fatal."""
    try:
        start_http_server(settings.worker_metrics_port, addr=settings.host)
    except OSError as error:
        log.warning("no /metrics for this worker: port %d on %s (%s)",
                    settings.worker_metrics_port, settings.host, error)
        return
    log.info("worker metrics on http://%s:%d/metrics", settings.host,
             settings.worker_metrics_port)


def run_worker(settings: Settings, until_empty: bool) -> int:
    serve_metrics(settings)
    # More BLAS threads only compete with the E-step's own (loadtests/bench_fit_threads.py).
    threadpool_limits(limits=settings.fit_blas_threads, user_api="blas")

    async def main() -> None:
        worker = Worker(settings)
        loop = asyncio.get_running_loop()
        for signum in (signal.SIGTERM, signal.SIGINT):
            loop.add_signal_handler(signum, worker.request_stop)
        await worker.run(until_empty=until_empty)

    asyncio.run(main())
    return 0
