"""Prometheus metrics of one app, on a registry of its own (two apps in one process do not mix)."""
from __future__ import annotations

from typing import TYPE_CHECKING, Callable

from prometheus_client import CollectorRegistry, Counter, Gauge, Histogram, generate_latest

if TYPE_CHECKING:  # only for annotations: the cache and the pools do not need this module
    from .cache import ModelCache
    from .jobs import InferencePool

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
        self.inflight = Gauge("geotween_inference_inflight", "inference requests admitted and not finished "
                              "(queued on the pool or running; capped by max_inflight)", registry=r)
        self.shed = Counter("geotween_requests_shed", "inference requests refused for load: 'overloaded' "
                            "(429, over max_inflight) or 'deadline' (503, not started by request_deadline)",
                            ["reason"], registry=r)

    def bind(self, cache: "ModelCache", active_jobs: Callable[[], int], pool: InferencePool) -> None:
        self.cache_size.set_function(lambda: cache.size)
        self.jobs_active.set_function(active_jobs)
        self.inference_pending.set_function(lambda: pool.pending)

    def frames(self, model: str, served: int, rejected: int) -> None:
        self.frames_served.labels(model).inc(served)
        self.frames_rejected.labels(model).inc(rejected)

    def render(self) -> bytes:
        return generate_latest(self.registry)
