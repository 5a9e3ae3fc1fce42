"""A Python client for pipelines: numpy arrays in and out, MessagePack on the wire.

    from service.client import Client

    with Client("http://127.0.0.1:8000", api_key="msk.pipeline.…") as mixscore:
        job = mixscore.fit("turbines", X, components=(1, 8), structure=["full", "diagonal"],
                           serve=True, progress=print)
        scores = mixscore.log_density("turbines", X_new)
        scores.log_density, scores.tail_fraction   # numpy arrays
        why = mixscore.explain("turbines", {"power_kw": [1750.0], "oil_temp_c": [80.0]})
        why.feature_names[why.most_unusual[0]]     # "oil_temp_c"

Points are rows in the model's feature order (an array), or columns by feature name (a
mapping of name to values, or a pandas DataFrame), sent as records.

``AsyncClient`` has the same methods, to be awaited. Every error answer raises a
``ProblemError`` subclass chosen by status, carrying the RFC 9457 problem as a dict.
"""

from __future__ import annotations

import asyncio
import functools
import time
import uuid
from collections.abc import Callable, Sequence
from dataclasses import dataclass, field
from typing import Any

import httpx
import msgspec
import numpy as np

from . import schemas
from .codec import pack

MSGPACK = "application/msgpack"
#: Rows per dataset chunk: about 3 MiB of float64 for 8 features, well under body limits.
CHUNK_ROWS = 50_000
POLL_S = 0.2
#: Sends of a write that the replicas do not confirm in time, before raising.
REPLICATION_ATTEMPTS = 5
NOT_REPLICATED = "urn:mixscore:problem:not-replicated"
FINISHED = ("succeeded", "failed", "cancelled")


class ProblemError(Exception):
    """An error answer; ``problem`` is its RFC 9457 body (type, title, status, detail,
    and ``errors`` naming fields for invalid input)."""

    def __init__(self, problem: dict[str, Any], retry_after_s: float | None = None) -> None:
        super().__init__(f"{problem.get('status')} {problem.get('title')}: "
                         f"{problem.get('detail')}")
        self.problem = problem
        self.status = int(problem.get("status", 0))
        self.retry_after_s = retry_after_s


class InvalidInputError(ProblemError):
    """400, 406, 413, 415, 422: the request must change."""


class AuthError(ProblemError):
    """401 or 403: a missing or wrong key, or a key without the scope."""


class NotFoundError(ProblemError):
    """404: no such model, version, job or dataset."""


class ConflictError(ProblemError):
    """409: the state changed under the request (for example a serving version)."""


class RateLimitedError(ProblemError):
    """429: wait ``retry_after_s``."""


class UnavailableError(ProblemError):
    """503: Redis is unreachable; retry after ``retry_after_s``."""


class JobFailedError(ProblemError):
    """A fit job waited for ended failed or cancelled; ``job`` is its last state."""

    def __init__(self, job: schemas.Job) -> None:
        problem = msgspec.structs.asdict(job.problem) if job.problem else {
            "status": 0, "title": f"job {job.state}", "detail": f"job {job.id} was {job.state}"}
        super().__init__(problem)
        self.job = job


_BY_STATUS = {401: AuthError, 403: AuthError, 404: NotFoundError, 409: ConflictError,
              429: RateLimitedError, 503: UnavailableError}


@dataclass(frozen=True)
class Scores:
    model: str
    version: int
    log_density: np.ndarray
    tail_fraction: np.ndarray | None  # NaN for rows with missing features


@dataclass(frozen=True)
class Assignments:
    model: str
    version: int
    responsibilities: np.ndarray
    labels: np.ndarray


@dataclass(frozen=True)
class Explanations:
    """Per row and feature (n, d), NaN where the feature is missing; ``most_unusual``
    (n,) indexes ``feature_names`` (the model's, when it has them)."""

    model: str
    version: int
    feature_names: list[str] | None
    conditional_log_density: np.ndarray
    conditional_tail: np.ndarray
    conditional_mean: np.ndarray
    conditional_sd: np.ndarray
    most_unusual: np.ndarray


