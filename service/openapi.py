"""The OpenAPI 3.1 document, built from one table of operations and the wire Structs.

Handlers read raw bodies (to choose JSON or MessagePack themselves), so the schema
is declared here rather than inferred: every body in both media types, every
error status as application/problem+json. A test keeps this table and the
app's routes in step, and another keeps openapi/openapi.json in step with it.
"""

from __future__ import annotations

from dataclasses import dataclass
from functools import cache
from importlib.metadata import version
from typing import Any

import msgspec

from . import schemas
from .codec import JSON, MSGPACK_TYPES
from .errors import PROBLEM_MEDIA_TYPE, Problem
from .examples import EXAMPLES
from .store import MODEL_NAME

BODY_TYPES = (JSON, *MSGPACK_TYPES)
#: Errors every operation can answer (400: a malformed header, such as an invalid Host,
#: refused before routing), every one with a key (429: its rate limit), and every
#: body-reading one.
HTTP_ERRORS = (400,)
AUTH_ERRORS = (401, 403, 429)
BODY_ERRORS = (400, 413, 415, 422)
READ_ERRORS = (404, 406, 503)
#: What each error status means, as the problem's title says it.
ERROR_MEANINGS = {
    400: "The request could not be read (a body that does not decode, or a malformed "
         "header)", 401: "Missing or unknown API key",
    403: "The API key lacks the scope", 404: "Not found (the problem says what)",
    406: "No acceptable media type", 409: "Conflict with the stored state",
    413: "Over a limit (the problem names the setting)", 415: "Unsupported media type",
    422: "The request is not valid (the problem names the field)",
    429: "Over a rate or concurrency limit (see Retry-After)",
    503: "Storage is unavailable, or a write is not yet confirmed by enough replicas "
         "(not-replicated: repeat it, with the same Idempotency-Key where it takes one; "
         "see Retry-After)"}


@dataclass(frozen=True)
class Operation:
    method: str
    path: str
    summary: str
    scope: str | None
    response: type[msgspec.Struct] | None
    request: type[msgspec.Struct] | None = None
    status: int = 200
    errors: tuple[int, ...] = ()
    version_query: bool = False
    #: The media type of a response that is no Struct.
    raw_media: str = "text/plain"
    #: Optional string query parameters: (name, description).
    queries: tuple[tuple[str, str], ...] = ()
    #: What a repeated Idempotency-Key header does; empty: the header is not read.
    idempotency: str = ""


