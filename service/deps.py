"""What the routes share: the per-app Services (settings, registry, model cache, pool, jobs,
metrics) and the reusable Annotated dependencies (services, API key, model name)."""
from __future__ import annotations

import hmac
import threading
from typing import Annotated

from fastapi import Depends, Request
from fastapi import Path as PathParam
from fastapi.security import APIKeyHeader, HTTPAuthorizationCredentials, HTTPBearer

from .cache import ModelCache
from .errors import Unauthorized, Unavailable
from .jobs import InferencePool, JobManager
from .metrics import Metrics
from .registry import NAME_RULE, Registry, RegistryError, check_name
from .settings import Settings


class Services:
    """Everything one app instance owns; built in the lifespan, closed at shutdown."""

    def __init__(self, settings: Settings, metrics: Metrics | None = None):
        self.settings = settings
        self.metrics = metrics or Metrics()
        self.pool = InferencePool(settings.inference_workers)
        self.jobs = JobManager(self.pool, queue_limit=settings.job_queue, workers=settings.job_workers,
                               retention_s=settings.job_retention, keep=settings.jobs_kept)
        self.cache = ModelCache(self.registry, capacity=settings.model_cache)
        self.metrics.bind(self.cache, self.jobs, self.pool)
        self._registry: Registry | None = None
        self._registry_lock = threading.Lock()

    def registry(self) -> Registry:
        """The registry, opened on first use; Unavailable (503) while it cannot be opened."""
        with self._registry_lock:
            if self._registry is None:
                root = self.settings.registry_root
                try:
                    self._registry = Registry.open(root)
                except (RegistryError, OSError) as exc:
                    raise Unavailable(f"the registry at {root} cannot be opened: {exc}",
                                      code="registry_unavailable") from None
            return self._registry

    def readiness(self) -> int:
        """The registry's generation when it answers; Unavailable otherwise."""
        registry = self.registry()
        if not registry.readable():
            raise Unavailable(f"the registry at {registry.root} is not readable", code="registry_unavailable")
        try:
            return registry.generation()
        except RegistryError as exc:
            raise Unavailable(str(exc), code="registry_unavailable") from None

    def close(self) -> None:
        self.jobs.shutdown()
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