@dataclass(frozen=True)
class Samples:
    model: str
    version: int
    seed: int
    points: np.ndarray
    components: np.ndarray


@dataclass(frozen=True)
class Call:
    """One HTTP exchange: what to send and how to read a 2xx answer."""

    method: str
    path: str
    body: Any = None
    params: dict[str, Any] = field(default_factory=dict)
    read: Callable[[bytes], Any] = lambda content: msgspec.msgpack.decode(content)
    #: Writes carry a fresh Idempotency-Key: repeating the call after a 503
    #: not-replicated then confirms the first write instead of making a second.
    idempotency_key: str | None = None


def _write(method: str, path: str, body: Any, read: Callable[[bytes], Any]) -> Call:
    return Call(method, path, body, read=read, idempotency_key=uuid.uuid4().hex)


def _array(value: Any) -> np.ndarray:
    if isinstance(value, schemas.PackedArray):
        return np.frombuffer(value.data, dtype=value.dtype).reshape(value.shape)
    return np.asarray([np.nan if v is None else v for v in value], dtype=np.float64)


def _points(X: Any) -> schemas.PackedArray:
    matrix = np.asarray(X, dtype=np.float64)
    if matrix.ndim == 1:
        matrix = matrix[None, :]
    return pack(matrix)


def _rows(points: Any) -> dict[str, Any]:
    """The body of a scoring call: ``points`` for rows, ``records`` for columns by name
    (a mapping or a DataFrame, read through ``keys()`` and ``[name]`` alone so that
    pandas stays optional); NaN marks a missing value either way."""
    if hasattr(points, "keys") and not isinstance(points, np.ndarray):
        labels = list(points.keys())
        names = [str(label) for label in labels]
        columns = [np.asarray(points[label], dtype=np.float64).ravel() for label in labels]
        return {"records": [dict(zip(names, row, strict=True))
                            for row in np.column_stack(columns).tolist()]}
    return {"points": _points(points)}


def _version(version: int | None) -> dict[str, Any]:
    return {} if version is None else {"version": version}


def _typed(kind: Any) -> Callable[[bytes], Any]:
    decoder = msgspec.msgpack.Decoder(kind)
    return decoder.decode


# One builder per operation: the sync and async clients only differ in how they send.

def log_density(model: str, points: Any, version: int | None = None) -> Call:
    """Log-density (and tail fraction, when the version has training quantiles) per row;
    NaN marks a missing feature."""

    def read(content: bytes) -> Scores:
        r = msgspec.msgpack.decode(content, type=schemas.LogDensityResponse)
        tail = None if r.tail_fraction is None else _array(r.tail_fraction)
        return Scores(r.model, r.version, _array(r.log_density), tail)

    return Call("POST", f"/v1/models/{model}/log-density", _rows(points),
                _version(version), read)


def responsibilities(model: str, points: Any, version: int | None = None) -> Call:
    """Posterior probability of each component per row, and the most probable one."""

    def read(content: bytes) -> Assignments:
        r = msgspec.msgpack.decode(content, type=schemas.ResponsibilitiesResponse)
        return Assignments(r.model, r.version, _array(r.responsibilities), _array(r.labels))

    return Call("POST", f"/v1/models/{model}/responsibilities", _rows(points),
                _version(version), read)


def conditional(model: str, points: Any, version: int | None = None) -> Call:
    """The rows with their missing (NaN) features filled by their conditional mean."""

    def read(content: bytes) -> np.ndarray:
        r = msgspec.msgpack.decode(content, type=schemas.ConditionalResponse)
        return _array(r.points)

    return Call("POST", f"/v1/models/{model}/conditional", _rows(points),
                _version(version), read)


