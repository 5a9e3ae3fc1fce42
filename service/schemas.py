"""Every HTTP body, as a frozen msgspec Struct. Request bodies forbid unknown fields."""

from __future__ import annotations

from typing import Annotated, Any, Literal

import msgspec


def described(text: str) -> msgspec.Meta:
    """A field's description on /docs and in the OpenAPI document (no constraint: the
    service checks values itself, with messages that name the limit)."""
    return msgspec.Meta(description=text)


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
#: Rows as objects keyed by feature name; an absent key or null is a missing feature.
Records = list[dict[str, float | None]]
#: (n, d) answers: null in JSON (NaN in MessagePack) where there is no value.
Matrix = list[list[float | None]] | PackedArray


class ParameterSet(msgspec.Struct, frozen=True, forbid_unknown_fields=True):
    """A mixture's parameters in the shapes of the core: ``covariances`` is (k, d, d)
    for full, (k, d) for diagonal, (k,) for spherical and (d, d) for shared."""

    structure: Annotated[Structure, described(
        "full: a d x d matrix per component; diagonal: d variances per component; "
        "spherical: one variance per component; shared: one d x d matrix for all.")]
    weights: Annotated[list[float], described(
        "k non-negative component weights summing to 1 (within 1e-6).")]
    means: Annotated[list[list[float]], described("k rows of d values.")]
    covariances: Annotated[list[Any], described(
        "(k, d, d) full, (k, d) diagonal, (k,) spherical, (d, d) shared; symmetric "
        "positive definite. At most MIXSCORE_MAX_COMPONENTS (64) components and "
        "MIXSCORE_MAX_DIMENSION (512) features.")]
    feature_names: Annotated[list[str] | None, described(
        "d names, used by the fit report; none by default.")] = None


class ImportRequest(ParameterSet, frozen=True, forbid_unknown_fields=True):
    serve: Annotated[bool, described(
        "Serve this version at once (the first version of a model always serves).")] = False


class VersionCreated(msgspec.Struct, frozen=True):
    model: str
    version: int
    serving: bool


class ServingRequest(Request, frozen=True):
    version: Annotated[int, described("The version to serve: a promote or a rollback.")]


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
    tail_fraction_available: Annotated[bool, described(
        "Whether scoring answers tail fractions: a fitted version has training quantiles.")]
    training_sample_rows: Annotated[int, described(
        "Training rows kept with the version (a uniform sample of at most 20 000; 0 for "
        "imports): they give tail fractions to rows with missing features.")]
    fit_report: dict[str, Any] | None
    provenance: dict[str, Any]


class VersionDeleted(msgspec.Struct, frozen=True):
    model: str
    version: int


class PointsRequest(Request, frozen=True):
    """The points to score: ``points`` in the model's feature order, or ``records``."""

    points: Annotated[Points | None, described(
        "Rows of the model's dimension; null (NaN in MessagePack) marks a missing feature, "
        "which is integrated out. At most MIXSCORE_MAX_POINTS (100 000) rows; a "
        "MessagePack body may pack them (PackedArray). Give this or records.")] = None
    records: Annotated[Records | None, described(
        "Rows as objects keyed by the model's feature names, in any key order; an absent "
        "key or null is a missing feature. For versions with feature_names.")] = None


class SamplesRequest(Request, frozen=True):
    """``packed``: answer MessagePack requests with packed arrays instead of lists."""

    count: Annotated[int, described("Points to draw: 1 to MIXSCORE_MAX_SAMPLES (100 000).")]
    seed: Annotated[int | None, described(
        "A non-negative integer that makes the draw reproducible; random by default.")] = None
    packed: Annotated[bool, described(
        "Answer a MessagePack request with packed arrays.")] = False


class LogDensityResponse(msgspec.Struct, frozen=True):
    """``log_density`` is null (JSON) where it is below the float range;
    ``tail_fraction`` is null when the version has no training quantiles (imports). A
    row with missing features is compared with the same marginal of the training rows
    kept with the version; it has a null tail fraction (NaN in MessagePack) on versions
    that kept none."""

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


class ExplanationsResponse(msgspec.Struct, frozen=True):
    """Per point (row) and feature (column): the feature's distribution given the point's
    other observed features, a 1-D mixture. ``conditional_tail`` is its two-sided tail
    probability 2 min(F, 1 - F) at the observed value; ``most_unusual`` the feature of
    smallest tail per point. Missing features are null (NaN in MessagePack) in every
    (n, d) field and are conditioned out."""

    model: str
    version: int
    feature_names: list[str] | None
    conditional_log_density: Matrix
    conditional_tail: Matrix
    conditional_mean: Matrix
    conditional_sd: Matrix
    most_unusual: list[int] | PackedArray


