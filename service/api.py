"""The HTTP app: `create_app(settings)` wires routes, middleware and the one error shape.

Middleware, outermost first:
- ``Observe``: X-Request-ID, one JSON access-log line per request (logger "geotween.access"),
  request count and latency per route template, and a last-resort 500 in the error shape.
- ``BodyLimit``: 413 for bodies over max_body_bytes, from Content-Length before reading, or by
  counting bytes while a chunked body streams in.

Models are loaded on first use and cached per name@version; the registry is opened in the
lifespan (or on first use, while it cannot be opened /readyz answers 503). Jobs are kept in the
jobs' database (service/durable.py) and outlive restarts.
"""
from __future__ import annotations

import json
import logging
import re
import time
import uuid
from contextlib import asynccontextmanager

from fastapi import FastAPI, Request
from fastapi.exceptions import RequestValidationError
from fastapi.responses import JSONResponse
from starlette.concurrency import run_in_threadpool
from starlette.exceptions import HTTPException as StarletteHTTPException
from starlette.middleware import Middleware

from .deps import Services
from .errors import HTTP_CODES, ErrorInfo, ServiceError, describe
from .metrics import Metrics
from .registry import RegistryError
from .settings import Settings

access_log = logging.getLogger("geotween.access")
error_log = logging.getLogger("geotween.errors")

_REQUEST_ID = re.compile(r"[A-Za-z0-9._:-]{1,64}")
AUTH_CHALLENGE = 'Bearer realm="geotween"'


class BodyTooLarge(StarletteHTTPException):
    """Raised from receive() once a streamed body passes the limit (FastAPI re-raises HTTPExceptions)."""

    def __init__(self, limit: int):
        super().__init__(413, f"the request body is larger than max_body_bytes={limit} bytes")


def _json_error(info: ErrorInfo, headers: dict | None = None) -> JSONResponse:
    headers = dict(headers or {})
    if info.status == 401:
        headers.setdefault("WWW-Authenticate", AUTH_CHALLENGE)
    return JSONResponse(info.body(), status_code=info.status, headers=headers)


async def _send_error(send, info: ErrorInfo, extra_headers: list[tuple[bytes, bytes]] = ()) -> None:
    body = json.dumps(info.body()).encode()
    headers = [(b"content-type", b"application/json"), (b"content-length", str(len(body)).encode()),
               *extra_headers]
    await send({"type": "http.response.start", "status": info.status, "headers": headers})
    await send({"type": "http.response.body", "body": body})


class BodyLimit:
    """Pure ASGI middleware: refuse bodies over `max_body_bytes` before they are read whole."""

    def __init__(self, app, max_body_bytes: int = 8 * 1024 * 1024):
        self.app, self.max_body_bytes = app, max_body_bytes

    async def __call__(self, scope, receive, send):
        if scope["type"] != "http":
            return await self.app(scope, receive, send)
        limit = self.max_body_bytes
        length = dict(scope.get("headers") or []).get(b"content-length")
        if length is not None:
            try:
                declared = int(length)
            except ValueError:
                declared = -1
            if declared < 0:
                return await _send_error(send, ErrorInfo(400, "bad_request", "Content-Length is not a "
                                                         "non-negative integer", None), [(b"connection", b"close")])
            if declared > limit:
                info = ErrorInfo(413, "body_too_large", f"the request body ({declared} bytes) is larger than "
                                 f"max_body_bytes={limit} bytes", None)
                return await _send_error(send, info, [(b"connection", b"close")])
        received = 0
        started = False

        async def limited_receive():
            nonlocal received
            message = await receive()
            if message["type"] == "http.request":
                received += len(message.get("body", b""))
                if received > limit:
                    raise BodyTooLarge(limit)
            return message

        async def tracking_send(message):
            nonlocal started
            if message["type"] == "http.response.start":
                started = True
            await send(message)

        try:
            await self.app(scope, limited_receive, tracking_send)
        except BodyTooLarge as exc:
            if started:
                raise
            await _send_error(send, ErrorInfo(413, "body_too_large", exc.detail, None),
                              [(b"connection", b"close")])


class Observe:
    """Pure ASGI middleware: request id, access log, metrics, and a 500 in the error shape."""

    def __init__(self, app):
        self.app = app

    async def __call__(self, scope, receive, send):
        if scope["type"] != "http":
            return await self.app(scope, receive, send)
        incoming = dict(scope.get("headers") or []).get(b"x-request-id", b"").decode("latin-1")
        request_id = incoming if _REQUEST_ID.fullmatch(incoming) else uuid.uuid4().hex
        notes = scope.setdefault("geotween", {})
        notes["request_id"] = request_id
        status, started, recorded = 500, False, False
        t0 = time.perf_counter()

        def record() -> None:
            # once, before the last byte goes out, so a caller that has its answer sees it counted
            nonlocal recorded
            if recorded:
                return
            recorded = True
            elapsed = time.perf_counter() - t0
            template = getattr(scope.get("route"), "path", None) or "unmatched"
            method = scope.get("method", "")
            metrics: Metrics = scope["app"].state.metrics
            metrics.requests.labels(template, method, str(status)).inc()
            metrics.latency.labels(template, method).observe(elapsed)
            line = {"time": _utc(time.time()), "method": method, "path": scope.get("path"), "route": template,
                    "status": status, "latency_ms": round(elapsed * 1000.0, 2), "model": notes.get("model"),
                    "version": notes.get("version"), "frames": notes.get("frames"),
                    "rejected": notes.get("rejected"), "job": notes.get("job"), "key": notes.get("key"),
                    "request_id": request_id}
            access_log.info(json.dumps(line), extra={"access": line})

        async def observed_send(message):
            nonlocal status, started
            if message["type"] == "http.response.start":
                status, started = message["status"], True
                message = {**message, "headers": [*message.get("headers", []),
                                                  (b"x-request-id", request_id.encode())]}
            elif message["type"] == "http.response.body" and not message.get("more_body", False):
                record()
            await send(message)

        try:
            await self.app(scope, receive, observed_send)
        except Exception:  # the last resort: log it, answer in the error shape, keep serving
            error_log.exception("unhandled error in %s %s (request_id=%s)", scope.get("method"),
                                scope.get("path"), request_id)
            if not started:
                status = 500
                await _send_error(observed_send, describe(RuntimeError()))
        finally:
            record()