def explain(model: str, points: Any, version: int | None = None) -> Call:
    """Per row and feature: the feature's conditional log-density, two-sided tail, mean
    and sd given the row's other features, and the feature of smallest tail per row."""

    def read(content: bytes) -> Explanations:
        r = msgspec.msgpack.decode(content, type=schemas.ExplanationsResponse)
        return Explanations(
            r.model, r.version, r.feature_names, _array(r.conditional_log_density),
            _array(r.conditional_tail), _array(r.conditional_mean), _array(r.conditional_sd),
            _array(r.most_unusual).astype(np.int64))

    return Call("POST", f"/v1/models/{model}/explanations", _rows(points), _version(version),
                read)


def sample(model: str, count: int, seed: int | None = None,
           version: int | None = None) -> Call:
    """``count`` synthetic points and the component each came from."""

    def read(content: bytes) -> Samples:
        r = msgspec.msgpack.decode(content, type=schemas.SamplesResponse)
        return Samples(r.model, r.version, r.seed, _array(r.points), _array(r.components))

    body = {"count": count, "packed": True, **({} if seed is None else {"seed": seed})}
    return Call("POST", f"/v1/models/{model}/samples", body, _version(version), read)


def import_version(model: str, parameters: dict[str, Any], serve: bool = False) -> Call:
    """A parameter set (structure, weights, means, covariances) as a new version."""
    return _write("POST", f"/v1/models/{model}/versions", {**parameters, "serve": serve},
                  _typed(schemas.VersionCreated))


def promote(model: str, version: int) -> Call:
    """Serve ``version`` (a rollback is a promote of an older one)."""
    return _write("PUT", f"/v1/models/{model}/serving", {"version": version},
                  _typed(schemas.ServingChanged))


def model_detail(model: str) -> Call:
    return Call("GET", f"/v1/models/{model}", read=_typed(schemas.ModelDetail))


def version_detail(model: str, version: int) -> Call:
    return Call("GET", f"/v1/models/{model}/versions/{version}",
                read=_typed(schemas.VersionDetail))


def job(job_id: str) -> Call:
    return Call("GET", f"/v1/jobs/{job_id}", read=_typed(schemas.Job))


def cancel(job_id: str) -> Call:
    return Call("DELETE", f"/v1/jobs/{job_id}", read=_typed(schemas.Job))


def submit_fit(model: str, points: Any = None, dataset: str | None = None,
               components: int | tuple[int, int] = 3,
               structure: str | Sequence[str] = "full", **options: Any) -> Call:
    """A fit job on inline ``points``, an uploaded ``dataset`` or files the workers read
    (``source="s3://lake/turbines/"``, or ``{"uri": ..., "format": ..., "columns": [...]}``
    to pick the format and the columns); ``components`` may be
    a (min, max) range and ``structure`` a list, to select by ``criterion``. Other
    options as in the API: criterion, restarts, max_iterations, tolerance, ridge, init,
    seed, serve, weights, feature_names, and ``resolution`` (one value per feature, in
    its units; None or 0 where a feature has none)."""
    body: dict[str, Any] = {"structure": structure if isinstance(structure, str)
                            else list(structure), **options}
    if options.get("resolution") is not None:
        body["resolution"] = [None if r is None else float(r) for r in options["resolution"]]
    body["components"] = components if isinstance(components, int) else {
        "min": components[0], "max": components[1]}
    if points is not None:
        body["points"] = _points(points)
    if dataset is not None:
        body["dataset"] = dataset
    if isinstance(options.get("source"), str):
        body["source"] = {"uri": options["source"]}
    return _write("POST", f"/v1/models/{model}/fits", body, _typed(schemas.Job))


def create_dataset(dimension: int, feature_names: Sequence[str] | None = None) -> Call:
    body: dict[str, Any] = {"dimension": dimension}
    if feature_names is not None:
        body["feature_names"] = list(feature_names)
    return _write("POST", "/v1/datasets", body, _typed(schemas.Dataset))


