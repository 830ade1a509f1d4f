"""What the routes share: the per-app Services (settings, registry, model cache, pool, jobs,
metrics) and the reusable Annotated dependencies (services, API key, model name).

The model cache keeps one Engine per name@version (its latent graph built once). It asks the
registry for its generation counter on each lookup (one small SQLite read) and only re-reads
versions after a publish or delete bumped it, so a newly registered version is served without a
restart and nothing is reloaded per request.
"""
from __future__ import annotations

import hmac
import threading
from collections import OrderedDict
from pathlib import Path
from typing import Annotated, Callable

from fastapi import Depends, Request
from fastapi import Path as PathParam
from fastapi.security import APIKeyHeader, HTTPAuthorizationCredentials, HTTPBearer
from prometheus_client import CollectorRegistry, Counter, Gauge, Histogram, generate_latest

from ..models.bundle import read_manifest
from ..models.engine import Engine
from ..models.params import ParamSpace

from .errors import Unauthorized, Unavailable
from .jobs import InferencePool, JobManager
from .registry import ModelVersion, Registry, RegistryError, check_name
from .settings import Settings

MANIFESTS_KEPT = 256  # parsed manifests memoised; a few KB each
LATENCY_BUCKETS = (0.005, 0.01, 0.025, 0.05, 0.1, 0.25, 0.5, 1.0, 2.5, 5.0, 10.0, 30.0)  # seconds


class Metrics:
    """Prometheus metrics on a registry of this app's own (two apps in one process do not mix)."""

    def __init__(self):
        self.registry = CollectorRegistry(auto_describe=True)
        r = self.registry
        self.requests = Counter("geotween_requests", "HTTP requests answered, by route template",
                                ["route", "method", "status"], registry=r)
        self.latency = Histogram("geotween_request_duration_seconds", "HTTP request latency, seconds",
                                 ["route", "method"], buckets=LATENCY_BUCKETS, registry=r)
        self.frames_served = Counter("geotween_frames_served", "synthesized frames returned", ["model"],
                                     registry=r)
        self.frames_rejected = Counter("geotween_frames_rejected", "returned frames below min_confidence",
                                       ["model"], registry=r)
        self.cache_size = Gauge("geotween_model_cache_size", "models (name@version) loaded", registry=r)
        self.jobs_active = Gauge("geotween_jobs_active", "jobs queued or running", registry=r)
        self.inference_pending = Gauge("geotween_inference_pending",
                                       "torch work items submitted and not finished", registry=r)

    def bind(self, cache: "ModelCache", jobs: JobManager, pool: InferencePool) -> None:
        self.cache_size.set_function(lambda: cache.size)
        self.jobs_active.set_function(jobs.active)
        self.inference_pending.set_function(lambda: pool.pending)

    def frames(self, model: str, served: int, rejected: int) -> None:
        self.frames_served.labels(model).inc(served)
        self.frames_rejected.labels(model).inc(rejected)

    def render(self) -> bytes:
        return generate_latest(self.registry)


class ModelCache:
    """Up to `capacity` engines, least recently used dropped first; each loaded once."""

    def __init__(self, registry: Callable[[], Registry], *, capacity: int = 4,
                 loader: Callable[[Path], Engine] = Engine.load):
        if isinstance(capacity, bool) or not isinstance(capacity, int) or capacity < 1:
            raise ValueError(f"capacity: {capacity!r} is not allowed; expected an integer >= 1")
        self._registry, self.capacity, self._loader = registry, capacity, loader
        self._lock = threading.Lock()
        self._engines: OrderedDict[tuple[str, int, str], Engine] = OrderedDict()
        self._key_locks: dict[tuple[str, int, str], threading.Lock] = {}
        self._versions: dict[tuple[str, int | None], ModelVersion] = {}
        self._manifests: dict[tuple[str, int, str], dict] = {}
        self._generation: int | None = None
        self.loads = 0  # engines built since start (a reload per request would show here)

    @property
    def size(self) -> int:
        return len(self._engines)

    def lookup(self, name: str, version: int | None = None) -> ModelVersion:
        """The registered version (latest when None); ModelNotFound / VersionNotFound / InvalidName."""
        registry = self._registry()
        generation = registry.generation()
        with self._lock:
            changed = generation != self._generation
            if changed:
                self._generation = generation
                self._versions.clear()
            hit = self._versions.get((name, version))
        if changed:
            self._drop_stale(registry)
        if hit is not None:
            return hit
        entry = registry.get(name, version)
        with self._lock:
            if self._generation == generation:
                self._versions[(name, version)] = entry
        return entry

    def engine(self, entry: ModelVersion) -> Engine:
        """The engine of a registered version, built on first use (blocking: call it on the pool)."""
        key = (entry.name, entry.version, entry.hash)
        with self._lock:
            if key in self._engines:
                self._engines.move_to_end(key)
                return self._engines[key]
            key_lock = self._key_locks.setdefault(key, threading.Lock())
        with key_lock:  # concurrent first requests for one model build it once
            with self._lock:
                if key in self._engines:
                    self._engines.move_to_end(key)
                    return self._engines[key]
            engine = self._loader(entry.path)
            with self._lock:
                self.loads += 1
                self._engines[key] = engine
                while len(self._engines) > self.capacity:
                    self._engines.popitem(last=False)
                self._key_locks.pop(key, None)
        return engine

    def manifest(self, entry: ModelVersion) -> dict:
        """The bundle's manifest (JSON only, no weights), memoised per version."""
        key = (entry.name, entry.version, entry.hash)
        with self._lock:
            hit = self._manifests.get(key)
        if hit is None:
            hit = read_manifest(entry.path)
            with self._lock:
                if len(self._manifests) >= MANIFESTS_KEPT:
                    self._manifests.clear()
                self._manifests[key] = hit
        return hit

    def space(self, entry: ModelVersion) -> ParamSpace:
        """The model's parameter space, without loading its weights."""
        return ParamSpace.from_list(self.manifest(entry)["space"])

    def _drop_stale(self, registry: Registry) -> None:
        # rare (after a publish or delete): drop engines whose version was deleted or replaced
        with self._lock:
            keys = list(self._engines)
        for name, version, hash_ in keys:
            try:
                alive = registry.get(name, version).hash == hash_
            except (LookupError, RegistryError):
                alive = False
            if not alive:
                with self._lock:
                    self._engines.pop((name, version, hash_), None)


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


async def valid_name(name: Annotated[str, PathParam(description="model name, e.g. 'relief-tile'")]) -> str:
    return check_name(name)


ModelName = Annotated[str, Depends(valid_name)]