def _utc(ts: float) -> str:
    return time.strftime("%Y-%m-%dT%H:%M:%S", time.gmtime(ts)) + f".{int(ts % 1 * 1000):03d}Z"


# -- exception handlers: every failure in one shape ---------------------------------------------
def _field(loc) -> str | None:
    """('body', 'targets', 3, 'x') -> 'targets[3].x'; the leading location kind is dropped."""
    loc = list(loc)
    if loc and loc[0] in ("body", "path", "query", "header", "cookie"):
        loc = loc[1:]
    parts = [str(p) for p in loc]
    out = ""
    for p in parts:
        out += f"[{p}]" if p.isdigit() else (f".{p}" if out else p)
    return out or None


async def _on_validation(request: Request, exc: RequestValidationError) -> JSONResponse:
    errors = exc.errors()
    if any(e.get("type") == "json_invalid" for e in errors):
        e = next(e for e in errors if e.get("type") == "json_invalid")
        why = (e.get("ctx") or {}).get("error", "JSON decode error")
        return _json_error(ErrorInfo(400, "invalid_json", f"the body is not valid JSON ({why})", None))
    first = errors[0] if errors else {}
    field = _field(first.get("loc", ()))
    parts = []
    for e in errors[:5]:
        where = _field(e.get("loc", ())) or "body"
        parts.append(f"{where}: {e.get('msg', 'invalid')}")
    more = f" (and {len(errors) - 5} more)" if len(errors) > 5 else ""
    code = "missing" if first.get("type") == "missing" else "invalid"
    return _json_error(ErrorInfo(422, code, "; ".join(parts) + more, field))


async def _on_http(request: Request, exc: StarletteHTTPException) -> JSONResponse:
    code = "body_too_large" if isinstance(exc, BodyTooLarge) else HTTP_CODES.get(exc.status_code, "http_error")
    message = exc.detail if isinstance(exc.detail, str) else str(exc.detail)
    if exc.status_code == 404 and message == "Not Found":
        message = f"no endpoint at {request.url.path}"
    if exc.status_code == 405:
        message = f"method {request.method} is not allowed at {request.url.path}"
    return _json_error(ErrorInfo(exc.status_code, code, message, None), headers=exc.headers)


async def _on_domain(request: Request, exc: Exception) -> JSONResponse:
    info = describe(exc)
    if info.status >= 500 and not isinstance(exc, (ServiceError, RegistryError)):
        error_log.exception("error in %s %s", request.method, request.url.path, exc_info=exc)
    retry_after = getattr(exc, "retry_after", None)  # refused for load: when to come back (RFC 9110, 10.2.3)
    return _json_error(info, headers={"Retry-After": str(retry_after)} if retry_after else None)


# -- the app ------------------------------------------------------------------------------------
def create_app(settings: Settings | None = None) -> FastAPI:
    """The geotween HTTP app; `settings` default to the GEOTWEEN_* environment."""
    from .routes import common, jobs, maps, models, ops, trainings, viewer

    settings = settings or Settings()

    @asynccontextmanager
    async def lifespan(app: FastAPI):
        # off the event loop: the job runtime's start-up talks to its database synchronously
        services = await run_in_threadpool(Services, settings, app.state.metrics)
        app.state.services = services
        try:
            services.registry()
        except ServiceError as exc:  # keep serving: /readyz says 503 until the registry opens
            error_log.warning("registry not ready at start-up: %s", exc.message)
        try:
            yield
        finally:
            app.state.services = None
            await run_in_threadpool(services.close)

    app = FastAPI(
        title="geotween",
        version="1",
        summary="In-between frames along latent geodesics, each with a calibrated confidence.",
        description="Frames are synthesized by a learned model, not captured. Every error is "
                    '`{"error": {"code", "message", "field"}}`. Jobs are kept in a database and '
                    "outlive restarts: queued jobs run, running ones resume, finished ones keep "
                    "their result for the retention time.",
        lifespan=lifespan,
        middleware=[Middleware(Observe), Middleware(BodyLimit, max_body_bytes=settings.max_body_bytes)],
    )
    app.state.settings = settings
    app.state.metrics = Metrics()
    app.state.services = None
    app.state.draining = False  # set by the server on SIGTERM (service.drain); /readyz then answers 503
    app.add_exception_handler(RequestValidationError, _on_validation)
    app.add_exception_handler(StarletteHTTPException, _on_http)
    for kind in (ServiceError, RegistryError, ValueError, LookupError):
        app.add_exception_handler(kind, _on_domain)
    for module in (ops, models, maps, jobs, trainings, viewer):
        app.include_router(module.router)
    common.add_file_schemas(app)  # the ZIP answers' manifest.json
    return app