OPERATIONS = (
    Operation("get", "/healthz", "Liveness: the process answers.", None, schemas.Health),
    Operation("get", "/readyz", "Readiness: Redis answers a ping.", None, schemas.Health,
              errors=(503,)),
    Operation("get", "/metrics", "Prometheus text exposition; with MIXSCORE_METRICS_ACCESS=key "
              "it needs an API key with the metrics scope.", None, None,
              errors=(401, 403, 429)),
    Operation("get", "/openapi.json", "This document.", None, None),
    Operation("get", "/docs", "This document as a readable HTML page.", None, None,
              raw_media="text/html"),
    Operation("get", "/v1/models", "List models.", "score", schemas.ModelList,
              errors=(406, 503)),
    Operation("get", "/v1/models/{name}", "One model and its versions.", "score",
              schemas.ModelDetail, errors=(422, *READ_ERRORS)),
    Operation("post", "/v1/models/{name}/versions", "Import a parameter set as a new version.",
              "fit", schemas.VersionCreated, schemas.ImportRequest, status=201,
              errors=(*BODY_ERRORS, 406, 409, 503),
              idempotency="A repeat returns the version the first request made."),
    Operation("get", "/v1/models/{name}/versions/{version}",
              "A version's parameters, fit report and provenance.", "score",
              schemas.VersionDetail, errors=(422, *READ_ERRORS)),
    Operation("delete", "/v1/models/{name}/versions/{version}",
              "Delete a version that is not serving.", "admin", schemas.VersionDeleted,
              errors=(409, 422, *READ_ERRORS)),
    Operation("put", "/v1/models/{name}/serving", "Promote or roll back: set the serving "
              "version.", "admin", schemas.ServingChanged, schemas.ServingRequest,
              errors=(*BODY_ERRORS, *READ_ERRORS)),
    Operation("post", "/v1/models/{name}/log-density",
              "Log-density and tail fraction of each point.", "score",
              schemas.LogDensityResponse, schemas.PointsRequest,
              errors=(*BODY_ERRORS, *READ_ERRORS), version_query=True),
    Operation("post", "/v1/models/{name}/responsibilities",
              "Posterior probability of each component, and the most probable one.", "score",
              schemas.ResponsibilitiesResponse, schemas.PointsRequest,
              errors=(*BODY_ERRORS, *READ_ERRORS), version_query=True),
    Operation("post", "/v1/models/{name}/samples", "Draw synthetic points.", "score",
              schemas.SamplesResponse, schemas.SamplesRequest,
              errors=(*BODY_ERRORS, *READ_ERRORS), version_query=True),
    Operation("post", "/v1/models/{name}/fits", "Submit a fit job (202; Location: the job).",
              "fit", schemas.Job, schemas.FitRequest, status=202,
              errors=(*BODY_ERRORS, 404, 406, 409, 429, 503),
              idempotency="A repeat within 24 h returns the first request's job."),
    Operation("get", "/v1/jobs/{job_id}", "A fit job: state, attempts, progress, result.",
              "fit", schemas.Job, errors=READ_ERRORS),
    Operation("get", "/v1/jobs", "Recent fit jobs, newest first (at most 100).", "fit",
              schemas.JobList, errors=(406, 422, 503),
              queries=(("model", "Only this model's jobs."),
                       ("state", "Only jobs in this state: queued, running, succeeded, "
                                 "failed or cancelled."))),
    Operation("delete", "/v1/jobs/{job_id}", "Cancel a queued or running fit job.", "fit",
              schemas.Job, errors=(409, *READ_ERRORS)),
    Operation("post", "/v1/datasets", "Create a dataset for training data sent in chunks.",
              "fit", schemas.Dataset, schemas.DatasetRequest, status=201,
              errors=(*BODY_ERRORS, 406, 503),
              idempotency="A repeat returns the dataset the first request made (while it "
                          "lives)."),
    Operation("post", "/v1/datasets/{dataset_id}/chunks", "Append rows to a dataset.", "fit",
              schemas.Dataset, schemas.ChunkRequest, errors=(*BODY_ERRORS, *READ_ERRORS),
              idempotency="A repeat appends nothing (while the dataset lives)."),
    Operation("get", "/v1/datasets/{dataset_id}", "A dataset's rows, bytes and expiry.",
              "fit", schemas.Dataset, errors=READ_ERRORS),
    Operation("delete", "/v1/datasets/{dataset_id}", "Delete a dataset.", "fit",
              schemas.Dataset, errors=READ_ERRORS),
    Operation("get", "/v1/models/{name}/versions/{version}/report",
              "The version's fit report: an HTML page with its summary and plots.", "score",
              None, errors=(404, 422, 503), raw_media="text/html",
              queries=(("x", "Feature (name or index) on the pair plot's horizontal axis; "
                             "default: of the pair on which the components separate best."),
                       ("y", "Feature on the vertical axis; default: the other of that "
                             "pair."))),
    Operation("post", "/v1/models/{name}/conditional",
              "Fill missing features with their conditional mean.", "score",
              schemas.ConditionalResponse, schemas.PointsRequest,
              errors=(*BODY_ERRORS, *READ_ERRORS), version_query=True),
    Operation("post", "/v1/models/{name}/explanations",
              "Why each point is unusual: per feature, its distribution given the point's "
              "other features, and the feature least in line with them.", "score",
              schemas.ExplanationsResponse, schemas.PointsRequest,
              errors=(*BODY_ERRORS, *READ_ERRORS), version_query=True),
)


def _content(ref: dict[str, Any], types: tuple[str, ...]) -> dict[str, Any]:
    return {media: {"schema": ref} for media in types}