def append_chunk(dataset: str, points: Any) -> Call:
    return _write("POST", f"/v1/datasets/{dataset}/chunks", {"points": _points(points)},
                  _typed(schemas.Dataset))


def _error(response: httpx.Response) -> ProblemError:
    try:
        problem = msgspec.json.decode(response.content) if response.headers.get(
            "content-type", "").endswith("json") else msgspec.msgpack.decode(response.content)
    except msgspec.DecodeError:
        problem = {"status": response.status_code, "title": response.reason_phrase,
                   "detail": response.text[:200]}
    retry = response.headers.get("retry-after")
    kind = _BY_STATUS.get(response.status_code, InvalidInputError
                          if response.status_code < 500 else ProblemError)
    return kind(problem, float(retry) if retry else None)


def _request(call: Call) -> dict[str, Any]:
    headers = {"Accept": MSGPACK}
    if call.idempotency_key:
        headers["Idempotency-Key"] = call.idempotency_key
    content = None
    if call.body is not None:
        headers["Content-Type"] = MSGPACK
        content = msgspec.msgpack.encode(call.body)
    return {"method": call.method, "url": call.path, "params": call.params,
            "headers": headers, "content": content}


def _replication_pause(call: Call, response: httpx.Response, attempt: int) -> float:
    """Seconds to wait before repeating a write the replicas did not confirm in time
    (the same Idempotency-Key: nothing is written twice); 0: do not repeat."""
    if (response.status_code != 503 or call.idempotency_key is None
            or attempt == REPLICATION_ATTEMPTS - 1
            or _error(response).problem.get("type") != NOT_REPLICATED):
        return 0.0
    return float(response.headers.get("retry-after", 1))


def _endpoint(build: Callable[..., Call]) -> Callable[..., Any]:
    """A client method that sends what ``build`` describes (awaitable on AsyncClient)."""

    @functools.wraps(build)
    def method(self: Any, *args: Any, **kwargs: Any) -> Any:
        return self._run(build(*args, **kwargs))

    return method


class _Operations:
    log_density = _endpoint(log_density)
    responsibilities = _endpoint(responsibilities)
    conditional = _endpoint(conditional)
    explain = _endpoint(explain)
    sample = _endpoint(sample)
    import_version = _endpoint(import_version)
    promote = _endpoint(promote)
    model = _endpoint(model_detail)
    version = _endpoint(version_detail)
    job = _endpoint(job)
    cancel = _endpoint(cancel)
    submit_fit = _endpoint(submit_fit)
    create_dataset = _endpoint(create_dataset)
    append_chunk = _endpoint(append_chunk)


def _headers(api_key: str | None) -> dict[str, str]:
    return {"Authorization": f"Bearer {api_key}"} if api_key else {}


class Client(_Operations):
    """Blocking client; use as a context manager or call ``close()``."""

    def __init__(self, url: str, api_key: str | None = None, timeout_s: float = 30.0) -> None:
        self._http = httpx.Client(base_url=url, headers=_headers(api_key), timeout=timeout_s)

    def _run(self, call: Call) -> Any:
        for attempt in range(REPLICATION_ATTEMPTS):
            response = self._http.request(**_request(call))
            if not (pause := _replication_pause(call, response, attempt)):
                break
            time.sleep(pause)
        if response.is_error:
            raise _error(response)
        return call.read(response.content)

    def upload(self, points: Any, feature_names: Sequence[str] | None = None,
               chunk_rows: int = CHUNK_ROWS) -> schemas.Dataset:
        """A dataset of ``points`` sent in chunks; pass its ``id`` to ``fit``."""
        X = np.asarray(points, dtype=np.float64)
        dataset: schemas.Dataset = self.create_dataset(X.shape[1], feature_names)
        for start in range(0, len(X), chunk_rows):
            dataset = self.append_chunk(dataset.id, X[start:start + chunk_rows])
        return dataset

    def wait(self, job_id: str, progress: Callable[[schemas.Job], None] | None = None,
             timeout_s: float | None = None, poll_s: float = POLL_S) -> schemas.Job:
        """Poll every ``poll_s`` until the job ends; ``progress`` sees each new state.
        Raises ``JobFailedError`` unless it succeeded, ``TimeoutError`` past ``timeout_s``."""
        deadline = None if timeout_s is None else time.monotonic() + timeout_s
        last = None
        while True:
            current: schemas.Job = self.job(job_id)
            if (ended := _observe(current, last, progress, deadline)) is not None:
                return ended
            last = current
            time.sleep(poll_s)

    def fit(self, model: str, points: Any = None, *, wait: bool = True,
            progress: Callable[[schemas.Job], None] | None = None,
            timeout_s: float | None = None, poll_s: float = POLL_S,
            **options: Any) -> schemas.Job:
        """Submit a fit job (options as ``submit_fit``) and, by default, wait for it."""
        submitted: schemas.Job = self.submit_fit(model, points, **options)
        return self.wait(submitted.id, progress, timeout_s, poll_s) if wait else submitted

    def close(self) -> None:
        self._http.close()

    def __enter__(self) -> Client:
        return self

    def __exit__(self, *exc: object) -> None:
        self.close()


