"""What the routes share: the per-app Services (settings, registry, model cache, pool, jobs,
metrics) and the reusable Annotated dependencies (services, API key, model name)."""
from __future__ import annotations

import hmac
import logging
import threading
from typing import Annotated

from fastapi import Depends, Request
from fastapi import Path as PathParam
from fastapi.security import APIKeyHeader, HTTPAuthorizationCredentials, HTTPBearer

from .admission import Admission
from .cache import ModelCache
from .durable import JobStore, Runtime, start_runtime, stop_runtime
from .errors import Unauthorized, Unavailable
from .jobs import InferencePool
from .metrics import Metrics
from .registry import NAME_RULE, Registry, RegistryError, check_name
from .settings import Settings

log = logging.getLogger("geotween.service")


class Services:
    """Everything one app instance owns; built in the lifespan, closed at shutdown."""

    def __init__(self, settings: Settings, metrics: Metrics | None = None):
        self.settings = settings
        self.metrics = metrics or Metrics()
        self.pool = InferencePool(settings.inference_workers)
        # requests enter the pool through admission (a cap and a deadline); jobs queue on their own
        self.admission = Admission(self.pool, max_inflight=settings.inflight_limit,
                                   deadline_s=settings.request_deadline, metrics=self.metrics)
        self.cache = ModelCache(self.registry, capacity=settings.model_cache)
        self._registry: Registry | None = None
        self._registry_lock = threading.Lock()
        self._jobs: JobStore | None = None
        self._jobs_lock = threading.Lock()
        self._runtime: Runtime | None = None
        try:
            self._open_jobs()
        except Unavailable as exc:  # keep serving frames: /readyz says 503 until the jobs' database opens
            log.warning("jobs not ready at start-up: %s", exc.message)
        self.metrics.bind(self.cache, self._active_jobs, self.pool)

    def _active_jobs(self) -> float:
        try:
            return self.jobs.active()
        except Unavailable:
            return float("nan")  # unknown while the jobs' database is down

    @property
    def jobs(self) -> JobStore:
        return self._open_jobs()

    def _open_jobs(self) -> JobStore:
        """The job store, opened on first use, with this process's job runtime when settings say it
        runs jobs; Unavailable (503) while the jobs' database cannot be opened."""
        with self._jobs_lock:
            if self._jobs is None:
                s = self.settings
                try:
                    url = s.jobs_database_url
                    self._jobs = JobStore(url, work_root=s.jobs_folder, queue_limit=s.job_queue,
                                          retention_s=s.job_retention, keep=s.jobs_kept)
                except Exception as exc:  # OSError, or the database driver's own errors
                    raise Unavailable(f"the jobs' database cannot be opened: {type(exc).__name__}",
                                      code="jobs_unavailable") from None
                if s.run_jobs:  # one command stays enough on one machine: serve runs the jobs too
                    self._runtime = Runtime(self.cache, self.pool, self.registry, s.jobs_folder, s.checkpoint_every,
                                            self.metrics, url, s.worker_id, s.job_workers)
                    start_runtime(self._runtime)
            return self._jobs

    def registry(self) -> Registry:
        """The registry, opened on first use; Unavailable (503) while it cannot be opened."""
        with self._registry_lock:
            if self._registry is None:
                root = self.settings.registry_root
                try:
                    self._registry = self.settings.open_registry()
                except (RegistryError, OSError) as exc:
                    raise Unavailable(f"the registry at {root} cannot be opened: {exc}",
                                      code="registry_unavailable") from None
            return self._registry

    def readiness(self) -> int:
        """The registry's generation when it and the jobs' database answer; Unavailable otherwise."""
        registry = self.registry()
        self.jobs.active()
        if not registry.readable():
            raise Unavailable(f"the registry at {registry.root} is not readable", code="registry_unavailable")
        try:
            return registry.generation()
        except RegistryError as exc:
            raise Unavailable(str(exc), code="registry_unavailable") from None

    def close(self) -> None:
        if self._runtime is not None:
            stop_runtime(self._runtime)  # a running job is resumed by the next runtime with this worker id
        if self._jobs is not None:
            self._jobs.close()
        self.pool.shutdown()


# -- dependencies -------------------------------------------------------------------------------
async def get_services(request: Request) -> Services:
    services = getattr(request.app.state, "services", None)
    if services is None:  # the lifespan has not run (or has ended)
        raise Unavailable("the service is not started", code="not_started")
    return services


def note(request: Request, **fields) -> None:
    """Add fields (model, frames, rejected...) to this request's access-log line."""
    request.scope.setdefault("geotween", {}).update(fields)


ServicesDep = Annotated[Services, Depends(get_services)]

_bearer = HTTPBearer(auto_error=False, description="an API key from GEOTWEEN_API_KEYS")
_header = APIKeyHeader(name="X-API-Key", auto_error=False, description="an API key from GEOTWEEN_API_KEYS")


async def offered_key(bearer: Annotated[HTTPAuthorizationCredentials | None, Depends(_bearer)],
                      header: Annotated[str | None, Depends(_header)]) -> str | None:
    """The key the caller sent, if any (Bearer first, then X-API-Key)."""
    return bearer.credentials if bearer is not None else header


def authorize(settings: Settings, offered: str | None) -> str:
    """The caller's key as 'key#<n>' (never the secret); Unauthorized when missing or wrong."""
    keys = settings.key_bytes()
    if not keys:
        raise Unauthorized("writes are disabled: no API keys are configured (set GEOTWEEN_API_KEYS)",
                           code="writes_disabled")
    if not offered:
        raise Unauthorized("this endpoint needs an API key: 'Authorization: Bearer <key>' or 'X-API-Key'",
                           code="missing_api_key")
    given = offered.encode("utf-8")
    # compare against every key so the time taken does not tell which one nearly matched
    matches = [hmac.compare_digest(given, key) for key in keys]
    if not any(matches):
        raise Unauthorized("the API key is not valid", code="invalid_api_key")
    return f"key#{matches.index(True) + 1}"


OfferedKey = Annotated[str | None, Depends(offered_key)]


async def require_api_key(services: ServicesDep, offered: OfferedKey) -> str:
    return authorize(services.settings, offered)


ApiKeyDep = Annotated[str, Depends(require_api_key)]


# the name rule, documented in the contract; `check_name` enforces it (with its own error code)
NAME_PATTERN = rf"^(?!.*\.\.){NAME_RULE}$"


async def valid_name(name: Annotated[str, PathParam(description="model name, e.g. 'relief-tile'",
                                                    json_schema_extra={"pattern": NAME_PATTERN})]) -> str:
    return check_name(name)


ModelName = Annotated[str, Depends(valid_name)]
