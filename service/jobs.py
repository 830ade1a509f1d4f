"""Background work: the one bounded executor for torch work, and in-memory jobs.

``InferencePool`` is the only place torch runs in the service: a ThreadPoolExecutor with a fixed
number of workers, so requests and jobs together never take more threads than configured. Work
runs under ``torch.inference_mode()`` unless it trains.

``JobManager`` runs long work (large fills, trainings) in submission order on a few orchestration
threads; the torch parts go through the same InferencePool. A job reports progress (done/total)
and is cancelled cooperatively: the cancel flag is checked at every progress report.

Jobs live in memory only: a restart loses every job, queued, running or finished, and its result.
Finished jobs are dropped ``retention_s`` seconds after they end, or earlier when more than
``keep`` finished jobs are held.
"""
from __future__ import annotations

import asyncio
import logging
import secrets
import threading
import time
from concurrent.futures import ThreadPoolExecutor
from dataclasses import dataclass, field
from typing import Any, Callable

import torch

from .errors import Conflict, ErrorInfo, NotFound, Unavailable, describe

log = logging.getLogger("geotween.jobs")

STATES = ("queued", "running", "done", "failed", "cancelled")
FINISHED = ("done", "failed", "cancelled")


class Cancelled(Exception):
    """Raised inside a job's work when its cancel flag is set (stops training at the next step)."""


def _call(fn: Callable, args: tuple, kwargs: dict, inference: bool):
    if inference:
        with torch.inference_mode():
            return fn(*args, **kwargs)
    return fn(*args, **kwargs)


class InferencePool:
    """One bounded executor for every piece of torch work; `workers` threads at most."""

    def __init__(self, workers: int = 2, *, name: str = "geotween-infer"):
        if isinstance(workers, bool) or not isinstance(workers, int) or workers < 1:
            raise ValueError(f"workers: {workers!r} is not allowed; expected an integer >= 1")
        self.workers = workers
        self._executor = ThreadPoolExecutor(max_workers=workers, thread_name_prefix=name)
        self._lock = threading.Lock()
        self._pending = 0  # submitted and not yet finished

    @property
    def pending(self) -> int:
        return self._pending

    def submit(self, fn: Callable, *args, inference: bool = True, **kwargs):
        with self._lock:
            self._pending += 1
        future = self._executor.submit(_call, fn, args, kwargs, inference)
        future.add_done_callback(self._done)
        return future

    def _done(self, _future) -> None:
        with self._lock:
            self._pending -= 1

    async def run(self, fn: Callable, *args, inference: bool = True, **kwargs):
        """Await fn(*args, **kwargs) on the pool, from the event loop."""
        return await asyncio.wrap_future(self.submit(fn, *args, inference=inference, **kwargs))

    def call(self, fn: Callable, *args, inference: bool = True, **kwargs):
        """Run fn on the pool and wait for it, from a thread that is not a pool worker."""
        return self.submit(fn, *args, inference=inference, **kwargs).result()

    def shutdown(self) -> None:
        self._executor.shutdown(wait=True, cancel_futures=True)


def _iso(ts: float | None) -> str | None:
    if ts is None:
        return None
    return time.strftime("%Y-%m-%dT%H:%M:%S", time.gmtime(ts)) + f".{int(ts % 1 * 1000):03d}Z"


@dataclass
class Job:
    id: str
    kind: str
    total: int
    model: str | None = None
    version: int | None = None
    state: str = "queued"
    done: int = 0
    created: float = field(default_factory=time.time)
    started: float | None = None
    finished: float | None = None
    result: Any = None
    error: ErrorInfo | None = None
    cancel_requested: threading.Event = field(default_factory=threading.Event)

    def to_dict(self) -> dict:
        """The job as JobOut expects it (the result itself is served separately)."""
        err = None if self.error is None else self.error.body()["error"]
        return {"id": self.id, "kind": self.kind, "state": self.state,
                "progress": {"done": self.done, "total": self.total}, "created": _iso(self.created),
                "started": _iso(self.started), "finished": _iso(self.finished), "error": err,
                "model": self.model, "version": self.version,
                "result": f"/v1/jobs/{self.id}/result" if self.state == "done" else None}


class JobContext:
    """What a job's work sees: progress reports (which may raise Cancelled) and the pool."""

    def __init__(self, job: Job, pool: InferencePool):
        self.job, self.pool = job, pool

    @property
    def cancelled(self) -> bool:
        return self.job.cancel_requested.is_set()

    def check(self) -> None:
        if self.cancelled:
            raise Cancelled(f"job {self.job.id} was cancelled")

    def progress(self, done: int, total: int | None = None) -> None:
        """Record progress; raises Cancelled when a cancel was asked for."""
        if total is not None:
            self.job.total = int(total)
        self.job.done = int(done)
        self.check()

    def compute(self, fn: Callable, *args, inference: bool = True, **kwargs):
        """Run torch work on the shared pool; cancel is checked before and after."""
        self.check()
        out = self.pool.call(fn, *args, inference=inference, **kwargs)
        self.check()
        return out


