"""Admission of inference requests: a cap on the requests in flight, a deadline for their work to
start, and the Retry-After a refused caller is given.

A request is in flight from the moment it is admitted until its work on the InferencePool ends,
queued or running. Past ``max_inflight`` it is refused at once (``Overloaded``, 429), so the pool's
queue never grows without bound. One whose work has not started ``deadline_s`` seconds after it was
admitted is taken off the pool's queue and refused (``DeadlinePassed``, 503) having done no work:
its caller has likely given up, and a worker is better spent on a request that is still wanted.

Both refusals say when to come back: the whole seconds the requests now in flight need to drain
through the pool's workers at the mean of recent service times (``retry_after_seconds``). It is an
estimate from a moving window, at least 1 s; jobs share the pool and are not counted in it.
"""
from __future__ import annotations

import asyncio
import math
import threading
import time
from collections import deque
from concurrent.futures import Future
from typing import TYPE_CHECKING, Callable

from .errors import DeadlinePassed, Overloaded

if TYPE_CHECKING:  # annotations only
    from .jobs import InferencePool
    from .metrics import Metrics

SERVICE_WINDOW = 32  # recent service times the estimate averages
DEFAULT_SERVICE_S = 1.0  # assumed service time, seconds, until one has been measured
MAX_RETRY_AFTER = 60  # seconds: a longer estimate says little more than "later"


def retry_after_seconds(backlog: int, service_s: float, workers: int, *, ceiling: int = MAX_RETRY_AFTER) -> int:
    """Whole seconds until `backlog` requests of `service_s` seconds each have gone through
    `workers` parallel workers (rounded up), clamped to [1, ceiling]: the Retry-After of a refusal.
    Little's law (L = lambda W) with throughput lambda = workers / service_s gives W = L service_s / workers."""
    if workers < 1 or backlog < 0 or not service_s >= 0.0 or ceiling < 1:
        raise ValueError(f"backlog={backlog!r}, service_s={service_s!r}, workers={workers!r}, ceiling={ceiling!r}: "
                         "expected backlog >= 0, service_s >= 0, workers >= 1 and ceiling >= 1")
    return int(min(ceiling, max(1, math.ceil(backlog * service_s / workers))))


class Admission:
    """Admits inference requests onto `pool`: at most `max_inflight` in flight, each given
    `deadline_s` seconds for its work to start. `clock` is in seconds (monotonic)."""

    def __init__(self, pool: "InferencePool", *, max_inflight: int, deadline_s: float,
                 metrics: "Metrics | None" = None, window: int = SERVICE_WINDOW,
                 default_service_s: float = DEFAULT_SERVICE_S, max_retry_after: int = MAX_RETRY_AFTER,
                 clock: Callable[[], float] = time.monotonic):
        for key, value in (("max_inflight", max_inflight), ("window", window), ("max_retry_after", max_retry_after)):
            if isinstance(value, bool) or not isinstance(value, int) or value < 1:
                raise ValueError(f"{key}: {value!r} is not allowed; expected an integer >= 1")
        for key, value in (("deadline_s", deadline_s), ("default_service_s", default_service_s)):
            if not value > 0.0:
                raise ValueError(f"{key}: {value!r} is not allowed; expected seconds > 0")
        self.pool, self.max_inflight, self.deadline_s = pool, max_inflight, float(deadline_s)
        self.default_service_s, self.max_retry_after, self.clock = float(default_service_s), max_retry_after, clock
        self.metrics = metrics
        self._lock = threading.Lock()
        self._inflight = 0
        self._service: deque[float] = deque(maxlen=window)
        if metrics is not None:
            metrics.inflight.set_function(lambda: self.in_flight)

    @property
    def in_flight(self) -> int:
        return self._inflight

    def service_time(self) -> float:
        """Mean seconds of the recent requests' work on the pool (the default before any)."""
        with self._lock:
            recent = list(self._service)
        return sum(recent) / len(recent) if recent else self.default_service_s

    def retry_after(self) -> int:
        """Whole seconds a refused caller should wait before it tries again (>= 1)."""
        return retry_after_seconds(self._inflight, self.service_time(), self.pool.workers,
                                   ceiling=self.max_retry_after)

    # -- one request ------------------------------------------------------------------------------
    def admit(self) -> None:
        """Count one more request in flight; Overloaded when `max_inflight` already are."""
        with self._lock:
            full = self._inflight >= self.max_inflight
            if not full:
                self._inflight += 1
        if full:
            self._shed("overloaded")
            raise Overloaded(f"the service is at its limit of max_inflight={self.max_inflight} inference requests "
                             f"in flight; retry after the Retry-After seconds", retry_after=self.retry_after())

    def release(self, _future: Future | None = None) -> None:
        """One admitted request's work is over (done, failed, or taken off the queue)."""
        with self._lock:
            self._inflight -= 1

    def _late(self, waited: float) -> DeadlinePassed:
        self._shed("deadline")
        return DeadlinePassed(f"the request waited {waited:.2f} s for an inference worker and its work had not "
                              f"started by request_deadline={self.deadline_s:g} s; nothing was computed, retry "
                              f"after the Retry-After seconds", retry_after=self.retry_after())

    def _shed(self, reason: str) -> None:
        if self.metrics is not None:
            self.metrics.shed.labels(reason).inc()

    async def run(self, fn: Callable, *args, inference: bool = True, **kwargs):
        """Await fn(*args, **kwargs) on the pool, from the event loop, as one admitted request:
        Overloaded at once when the cap is reached, DeadlinePassed when its work has not started
        by the deadline (then fn never runs)."""
        self.admit()
        admitted = self.clock()

        def work():  # on a pool worker
            began = self.clock()
            if began - admitted > self.deadline_s:  # started, but too late: the timer below lost the race
                raise self._late(began - admitted)
            try:
                return fn(*args, **kwargs)
            finally:
                spent = self.clock() - began
                with self._lock:
                    self._service.append(spent)

        try:
            future = self.pool.submit(work, inference=inference)
        except BaseException:
            self.release()
            raise
        future.add_done_callback(self.release)  # the slot frees when the work ends, even if the caller left
        answer = asyncio.wrap_future(future)
        try:
            done, _ = await asyncio.wait({answer}, timeout=self.deadline_s)
        except asyncio.CancelledError:  # the caller went away: drop the work if it has not started
            future.cancel()
            raise
        # cancel() succeeds only for work still queued: that request is refused and does nothing
        if not done and future.cancel():
            raise self._late(self.clock() - admitted)
        return await answer