class AsyncClient(_Operations):
    """The same operations for asyncio: ``await client.log_density(...)``."""

    def __init__(self, url: str, api_key: str | None = None, timeout_s: float = 30.0) -> None:
        self._http = httpx.AsyncClient(base_url=url, headers=_headers(api_key),
                                       timeout=timeout_s)

    async def _run(self, call: Call) -> Any:
        for attempt in range(REPLICATION_ATTEMPTS):
            response = await self._http.request(**_request(call))
            if not (pause := _replication_pause(call, response, attempt)):
                break
            await asyncio.sleep(pause)
        if response.is_error:
            raise _error(response)
        return call.read(response.content)

    async def upload(self, points: Any, feature_names: Sequence[str] | None = None,
                     chunk_rows: int = CHUNK_ROWS) -> schemas.Dataset:
        X = np.asarray(points, dtype=np.float64)
        dataset: schemas.Dataset = await self.create_dataset(X.shape[1], feature_names)
        for start in range(0, len(X), chunk_rows):
            dataset = await self.append_chunk(dataset.id, X[start:start + chunk_rows])
        return dataset

    async def wait(self, job_id: str, progress: Callable[[schemas.Job], None] | None = None,
                   timeout_s: float | None = None, poll_s: float = POLL_S) -> schemas.Job:
        deadline = None if timeout_s is None else time.monotonic() + timeout_s
        last = None
        while True:
            current: schemas.Job = await self.job(job_id)
            if (ended := _observe(current, last, progress, deadline)) is not None:
                return ended
            last = current
            await asyncio.sleep(poll_s)

    async def fit(self, model: str, points: Any = None, *, wait: bool = True,
                  progress: Callable[[schemas.Job], None] | None = None,
                  timeout_s: float | None = None, poll_s: float = POLL_S,
                  **options: Any) -> schemas.Job:
        submitted: schemas.Job = await self.submit_fit(model, points, **options)
        return (await self.wait(submitted.id, progress, timeout_s, poll_s) if wait
                else submitted)

    async def aclose(self) -> None:
        await self._http.aclose()

    async def __aenter__(self) -> AsyncClient:
        return self

    async def __aexit__(self, *exc: object) -> None:
        await self.aclose()


def _observe(job: schemas.Job, last: schemas.Job | None,
             progress: Callable[[schemas.Job], None] | None,
             deadline: float | None) -> schemas.Job | None:
    """One poll of ``wait``: report a change; the job once it ended (raising unless it
    succeeded); None to poll again."""
    if progress is not None and job != last:
        progress(job)
    if job.state in FINISHED:
        if job.state != "succeeded":
            raise JobFailedError(job)
        return job
    if deadline is not None and time.monotonic() > deadline:
        raise TimeoutError(f"job {job.id} is still {job.state}")
    return None