class JobManager:
    """In-memory jobs: at most `queue_limit` queued or running, `workers` running at once."""

    def __init__(self, pool: InferencePool, *, queue_limit: int = 16, workers: int = 1,
                 retention_s: float = 3600.0, keep: int = 64, clock: Callable[[], float] = time.time):
        for key, value in (("queue_limit", queue_limit), ("workers", workers), ("keep", keep)):
            if isinstance(value, bool) or not isinstance(value, int) or value < 1:
                raise ValueError(f"{key}: {value!r} is not allowed; expected an integer >= 1")
        if not retention_s > 0:
            raise ValueError(f"retention_s: {retention_s!r} is not allowed; expected seconds > 0")
        self.pool = pool
        self.queue_limit, self.retention_s, self.keep = queue_limit, float(retention_s), keep
        self.clock = clock
        self._runner = ThreadPoolExecutor(max_workers=workers, thread_name_prefix="geotween-job")
        self._jobs: dict[str, Job] = {}
        self._lock = threading.Lock()
        self._closed = False

    # -- queries ------------------------------------------------------------------------------
    def get(self, job_id: str) -> Job:
        self._purge()
        with self._lock:
            job = self._jobs.get(job_id)
        if job is None:
            raise NotFound(f"no job with id {job_id!r} (jobs are kept in memory for "
                           f"{self.retention_s:g} s after they finish, and lost on restart)",
                           field="id", code="job_not_found")
        return job

    def active(self) -> int:
        with self._lock:
            return sum(j.state in ("queued", "running") for j in self._jobs.values())

    def counts(self) -> dict[str, int]:
        with self._lock:
            out = dict.fromkeys(STATES, 0)
            for j in self._jobs.values():
                out[j.state] += 1
        return out

    def result(self, job_id: str) -> Any:
        """The result of a done job; Conflict while it runs or when it failed or was cancelled."""
        job = self.get(job_id)
        if job.state == "done":
            return job.result
        if job.state == "failed":
            err = job.error
            raise Conflict(f"job {job_id} failed: {err.message if err else 'unknown error'}",
                           field="id", code="job_failed")
        if job.state == "cancelled":
            raise Conflict(f"job {job_id} was cancelled; it has no result", field="id", code="job_cancelled")
        raise Conflict(f"job {job_id} is {job.state} ({job.done}/{job.total}); poll /v1/jobs/{job_id} "
                       f"until its state is 'done'", field="id", code="job_not_finished")

    # -- changes ------------------------------------------------------------------------------
    def submit(self, kind: str, work: Callable[[JobContext], Any], *, total: int,
               model: str | None = None, version: int | None = None) -> Job:
        """Queue work(ctx); Unavailable when `queue_limit` jobs are already queued or running."""
        self._purge()
        job = Job(id=secrets.token_hex(16), kind=kind, total=int(total), model=model, version=version,
                  created=self.clock())
        with self._lock:
            if self._closed:
                raise Unavailable("the service is shutting down; no new jobs", code="shutting_down")
            active = sum(j.state in ("queued", "running") for j in self._jobs.values())
            if active >= self.queue_limit:
                raise Unavailable(f"the job queue is full ({active} jobs queued or running, job_queue="
                                  f"{self.queue_limit}); retry later", code="job_queue_full")
            self._jobs[job.id] = job
        self._runner.submit(self._run, job, work)
        return job

    def cancel(self, job_id: str) -> Job:
        """Cancel a queued job at once, a running one at its next progress report."""
        job = self.get(job_id)
        with self._lock:
            if job.state == "queued":
                job.state, job.finished = "cancelled", self.clock()
            elif job.state == "running":
                job.cancel_requested.set()
            elif job.state in ("done", "failed"):
                raise Conflict(f"job {job_id} already {job.state}; nothing to cancel", field="id",
                               code="job_finished")
        return job

    def shutdown(self) -> None:
        """Cancel everything and wait for running work to stop."""
        with self._lock:
            self._closed = True
            for job in self._jobs.values():
                if job.state == "queued":
                    job.state, job.finished = "cancelled", self.clock()
                job.cancel_requested.set()
        self._runner.shutdown(wait=True, cancel_futures=True)

    def _run(self, job: Job, work: Callable[[JobContext], Any]) -> None:
        with self._lock:
            if job.state != "queued":  # cancelled while it waited
                return
            job.state, job.started = "running", self.clock()
        try:
            ctx = JobContext(job, self.pool)
            ctx.check()
            result = work(ctx)
        except Cancelled:
            state, result, error = "cancelled", None, None
        except Exception as exc:  # a job's failure is reported in its state, never raised
            state, result, error = "failed", None, describe(exc)
            if error.status >= 500:
                log.exception("job %s (%s) failed", job.id, job.kind)
        else:
            state, error = "done", None
        with self._lock:
            job.result, job.error = result, error
            job.state, job.finished = state, self.clock()
            if state == "done":
                job.done = job.total

    def _purge(self) -> None:
        now = self.clock()
        with self._lock:
            finished = sorted((j for j in self._jobs.values() if j.state in FINISHED),
                              key=lambda j: j.finished or 0.0)
            expired = [j for j in finished if now - (j.finished or now) > self.retention_s]
            extra = finished[:max(0, len(finished) - self.keep)]
            for j in expired + extra:
                self._jobs.pop(j.id, None)
