"""Models and versions: list, read, import, promote, delete."""

from __future__ import annotations

from typing import Any

import numpy as np
from litestar import Request, delete, get, post, put
from litestar.types import ASGIApp

from core import Mixture

from ..errors import FieldError, InvalidInput, TooLarge
from ..schemas import (
    ImportRequest,
    ModelDetail,
    ModelList,
    ModelSummary,
    ParameterSet,
    ServingChanged,
    ServingRequest,
    VersionCreated,
    VersionDeleted,
    VersionDetail,
    VersionSummary,
)
from ..settings import Settings
from ..state import authorize, body_as, reply, request_key
from ..store import VersionRecord, check_model_name


@get("/v1/models")
async def list_models(request: Request[Any, Any, Any]) -> ASGIApp:
    found, _, answer_format = await authorize(request, "score")
    rows = await found.store.models()
    models = [ModelSummary(name=m["name"], dimension=int(m["dimension"]),
                           serving_version=_optional_int(m.get("serving")),
                           latest_version=int(m["latest"]), updated_at=m["updated_at"])
              for m in rows]
    return reply(ModelList(models=models), answer_format)


@get("/v1/models/{name:str}")
async def read_model(request: Request[Any, Any, Any]) -> ASGIApp:
    found, _, answer_format = await authorize(request, "score")
    name = request.path_params["name"]
    model, versions = await found.store.model(check_model_name(name))
    serving = _optional_int(model.get("serving"))
    detail = ModelDetail(
        name=name, dimension=int(model["dimension"]), serving_version=serving,
        latest_version=int(model["latest"]), created_at=model["created_at"],
        updated_at=model["updated_at"],
        versions=[VersionSummary(version=int(v["version"]), structure=v["structure"],  # type: ignore[arg-type]
                                 components=int(v["components"]),
                                 serving=int(v["version"]) == serving, source=v["source"],
                                 created_at=v["created_at"]) for v in versions])
    return reply(detail, answer_format)


@post("/v1/models/{name:str}/versions")
async def import_version(request: Request[Any, Any, Any]) -> ASGIApp:
    found, body_format, answer_format = await authorize(request, "fit")
    name = request.path_params["name"]
    check_model_name(name)
    body = await body_as(request, ImportRequest, found, body_format)
    record = VersionRecord(mixture=checked_mixture(body, found.settings),
                           feature_names=body.feature_names, quantiles=None, report=None,
                           provenance={"source": "import"}, source="import")
    key = request_key(request)
    version, serving = await found.store.create(name, record, body.serve,
                                                writer=f"import:{key.digest}", request=key)
    return reply(VersionCreated(model=name, version=version, serving=serving == version),
                 answer_format, status=201,
                 headers={"Location": f"/v1/models/{name}/versions/{version}"})


@get("/v1/models/{name:str}/versions/{version:int}")
async def read_version(request: Request[Any, Any, Any]) -> ASGIApp:
    found, _, answer_format = await authorize(request, "score")
    name, version = request.path_params["name"], request.path_params["version"]
    record = await found.store.load(check_model_name(name), version)
    serving, _ = await found.store.pointer(name)
    m = record.mixture
    parameters = ParameterSet(structure=m.structure,  # type: ignore[arg-type]
                              weights=m.weights.tolist(), means=m.means.tolist(),
                              covariances=m.covariances.tolist(),
                              feature_names=record.feature_names)
    detail = VersionDetail(model=name, version=version, serving=serving == version,
                           source=record.source, created_at=record.created_at,
                           parameters=parameters,
                           tail_fraction_available=record.quantiles is not None,
                           training_sample_rows=0 if record.sample is None else len(
                               record.sample.rows),
                           fit_report=record.report, provenance=record.provenance)
    return reply(detail, answer_format)


@delete("/v1/models/{name:str}/versions/{version:int}", status_code=200)
async def delete_version(request: Request[Any, Any, Any]) -> ASGIApp:
    found, _, answer_format = await authorize(request, "admin")
    name, version = request.path_params["name"], request.path_params["version"]
    await found.store.delete(check_model_name(name), version)
    found.cache.invalidate(name)
    return reply(VersionDeleted(model=name, version=version), answer_format)


@put("/v1/models/{name:str}/serving")
async def set_serving(request: Request[Any, Any, Any]) -> ASGIApp:
    found, body_format, answer_format = await authorize(request, "admin")
    name = request.path_params["name"]
    check_model_name(name)
    body = await body_as(request, ServingRequest, found, body_format)
    previous = await found.store.set_serving(name, body.version)
    found.cache.invalidate(name)
    return reply(ServingChanged(model=name, serving_version=body.version,
                                previous_version=previous), answer_format)


def checked_mixture(body: ParameterSet, settings: Settings) -> Mixture:
    """The core's full check of a parameter set, with the service's limits first."""
    k, d = len(body.means), len(body.means[0]) if body.means else 0
    if k > settings.max_components:
        raise TooLarge(f"{k} components exceed the limit of {settings.max_components} "
                       "(MIXSCORE_MAX_COMPONENTS)")
    if d > settings.max_dimension:
        raise TooLarge(f"dimension {d} exceeds the limit of {settings.max_dimension} "
                       "(MIXSCORE_MAX_DIMENSION)")
    if body.feature_names is not None and len(body.feature_names) != d:
        raise InvalidInput.field("feature_names", f"has {len(body.feature_names)} names; the "
                                                  f"means have {d} features")
    try:
        return Mixture(np.asarray(body.weights), body.means, body.covariances, body.structure)
    except ValueError as error:
        raise core_error(error) from None


def core_error(error: ValueError, rows_field: str = "points") -> InvalidInput:
    """A core ValueError as a 422 naming the field: its message starts with the argument."""
    message = str(error)
    if message.startswith("X"):
        message = rows_field + message[1:]
    field = message.split(" ", 1)[0].rstrip(";:,")
    return InvalidInput(message, [FieldError(field, message)])


def _optional_int(value: str | None) -> int | None:
    return int(value) if value else None


ROUTES = [list_models, read_model, import_version, read_version, delete_version, set_serving]
