"""Fit jobs: submit (checked in full before queueing), read, list, cancel."""

from __future__ import annotations

import secrets
from pathlib import Path
from typing import Any, cast

import msgspec
import numpy as np
from litestar import Request, delete, get, post
from litestar.types import ASGIApp

from ..codec import points_matrix
from ..errors import Conflict, InvalidInput, OutsideRoots, TooLarge, dimension_over
from ..jobs import FitSpec, JobStore
from ..schemas import ComponentRange, FitRequest, JobList
from ..settings import Settings
from ..sources import SourceError, SourceForbidden, checked_uri, format_of, roots_of
from ..state import Services, authorize, body_as, reply, request_key
from ..store import check_model_name
from .datasets import datasets_of

#: Bounds of fitting options, beyond which a request is refused before it is queued.
MAX_RESTARTS = 100
MAX_ITERATIONS = 100_000
JOB_STATES = ("queued", "running", "succeeded", "failed", "cancelled")


def _jobs(found: Services) -> JobStore:
    return JobStore(found.redis, found.store.keys, found.store.writer,
                    found.settings.job_retention_s)


@post("/v1/models/{name:str}/fits", status_code=202)
async def submit_fit(request: Request[Any, Any, Any]) -> ASGIApp:
    found, body_format, answer_format = await authorize(request, "fit")
    name = check_model_name(request.path_params["name"])
    body = await body_as(request, FitRequest, found, body_format)
    given = [field for field in ("points", "dataset", "source")
             if getattr(body, field) is not None]
    if len(given) > 1:
        raise InvalidInput.field(given[1], f"goes without {given[0]}: give the training rows "
                                           "one way")
    if body.source is not None:
        spec, X, weights = source_fit(name, body, found.settings), None, None
    elif body.dataset is not None:
        spec, X, weights = await dataset_fit(name, body, found), None, None
    else:
        spec, X, weights = checked_fit(name, body, found.settings)
    if spec.dimension:  # a source without columns has its dimension found by the worker
        await _check_dimension(found, name, spec.dimension)
    job_id, _ = await _jobs(found).submit(spec, X, weights, request_key(request),
                                          found.settings.max_jobs_per_model)
    job = await _jobs(found).get(job_id)
    return reply(job, answer_format, status=202, headers={"Location": f"/v1/jobs/{job_id}"})


@get("/v1/jobs/{job_id:str}")
async def read_job(request: Request[Any, Any, Any]) -> ASGIApp:
    found, _, answer_format = await authorize(request, "fit")
    return reply(await _jobs(found).get(request.path_params["job_id"]), answer_format)


@get("/v1/jobs")
async def list_jobs(request: Request[Any, Any, Any]) -> ASGIApp:
    found, _, answer_format = await authorize(request, "fit")
    model = request.query_params.get("model")
    state = request.query_params.get("state")
    if state is not None and state not in JOB_STATES:
        raise InvalidInput.field("state", f"must be one of {', '.join(JOB_STATES)}")
    jobs = await _jobs(found).list(model, state)
    return reply(JobList(jobs=jobs), answer_format)


@delete("/v1/jobs/{job_id:str}", status_code=200)
async def cancel_job(request: Request[Any, Any, Any]) -> ASGIApp:
    found, _, answer_format = await authorize(request, "fit")
    return reply(await _jobs(found).cancel(request.path_params["job_id"]), answer_format)


async def _check_dimension(found: Services, name: str, dimension: int) -> None:
    existing = await found.store.dimension(name)
    if existing is not None and existing != dimension:
        raise Conflict(f"model {name!r} has dimension {existing}; these points have "
                       f"{dimension}")


async def dataset_fit(name: str, body: FitRequest, found: Services) -> FitSpec:
    """A job on an uploaded dataset: the same checks, with rows counted at upload."""
    if body.weights is not None:  # points with a dataset are refused by submit_fit
        raise InvalidInput.field("dataset", "goes without points and weights (the dataset "
                                            "holds the rows; weights need inline points)")
    store = datasets_of(found)
    dataset = await store.get(str(body.dataset))
    counts = _component_counts(body.components, found.settings.max_components)
    if dataset.rows < max(counts):
        raise InvalidInput.field("dataset", f"{dataset.rows} rows are too few for "
                                            f"{max(counts)} components")
    await store.keep(dataset.id)
    return _spec(name, body, counts, dataset.rows, dataset.dimension,
                 body.feature_names or dataset.feature_names, weighted=False,
                 dataset=dataset.id)


def source_fit(name: str, body: FitRequest, settings: Settings) -> FitSpec:
    """A source checked against the roots (403) and for its format and columns (422);
    its files are opened by the worker."""
    source = body.source
    assert source is not None
    if body.weights is not None:
        raise InvalidInput.field("weights", "go with inline points only")
    try:
        checked_uri(source.uri, roots_of(settings.source_roots))
    except SourceForbidden as error:
        raise OutsideRoots(str(error)) from None
    if source.format is not None or Path(source.uri.rstrip("/*")).suffix:
        try:  # a folder's format is its files': the worker finds it
            format_of(source.uri, source.format)
        except SourceError as error:
            raise InvalidInput.field("source", str(error)) from None
    columns = source.columns
    if columns is not None and (not columns or len(set(columns)) != len(columns)):
        raise InvalidInput.field("source.columns", "must name distinct columns, at least one")
    if columns is None and (body.feature_names or body.resolution):
        raise InvalidInput.field("source.columns", "name the columns to give feature_names or "
                                                   "a resolution per feature")
    if columns is not None:
        _within_limit(len(columns), settings)
    counts = _component_counts(body.components, settings.max_components)
    return msgspec.structs.replace(
        _spec(name, body, counts, 0, len(columns or []), body.feature_names or columns,
              weighted=False, dataset=None), source=source)


