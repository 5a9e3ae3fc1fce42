"""Every HTTP body, as a frozen msgspec Struct. Request bodies forbid unknown fields."""

from __future__ import annotations

from typing import Any, Literal

import msgspec

Structure = Literal["full", "diagonal", "spherical", "shared"]


class Request(msgspec.Struct, frozen=True, forbid_unknown_fields=True):
    """Base of request bodies."""


class PackedArray(msgspec.Struct, frozen=True, forbid_unknown_fields=True):
    """A numeric array as raw little-endian bytes in row-major order.

    Requests accept float64 (``<f8``) and float32 (``<f4``); responses use ``<f8``
    for values and ``<i4`` for integer labels.
    """

    dtype: Literal["<f8", "<f4", "<i4"]
    shape: list[int]
    data: bytes


#: Rows of floats; null (or NaN in MessagePack) marks a missing feature.
Points = list[list[float | None]] | PackedArray


class ParameterSet(msgspec.Struct, frozen=True, forbid_unknown_fields=True):
    """A mixture's parameters in the shapes of the core: ``covariances`` is (k, d, d)
    for full, (k, d) for diagonal, (k,) for spherical and (d, d) for shared."""

    structure: Structure
    weights: list[float]
    means: list[list[float]]
    covariances: list[Any]
    feature_names: list[str] | None = None


class ImportRequest(ParameterSet, frozen=True, forbid_unknown_fields=True):
    serve: bool = False


class VersionCreated(msgspec.Struct, frozen=True):
    model: str
    version: int
    serving: bool


class ServingRequest(Request, frozen=True):
    version: int


class ServingChanged(msgspec.Struct, frozen=True):
    model: str
    serving_version: int
    previous_version: int | None


class ModelSummary(msgspec.Struct, frozen=True):
    name: str
    dimension: int
    serving_version: int | None
    latest_version: int
    updated_at: str


class ModelList(msgspec.Struct, frozen=True):
    models: list[ModelSummary]


class VersionSummary(msgspec.Struct, frozen=True):
    version: int
    structure: Structure
    components: int
    serving: bool
    source: str
    created_at: str


class ModelDetail(msgspec.Struct, frozen=True):
    name: str
    dimension: int
    serving_version: int | None
    latest_version: int
    created_at: str
    updated_at: str
    versions: list[VersionSummary]


class VersionDetail(msgspec.Struct, frozen=True):
    model: str
    version: int
    serving: bool
    source: str
    created_at: str
    parameters: ParameterSet
    tail_fraction_available: bool
    fit_report: dict[str, Any] | None
    provenance: dict[str, Any]


class VersionDeleted(msgspec.Struct, frozen=True):
    model: str
    version: int


class PointsRequest(Request, frozen=True):
    points: Points


class SamplesRequest(Request, frozen=True):
    """``packed``: answer MessagePack requests with packed arrays instead of lists."""

    count: int
    seed: int | None = None
    packed: bool = False


class LogDensityResponse(msgspec.Struct, frozen=True):
    """``log_density`` is null (JSON) where it is below the float range;
    ``tail_fraction`` is null when the version has no training quantiles, and null
    (NaN when packed) for a row with missing features."""

    model: str
    version: int
    log_density: list[float | None] | PackedArray
    tail_fraction: list[float | None] | PackedArray | None


class ResponsibilitiesResponse(msgspec.Struct, frozen=True):
    model: str
    version: int
    responsibilities: list[list[float]] | PackedArray
    labels: list[int] | PackedArray


class SamplesResponse(msgspec.Struct, frozen=True):
    """``seed`` reproduces the draw when sent back with the same count."""

    model: str
    version: int
    seed: int
    points: list[list[float]] | PackedArray
    components: list[int] | PackedArray


class ConditionalResponse(msgspec.Struct, frozen=True):
    model: str
    version: int
    points: list[list[float]] | PackedArray


class Health(msgspec.Struct, frozen=True):
    status: Literal["ok", "unavailable"]
    detail: str = ""


class ComponentRange(msgspec.Struct, frozen=True, forbid_unknown_fields=True):
    """Try every component count from ``min`` to ``max`` and keep the best by criterion."""

    min: int
    max: int


class FitRequest(Request, frozen=True):
    """A fit job: training rows (complete, no missing values) inline in ``points`` or
    uploaded as ``dataset``, and the fitting options.

    ``components`` and ``structure`` may name several candidates; the job then
    selects among them by ``criterion`` and keeps the whole table in the fit report.
    """

    points: list[list[float]] | PackedArray | None = None
    dataset: str | None = None
    weights: list[float] | None = None
    feature_names: list[str] | None = None
    components: int | ComponentRange = 3
    structure: Structure | list[Structure] = "full"
    criterion: Literal["bic", "aic"] = "bic"
    restarts: int = 4
    max_iterations: int = 300
    tolerance: float = 1e-6
    ridge: float = 1e-6
    init: Literal["kmeans++", "random"] = "kmeans++"
    seed: int | None = None
    serve: bool = False


JobState = Literal["queued", "running", "succeeded", "failed", "cancelled"]


class JobProgress(msgspec.Struct, frozen=True):
    candidate: int
    candidates: int
    restart: int
    iteration: int
    log_likelihood: float


class JobProblem(msgspec.Struct, frozen=True):
    """Why a job failed, as RFC 9457 problem details."""

    type: str
    title: str
    status: int
    detail: str


class Job(msgspec.Struct, frozen=True):
    id: str
    model: str
    state: JobState
    attempts: int
    created_at: str
    started_at: str | None
    finished_at: str | None
    progress: JobProgress | None
    version: int | None
    problem: JobProblem | None


class JobList(msgspec.Struct, frozen=True):
    jobs: list[Job]


class DatasetRequest(Request, frozen=True):
    dimension: int
    feature_names: list[str] | None = None


class ChunkRequest(Request, frozen=True):
    """Rows appended to a dataset: complete rows of the dataset's dimension."""

    points: list[list[float]] | PackedArray


class Dataset(msgspec.Struct, frozen=True):
    id: str
    dimension: int
    feature_names: list[str] | None
    rows: int
    bytes: int
    chunks: int
    created_at: str
    expires_in_s: int
