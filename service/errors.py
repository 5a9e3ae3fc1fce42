"""One root error, a few children, and one mapping to RFC 9457 problem details."""

from __future__ import annotations

from typing import ClassVar

import msgspec

PROBLEM_MEDIA_TYPE = "application/problem+json"


class FieldError(msgspec.Struct, frozen=True):
    """One invalid field: a JSON-pointer-like path and what is wrong with it."""

    field: str
    message: str


class Problem(msgspec.Struct, frozen=True, omit_defaults=True):
    """RFC 9457 problem details; ``job``: the fit job a model without versions awaits."""

    type: str
    title: str
    status: int
    detail: str
    errors: list[FieldError] | None = None
    job: str | None = None


#: Titles of the statuses Litestar raises itself (unknown path, method, body size).
FRAMEWORK_TITLES = {404: "Not found", 405: "Method not allowed",
                    413: "The body exceeds the size limit (MIXSCORE_MAX_BODY_BYTES)"}


def framework_problem(status: int, detail: str) -> Problem:
    title = FRAMEWORK_TITLES.get(status, "Bad request" if status < 500 else "Server error")
    return Problem(type=f"urn:mixscore:problem:http-{status}", title=title, status=status,
                   detail=title if status == 413 else detail)


INTERNAL_PROBLEM = Problem(type="urn:mixscore:problem:internal", title="Internal error",
                           status=500, detail="an unexpected error occurred; it is logged")


class ServiceError(Exception):
    """Root of the errors the service answers with a problem, never a 500."""

    status: ClassVar[int] = 400
    slug: ClassVar[str] = "bad-request"
    title: ClassVar[str] = "Bad request"

    def __init__(self, detail: str, errors: list[FieldError] | None = None,
                 headers: dict[str, str] | None = None) -> None:
        super().__init__(detail)
        self.detail = detail
        self.errors = errors
        self.headers = headers or {}

    def problem(self) -> Problem:
        return Problem(type=f"urn:mixscore:problem:{self.slug}", title=self.title,
                       status=self.status, detail=self.detail, errors=self.errors)


class InvalidInput(ServiceError):
    status = 422
    slug = "invalid-input"
    title = "The request is not valid"

    @classmethod
    def field(cls, field: str, message: str) -> InvalidInput:
        return cls(f"{field}: {message}", [FieldError(field, message)])


def reused_key(given: str) -> InvalidInput:
    """An Idempotency-Key sent again with another request behind it."""
    return InvalidInput.field(
        "Idempotency-Key", f"{given!r} was sent before by this API key to this path with "
                           "another body; a repeat must be the same request: send a fresh "
                           "key for a new one")


class OutsideRoots(ServiceError):
    status = 403
    slug = "source-outside-roots"
    title = "The source is outside the roots this service may read"


class MalformedBody(ServiceError):
    status = 400
    slug = "malformed-body"
    title = "The body could not be decoded"


class UnsupportedMediaType(ServiceError):
    status = 415
    slug = "unsupported-media-type"
    title = "Unsupported media type"


class NotAcceptable(ServiceError):
    status = 406
    slug = "not-acceptable"
    title = "No acceptable media type"


class TooLarge(ServiceError):
    status = 413
    slug = "too-large"
    title = "Over a limit"


class Unauthorized(ServiceError):
    status = 401
    slug = "unauthorized"
    title = "Missing or unknown API key"


class Forbidden(ServiceError):
    status = 403
    slug = "forbidden"
    title = "The API key lacks the scope"


class NotFound(ServiceError):
    status = 404
    slug = "not-found"
    title = "Not found"


class BeingFitted(NotFound):
    """A model with no version yet, whose first fit job is queued or running."""

    slug = "model-being-fitted"
    title = "The model is being fitted"

    def __init__(self, name: str, job_id: str) -> None:
        super().__init__(f"model {name!r} has no version yet: fit job {job_id} is queued or "
                         f"running (GET /v1/jobs/{job_id}); retry when it has succeeded",
                         headers={"Retry-After": "5"})
        self.job_id = job_id

    def problem(self) -> Problem:
        return msgspec.structs.replace(super().problem(), job=self.job_id)


class Conflict(ServiceError):
    status = 409
    slug = "conflict"
    title = "Conflict with the stored state"


class TooManyRequests(ServiceError):
    status = 429
    slug = "too-many-requests"
    title = "Over a rate or concurrency limit"

    def __init__(self, detail: str, retry_after_s: int) -> None:
        super().__init__(detail, headers={"Retry-After": str(retry_after_s)})


def dimension_over(dimension: int, limit: int) -> str:
    return f"dimension {dimension} exceeds the limit of {limit} (MIXSCORE_MAX_DIMENSION)"


class Unavailable(ServiceError):
    status = 503
    slug = "unavailable"
    title = "Storage is unavailable"

    def __init__(self, detail: str, retry_after_s: int = 5) -> None:
        super().__init__(detail, headers={"Retry-After": str(retry_after_s)})


class NotReplicated(Unavailable):
    """A write the primary took but too few replicas confirmed in time: it may be lost if
    the primary fails now. Repeating the request confirms it without writing it twice."""

    slug = "not-replicated"
    title = "Stored, but not yet confirmed by enough replicas"

    def __init__(self, detail: str) -> None:
        super().__init__(detail, retry_after_s=1)