def _within_limit(dimension: int, settings: Settings) -> None:
    if dimension > settings.max_dimension:
        raise TooLarge(dimension_over(dimension, settings.max_dimension))


def checked_fit(name: str, body: FitRequest, settings: Settings
                ) -> tuple[FitSpec, np.ndarray, np.ndarray | None]:
    """The whole request checked now, so a job only fails for reasons found while fitting."""
    if body.points is None:
        raise InvalidInput.field("points", "give the training rows, a dataset id or a source")
    dimension = _dimension(body)
    _within_limit(dimension, settings)
    X = points_matrix(cast(Any, body.points), dimension, max_points=2**62)
    if np.isnan(X).any():
        row, column = (int(i) for i in np.argwhere(np.isnan(X))[0])
        raise InvalidInput.field(f"points[{row}][{column}]",
                                 "is missing; fitting needs complete rows")
    counts = _component_counts(body.components, settings.max_components)
    if X.shape[0] < max(counts):
        raise InvalidInput.field("points", f"{X.shape[0]} rows are too few for {max(counts)} "
                                           "components")
    weights = _weights(body.weights, X.shape[0])
    spec = _spec(name, body, counts, X.shape[0], dimension, body.feature_names,
                 weighted=weights is not None, dataset=None)
    return spec, X, weights


def _spec(name: str, body: FitRequest, counts: list[int], rows: int, dimension: int,
          feature_names: list[str] | None, weighted: bool, dataset: str | None) -> FitSpec:
    structures = [body.structure] if isinstance(body.structure, str) else body.structure
    if not structures:
        raise InvalidInput.field("structure", "must name at least one structure")
    _check_options(body)
    if feature_names is not None and len(feature_names) != dimension:
        raise InvalidInput.field("feature_names", f"has {len(feature_names)} names; the "
                                                  f"points have {dimension} features")
    resolution = _resolution(body.resolution, dimension)
    return FitSpec(
        model=name, components=counts, structures=list(dict.fromkeys(structures)),
        criterion=body.criterion, restarts=body.restarts, max_iterations=body.max_iterations,
        tolerance=body.tolerance, ridge=body.ridge, init=body.init,
        seed=secrets.randbits(63) if body.seed is None else body.seed, serve=body.serve,
        feature_names=feature_names, rows=rows, dimension=dimension, weighted=weighted,
        dataset=dataset, resolution=resolution)


def _dimension(body: FitRequest) -> int:
    assert body.points is not None
    if isinstance(body.points, list):
        if not body.points:
            raise InvalidInput.field("points", "must not be empty")
        return len(body.points[0])
    if len(body.points.shape) != 2:
        raise InvalidInput.field("points.shape", "must be [rows, features]")
    return body.points.shape[1]


def _component_counts(components: int | ComponentRange, limit: int) -> list[int]:
    low, high = ((components, components) if isinstance(components, int)
                 else (components.min, components.max))
    if low < 1 or high < low:
        raise InvalidInput.field("components", f"must be at least 1 (and min <= max); got "
                                               f"{low}..{high}")
    if high > limit:
        raise TooLarge(f"{high} components exceed the limit of {limit} "
                       "(MIXSCORE_MAX_COMPONENTS)")
    return list(range(low, high + 1))


def _weights(weights: list[float] | None, rows: int) -> np.ndarray | None:
    if weights is None:
        return None
    w = np.asarray(weights, dtype=np.float64)
    if w.shape != (rows,):
        raise InvalidInput.field("weights", f"has {w.size} values; there are {rows} rows")
    if not np.isfinite(w).all() or (w < 0).any() or w.sum() <= 0:
        raise InvalidInput.field("weights", "must be finite, non-negative and not all zero")
    return w


def _resolution(resolution: list[float | None] | None, dimension: int) -> list[float] | None:
    """One non-negative value per feature; null (or 0) where a feature has none."""
    if resolution is None:
        return None
    if len(resolution) != dimension:
        raise InvalidInput.field("resolution", f"has {len(resolution)} values; the points "
                                               f"have {dimension} features")
    values = [0.0 if value is None else value for value in resolution]
    for j, value in enumerate(values):
        if not (np.isfinite(value) and value >= 0):
            raise InvalidInput.field(f"resolution[{j}]", "must be a finite number >= 0 (null "
                                                         "or 0: none)")
    return values


def _check_options(body: FitRequest) -> None:
    if not 1 <= body.restarts <= MAX_RESTARTS:
        raise InvalidInput.field("restarts", f"must be between 1 and {MAX_RESTARTS}")
    if not 1 <= body.max_iterations <= MAX_ITERATIONS:
        raise InvalidInput.field("max_iterations", f"must be between 1 and {MAX_ITERATIONS}")
    for field in ("tolerance", "ridge"):
        value = getattr(body, field)
        if not (np.isfinite(value) and value >= 0):
            raise InvalidInput.field(field, "must be a finite number >= 0")
    if body.seed is not None and not 0 <= body.seed < 2**63:
        raise InvalidInput.field("seed", "must be between 0 and 2**63 - 1")


ROUTES = [submit_fit, read_job, list_jobs, cancel_job]