def _parameters(operation: Operation) -> list[dict[str, Any]]:
    found = []
    if "{name}" in operation.path:
        found.append({"name": "name", "in": "path", "required": True,
                      "schema": {"type": "string", "pattern": MODEL_NAME.pattern}})
    if "{dataset_id}" in operation.path:
        found.append({"name": "dataset_id", "in": "path", "required": True,
                      "schema": {"type": "string"}})
    if "{job_id}" in operation.path:
        found.append({"name": "job_id", "in": "path", "required": True,
                      "schema": {"type": "string"}})
    if "{version}" in operation.path:
        found.append({"name": "version", "in": "path", "required": True,
                      "schema": {"type": "integer", "minimum": 1}})
    for query, description in operation.queries:
        found.append({"name": query, "in": "query", "required": False,
                      "description": description, "schema": {"type": "string"}})
    if operation.idempotency:
        found.append({"name": "Idempotency-Key", "in": "header", "required": False,
                      "description": "Any string naming this request, for this API key "
                                     "and path. " + operation.idempotency + " The same key "
                                     "with another body answers 422.",
                      "schema": {"type": "string"}})
    if operation.version_query:
        found.append({"name": "version", "in": "query", "required": False,
                      "description": "Score with this version instead of the serving one.",
                      "schema": {"type": "integer", "minimum": 1}})
    return found


def _with_example(content: dict[str, Any], example: Any) -> dict[str, Any]:
    """The example on the first media type (JSON for bodies, the raw type otherwise)."""
    first = next(iter(content))
    return {**content, first: {**content[first], "example": example}}


def _operation(operation: Operation) -> dict[str, Any]:
    ref = "#/components/schemas/{}".format
    example = EXAMPLES[(operation.method, operation.path)]
    item: dict[str, Any] = {"summary": operation.summary,
                            "operationId": operation.method + operation.path.replace("/", "_")
                            .replace("{", "").replace("}", "").replace("-", "_").replace(".", "_"),
                            "parameters": _parameters(operation)}
    if operation.request is not None:
        item["requestBody"] = {"required": True, "content": _with_example(_content(
            {"$ref": ref(operation.request.__name__)}, BODY_TYPES), example.request)}
    if operation.response is None:
        success: dict[str, Any] = {"description": "OK",
                                   "content": {operation.raw_media: {"schema": {"type": "string"}}}}
        if operation.path == "/openapi.json":
            success["content"] = {JSON: {"schema": {"type": "object"}}}
    else:
        types = BODY_TYPES if operation.path.startswith("/v1/") else (JSON,)
        success = {"description": "OK", "content": _content(
            {"$ref": ref(operation.response.__name__)}, types)}
    success["content"] = _with_example(success["content"], example.answer)
    responses = {str(operation.status): success}
    errors = HTTP_ERRORS + operation.errors + (AUTH_ERRORS if operation.scope else ())
    for status in sorted(set(errors)):
        if status == 503 and operation.path == "/readyz":
            responses["503"] = {"description": "Not ready", "content": _content(
                {"$ref": ref("Health")}, (JSON,))}
            continue
        responses[str(status)] = {"description": ERROR_MEANINGS[status], "content": {
            PROBLEM_MEDIA_TYPE: {"schema": {"$ref": ref("Problem")}}}}
    item["responses"] = responses
    if operation.scope:
        item["security"] = [{"apiKey": []}]
        item["description"] = f"Needs an API key with the `{operation.scope}` scope."
    return item


@cache
def document() -> dict[str, Any]:
    types = {o.request for o in OPERATIONS if o.request} | {
        o.response for o in OPERATIONS if o.response} | {Problem}
    _, components = msgspec.json.schema_components(
        sorted(types, key=lambda t: t.__name__), ref_template="#/components/schemas/{name}")
    paths: dict[str, dict[str, Any]] = {}
    for operation in OPERATIONS:
        paths.setdefault(operation.path, {})[operation.method] = _operation(operation)
    return {
        "openapi": "3.1.0",
        "info": {"title": "mixscore", "version": version("mixscore"),
                 "description": "Probabilistic scoring with Gaussian mixture models. Bodies "
                                "are JSON or MessagePack, chosen by Content-Type and Accept; "
                                "errors are RFC 9457 problem details."},
        "paths": paths,
        "components": {
            "schemas": dict(sorted(components.items())),
            "securitySchemes": {"apiKey": {"type": "http", "scheme": "bearer",
                                           "description": "msk.<id>.<secret>"}},
        },
    }


@cache
def document_bytes() -> bytes:
    return msgspec.json.format(msgspec.json.encode(document()), indent=2) + b"\n"
