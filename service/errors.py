"""Service errors and the one function that maps any failure to an HTTP status and error body.

Every failure leaves the service as ``{"error": {"code", "message", "field"}}``. Errors raised by the
service itself::

    ServiceError(Exception)                          code, status, field
    ├── BadInput(ServiceError, ValueError)           422  a value breaks the contract
    │   └── InvalidImage                             422  not a readable PNG or JPEG
    ├── TooLarge(ServiceError, ValueError)           413  body or image over a named limit
    ├── Unauthorized(ServiceError, PermissionError)  401  missing or wrong API key
    ├── NotFound(ServiceError, LookupError)          404  no such job (models: registry errors)
    ├── Conflict(ServiceError)                       409  the job is not in a state that allows it
    ├── Overloaded(ServiceError)                     429  max_inflight requests in flight (Retry-After)
    └── Unavailable(ServiceError)                    503  registry unreadable, job queue full, draining
        └── DeadlinePassed                           503  work not started by request_deadline (Retry-After)

An error with ``retry_after`` (whole seconds, >= 1) is answered with a Retry-After header.

Domain errors from lower layers are mapped too (see ``describe``): registry ModelNotFound and
VersionNotFound to 404, InvalidName to 422, other RegistryError and BundleError to 503, SceneError
to 422, any other ValueError to 422 and LookupError to 404. Anything else is a 500 that hides its
details (the request id in the log finds them).
"""
from __future__ import annotations

from dataclasses import dataclass

from ..models.bundle import BundleError
from ..models.scene import SceneError
from .registry import InvalidName, ModelNotFound, RegistryError, VersionNotFound


class ServiceError(Exception):
    status = 500
    code = "internal"

    def __init__(self, message: str, *, field: str | None = None, code: str | None = None,
                 retry_after: int | None = None):
        super().__init__(message)
        self.message = message
        self.field = field
        if code is not None:
            self.code = code
        self.retry_after = None if retry_after is None else max(1, int(retry_after))


class BadInput(ServiceError, ValueError):
    status, code = 422, "invalid"


class InvalidImage(BadInput):
    code = "invalid_image"


class TooLarge(ServiceError, ValueError):
    status, code = 413, "too_large"


class Unauthorized(ServiceError, PermissionError):
    status, code = 401, "unauthorized"


class NotFound(ServiceError, LookupError):
    status, code = 404, "not_found"


class Conflict(ServiceError):
    status, code = 409, "conflict"


class Overloaded(ServiceError):
    status, code = 429, "overloaded"


class Unavailable(ServiceError):
    status, code = 503, "unavailable"


class DeadlinePassed(Unavailable):
    code = "deadline_passed"


@dataclass(frozen=True)
class ErrorInfo:
    status: int
    code: str
    message: str
    field: str | None = None

    def body(self) -> dict:
        return {"error": {"code": self.code, "message": self.message, "field": self.field}}


def describe(exc: BaseException, *, field: str | None = None) -> ErrorInfo:
    """Status, code, message and field for any exception (the one domain-to-HTTP map)."""
    if isinstance(exc, ServiceError):
        return ErrorInfo(exc.status, exc.code, exc.message, exc.field or field)
    if isinstance(exc, VersionNotFound):
        return ErrorInfo(404, "version_not_found", str(exc), field or "version")
    if isinstance(exc, ModelNotFound):
        return ErrorInfo(404, "model_not_found", str(exc), field or "name")
    if isinstance(exc, InvalidName):
        return ErrorInfo(422, "invalid_name", str(exc), field or "name")
    if isinstance(exc, RegistryError):
        return ErrorInfo(503, "registry_unavailable", str(exc), field)
    if isinstance(exc, SceneError):
        return ErrorInfo(422, "invalid_scene", str(exc), field or "scene")
    if isinstance(exc, BundleError):  # a registered bundle that will not load: not the caller's fault
        return ErrorInfo(503, "model_unavailable", str(exc), field)
    if isinstance(exc, ValueError):
        return ErrorInfo(422, "invalid", str(exc), field)
    if isinstance(exc, LookupError):
        return ErrorInfo(404, "not_found", str(exc), field)
    return ErrorInfo(500, "internal", "internal error; the request id in the log has the details", None)


# Status codes of Starlette's own HTTPExceptions, mapped to our codes.
HTTP_CODES = {400: "bad_request", 401: "unauthorized", 404: "not_found", 405: "method_not_allowed",
              409: "conflict", 413: "too_large", 415: "unsupported_media_type", 422: "invalid",
              503: "unavailable"}