class Health(msgspec.Struct, frozen=True):
    status: Literal["ok", "unavailable"]
    detail: str = ""


class ComponentRange(msgspec.Struct, frozen=True, forbid_unknown_fields=True):
    """Try every component count from ``min`` to ``max`` and keep the best by criterion."""

    min: Annotated[int, described("Fewest components tried, at least 1.")]
    max: Annotated[int, described("Most components tried, at most MIXSCORE_MAX_COMPONENTS.")]


class FitSource(msgspec.Struct, frozen=True, forbid_unknown_fields=True):
    """Training rows in files: Parquet, CSV or Arrow, under MIXSCORE_SOURCE_ROOTS."""

    uri: Annotated[str, described(
        "A file, a folder or a glob: a local path or an fsspec URL (s3://, gs://, ... when "
        "the worker has the filesystem package), under one of MIXSCORE_SOURCE_ROOTS.")]
    format: Annotated[Literal["parquet", "csv", "arrow"] | None, described(
        "By default from the extension of the URI, or of a folder's files.")] = None
    columns: Annotated[list[str] | None, described(
        "The features, in this order; by default every numeric column, in file order. "
        "They become the version's feature names.")] = None


class FitRequest(Request, frozen=True):
    """A fit job: training rows (complete, no missing values) inline in ``points`` or
    uploaded as ``dataset``, and the fitting options.

    ``components`` and ``structure`` may name several candidates; the job then
    selects among them by ``criterion`` and keeps the whole table in the fit report.
    """

    points: Annotated[list[list[float]] | PackedArray | None, described(
        "Complete training rows inline (no missing values), up to the body size limit "
        "MIXSCORE_MAX_BODY_BYTES; give this or dataset.")] = None
    dataset: Annotated[str | None, described(
        "The id of an uploaded dataset, for data too large for one request.")] = None
    source: Annotated[FitSource | None, described(
        "Files the fit worker reads itself (rows with a missing value are skipped and "
        "counted); give this, points or dataset.")] = None
    weights: Annotated[list[float] | None, described(
        "A non-negative frequency weight per inline row.")] = None
    feature_names: Annotated[list[str] | None, described(
        "d names for the version; by default the dataset's.")] = None
    components: Annotated[int | ComponentRange, described(
        "A number of components, or {min, max} to try each and keep the best.")] = 3
    structure: Annotated[Structure | list[Structure], described(
        "A covariance structure, or a list to try each.")] = "full"
    criterion: Annotated[Literal["bic", "aic"], described(
        "How candidates are compared: BIC (Schwarz, 1978) or AIC; lower is better.")] = "bic"
    restarts: Annotated[int, described(
        "Independent EM starts per candidate; the best is kept.")] = 4
    max_iterations: Annotated[int, described("EM iterations per start, at most.")] = 300
    tolerance: Annotated[float, described(
        "Stop when the mean log-likelihood per row changes by less than this.")] = 1e-6
    ridge: Annotated[float, described(
        "Added to every covariance diagonal in each M-step, as a fraction of each "
        "feature's variance (the fit runs on standardised features).")] = 1e-9
    init: Annotated[Literal["kmeans++", "random"], described(
        "How EM starts: k-means++ seeding or random responsibilities.")] = "kmeans++"
    resolution: Annotated[list[float | None] | None, described(
        "Per feature, the smallest meaningful difference of its sensor, in its units "
        "(null: none). No component's variance along a feature goes below "
        "resolution^2 / 12, the variance of rounding to that grid.")] = None
    seed: Annotated[int | None, described(
        "Makes the fit reproducible; drawn and recorded when omitted.")] = None
    serve: Annotated[bool, described(
        "Serve the fitted version once the job succeeds.")] = False


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
    rows_read: Annotated[int | None, described(
        "Rows the job read from its source (null without a source).")]
    rows_skipped: Annotated[int | None, described(
        "Of those, rows skipped for a missing value.")]
    version: int | None
    problem: JobProblem | None


class JobList(msgspec.Struct, frozen=True):
    jobs: list[Job]


class DatasetRequest(Request, frozen=True):
    dimension: Annotated[int, described(
        "Values per row, 1 to MIXSCORE_MAX_DIMENSION (512).")]
    feature_names: Annotated[list[str] | None, described(
        "d names, passed on to fits of this dataset.")] = None


class ChunkRequest(Request, frozen=True):
    """Rows appended to a dataset: complete rows of the dataset's dimension."""

    points: Annotated[list[list[float]] | PackedArray, described(
        "Complete rows of the dataset's dimension, up to MIXSCORE_MAX_BODY_BYTES per chunk.")]


class Dataset(msgspec.Struct, frozen=True):
    id: str
    dimension: int
    feature_names: list[str] | None
    rows: int
    bytes: int
    chunks: int
    created_at: str
    expires_in_s: int
