"""Durable jobs: fills and trainings as DBOS workflows, kept in a database through restarts.

Where jobs live: a DBOS system database, SQLite in the registry folder (``jobs.sqlite``) by
default, PostgreSQL when GEOTWEEN_DATABASE_URL names one. Two sides use it:

- ``JobStore`` (every ``geotween serve``): enqueues, reads state and progress, cancels, and serves
  results, through a DBOS client. It runs no job itself.
- the *runtime* (``start_runtime``): runs the jobs of the queue. It runs inside ``geotween serve``
  unless GEOTWEEN_RUN_JOBS=false, and in every ``geotween worker``. One per process.

A fill is one workflow step per chunk of targets; the step's frames are its recorded output, so a
step cut short by a crash runs again and is recorded once: a frame is never lost or doubled. A
training is one step that saves a checkpoint every ``checkpoint_every`` training steps in the job's
folder and resumes from it when it runs again, then one step that publishes the bundle; a version
of the name that already holds this bundle (same hash) is taken as the job's own, so a publish
replayed after a crash registers nothing twice.

At start a runtime resumes the jobs its own id (GEOTWEEN_WORKER_ID) was running; queued jobs go to
whichever runtime takes them first. Two live runtimes must never share an id.
"""
from __future__ import annotations

import json
import logging
import secrets
import shutil
import threading
import time
from dataclasses import dataclass
from datetime import datetime, timezone
from pathlib import Path
from typing import Any, Callable

from dbos import DBOS, DBOSClient

from ..models.train import Checkpoint
from .answers import Answer, EncodedFrame, fill_answer, fill_chunk
from .errors import Conflict, NotFound, Unavailable, describe
from .jobs import Cancelled
from .registry import ModelNotFound

log = logging.getLogger("geotween.jobs")

QUEUE = "geotween-jobs"
VERSION = "geotween-jobs-1"  # serve and workers must agree on it to take each other's jobs
WORKFLOWS = {"fill": "geotween.fill", "training": "geotween.training"}
_NAMES = list(WORKFLOWS.values())
STATES = ("queued", "running", "done", "failed", "cancelled")
_STATE = {"ENQUEUED": "queued", "DELAYED": "queued", "PENDING": "running", "SUCCESS": "done",
          "ERROR": "failed", "MAX_RECOVERY_ATTEMPTS_EXCEEDED": "failed", "CANCELLED": "cancelled"}
_ACTIVE = ["ENQUEUED", "DELAYED", "PENDING"]
_FINISHED = ["SUCCESS", "ERROR", "MAX_RECOVERY_ATTEMPTS_EXCEEDED", "CANCELLED"]
MAX_ATTEMPTS = 50  # a job that kills its runtime this many times is failed, not retried forever


def _iso(ms: int | None) -> str | None:
    if ms is None:
        return None
    return datetime.fromtimestamp(ms / 1000, timezone.utc).strftime("%Y-%m-%dT%H:%M:%S.%f")[:-3] + "Z"


class JobFailed(Exception):
    """A job's failure as it is stored: the error body as JSON (one string, so it survives pickling)."""


# -- the runtime: what runs the jobs in this process ------------------------------------------------
@dataclass
class Runtime:
    cache: Any                      # ModelCache
    pool: Any                       # InferencePool
    registry: Callable[[], Any]     # () -> Registry
    work_root: Path                 # the jobs' folders: checkpoints, bundles being built
    checkpoint_every: int = 200
    metrics: Any = None


    database_url: str = ""
    worker_id: str = "local"
    concurrency: int = 1


# DBOS runs one runtime per process. Apps started one inside another (tests do that) stack: the
# newest app's runtime runs; when it stops, the one below runs again and resumes its jobs.
_stack: list[Runtime] = []
_runtime: Runtime | None = None
_runtime_lock = threading.Lock()


def _rt() -> Runtime:
    if _runtime is None:
        raise RuntimeError("no job runtime in this process")
    return _runtime


def _launch(rt: Runtime | None) -> None:
    global _runtime
    if _runtime is not None:
        DBOS.destroy(workflow_completion_timeout_sec=0)
        _runtime = None
    if rt is None:
        return
    _runtime = rt
    try:
        DBOS(config={"name": "geotween", "system_database_url": rt.database_url, "executor_id": rt.worker_id,
                     "application_version": VERSION, "log_level": "WARNING"})
        DBOS.launch()
        DBOS.register_queue(QUEUE, worker_concurrency=rt.concurrency, polling_interval_sec=0.25)
    except BaseException:
        _runtime = None
        DBOS.destroy()
        raise


def start_runtime(runtime: Runtime) -> None:
    """Run the queue's jobs in this process: resume the jobs `runtime.worker_id` was running, then
    take queued ones, `runtime.concurrency` at a time."""
    with _runtime_lock:
        _launch(runtime)
        _stack.append(runtime)


def stop_runtime(runtime: Runtime) -> None:
    """Stop taking jobs; a job still running is resumed by the next runtime with this id."""
    with _runtime_lock:
        if runtime not in _stack:
            return
        top = _stack[-1] is runtime
        _stack.remove(runtime)
        if top:
            _launch(_stack[-1] if _stack else None)


def _progress(done: int, total: int) -> None:
    DBOS.update_workflow_attributes(DBOS.workflow_id, {"done": int(done), "total": int(total)}, merge=True)


def _failing(fn):
    """Store a job's failure as JobFailed(error body JSON); cancellation stays what it is."""
    def wrapped(spec: dict) -> dict:
        try:
            return fn(spec)
        except Cancelled:
            raise
        except Exception as exc:
            if _runtime is None:  # the runtime stopped under the job: it stays running, resumed at restart
                raise
            info = describe(exc)
            if info.status >= 500:
                log.exception("job %s failed", DBOS.workflow_id)
            raise JobFailed(json.dumps(info.body()["error"])) from None
    return wrapped


@DBOS.step(name="geotween.fill_part")
def _fill_part(spec: dict, lo: int) -> list[dict]:
    rt = _rt()
    entry = rt.cache.lookup(spec["model"], spec["version"])
    targets = spec["targets"][lo:lo + spec["chunk"]]
    frames = rt.pool.call(fill_chunk, rt.cache, entry, targets, spec["min_confidence"], lo, spec["refine"],
                          spec.get("size", "working"), spec.get("format", "png"), spec.get("quality", 90))
    if rt.metrics is not None:
        rt.metrics.frames(entry.name, len(frames), sum(not f.accepted for f in frames))
    return [{"fields": f.fields, "png": f.png, "size": f.size} for f in frames]


@DBOS.workflow(name=WORKFLOWS["fill"], max_recovery_attempts=MAX_ATTEMPTS)
@_failing
def _fill(spec: dict) -> dict:
    n, done, rejected = len(spec["targets"]), 0, 0
    for lo in range(0, n, spec["chunk"]):
        part = _fill_part(spec, lo)
        done += len(part)
        rejected += sum(not f["fields"]["accepted"] for f in part)
        _progress(done, n)
    return {"frames": done, "rejected": rejected}


class _Watch:
    """A training's on_step: progress into the job's attributes and a look for a cancel, at most
    once a second."""

    def __init__(self, job_id: str):
        self.job_id, self.last = job_id, 0.0

    def __call__(self, done: int, total: int) -> None:
        now = time.monotonic()
        if now - self.last < 1.0 and done < total:
            return
        self.last = now
        DBOS.update_workflow_attributes(self.job_id, {"done": int(done), "total": int(total)}, merge=True)
        status = DBOS.get_workflow_status(self.job_id)
        if status is not None and status.status == "CANCELLED":
            raise Cancelled(f"job {self.job_id} was cancelled")


@DBOS.step(name="geotween.train")
def _train(spec: dict) -> str:
    from .training import build_bundle

    rt, job = _rt(), DBOS.workflow_id
    folder = rt.work_root / job
    bundle = folder / "bundle"
    if (bundle / "manifest.json").is_file():  # built by an earlier run of this step
        return str(bundle)
    building = folder / "building"
    shutil.rmtree(building, ignore_errors=True)
    building.mkdir(parents=True)
    rt.pool.call(build_bundle, spec["scene"], building, spec["name"], resolution=spec["resolution"],
                 steps=spec["steps"], budget=spec["budget"], seed=spec["seed"], tau=spec["tau"], quiet=True,
                 max_size=spec.get("max_size", 1024),
                 on_step=_Watch(job), checkpoint=Checkpoint(folder / "checkpoint.pt", rt.checkpoint_every),
                 inference=False)
    building.rename(bundle)
    return str(bundle)


@DBOS.step(name="geotween.publish")
def _publish(spec: dict, bundle: str) -> dict:
    from .training import calibration_warning

    rt = _rt()
    entry = publish_once(rt.registry(), spec["name"], Path(bundle))
    DBOS.update_workflow_attributes(DBOS.workflow_id, {"version": entry.version}, merge=True)
    shutil.rmtree(Path(bundle).parent, ignore_errors=True)
    return {"model": entry.name, "version": entry.version, "created": entry.created, "hash": entry.hash,
            "metrics": entry.metrics, "warning": calibration_warning(entry)}


def publish_once(registry, name: str, bundle: Path):
    """Publish the bundle as the next version of `name`, unless a version already holds it (same
    hash): then that version, so a publish run again after a crash registers nothing twice."""
    from ..models.bundle import read_manifest

    digest = read_manifest(bundle).hash
    try:
        same = [v for v in registry.versions(name) if v.hash == digest]
    except ModelNotFound:
        same = []
    return same[0] if same else registry.publish(name, lambda f: shutil.copytree(bundle, f, dirs_exist_ok=True))


@DBOS.workflow(name=WORKFLOWS["training"], max_recovery_attempts=MAX_ATTEMPTS)
@_failing
def _training(spec: dict) -> dict:
    return _publish(spec, _train(spec))


# -- the store: what the HTTP side sees -------------------------------------------------------------
class JobStore:
    """Jobs in the database at `url`: at most `queue_limit` queued or running; finished ones kept
    `retention_s` seconds (at most `keep` of them), then deleted with their results."""

    def __init__(self, url: str, *, work_root: Path, queue_limit: int = 16, retention_s: float = 3600.0,
                 keep: int = 64, clock: Callable[[], float] = time.time):
        for key, value in (("queue_limit", queue_limit), ("keep", keep)):
            if isinstance(value, bool) or not isinstance(value, int) or value < 1:
                raise ValueError(f"{key}: {value!r} is not allowed; expected an integer >= 1")
        if not retention_s > 0:
            raise ValueError(f"retention_s: {retention_s!r} is not allowed; expected seconds > 0")
        self.url, self.work_root = url, Path(work_root)
        self.queue_limit, self.retention_s, self.keep, self.clock = queue_limit, float(retention_s), keep, clock
        DBOS.migrate(url)  # creates the tables on first use; a no-op afterwards
        self._client = DBOSClient(system_database_url=url, application_name="geotween")
        self._lock = threading.Lock()
        self._purged = 0.0

    def close(self) -> None:
        self._client.destroy()

    # -- queries ------------------------------------------------------------------------------
    def _status(self, job_id: str, *, output: bool = False):
        found = self._client.list_workflows(workflow_ids=[job_id], load_input=False, load_output=output)
        if not found or found[0].name not in WORKFLOWS.values():
            raise NotFound(f"no job with id {job_id!r} (finished jobs are kept {self.retention_s:g} s)",
                           field="id", code="job_not_found")
        return found[0]

    def get(self, job_id: str) -> dict:
        """The job as JobOut expects it (the result itself is served by `result`)."""
        self._purge()
        return self._view(self._status(job_id, output=True))

    def _view(self, st) -> dict:
        attrs = st.attributes or {}
        state = _STATE[st.status]
        error = None
        if state == "failed":
            error = _error_body(st.error)
        total = int(attrs.get("total", 0))
        done = total if state == "done" else int(attrs.get("done", 0))
        return {"id": st.workflow_id, "kind": attrs.get("kind"), "state": state,
                "progress": {"done": done, "total": total}, "created": _iso(st.created_at),
                "started": _iso(st.dequeued_at), "finished": _iso(st.completed_at), "error": error,
                "model": attrs.get("model"), "version": attrs.get("version"),
                "result": f"/v1/jobs/{st.workflow_id}/result" if state == "done" else None}

    def active(self) -> int:
        return len(self._client.list_workflows(status=_ACTIVE, name=_NAMES, load_input=False,
                                               load_output=False))

    def counts(self) -> dict[str, int]:
        out = dict.fromkeys(STATES, 0)
        for st in self._client.list_workflows(name=_NAMES, load_input=False, load_output=False):
            out[_STATE[st.status]] += 1
        return out

    def kind(self, job_id: str) -> str:
        return (self._status(job_id).attributes or {}).get("kind", "")

    def result(self, job_id: str) -> Answer | dict:
        """A done job's result: a fill's Answer, a training's registered version; Conflict otherwise."""
        st = self._status(job_id, output=True)
        state, attrs = _STATE[st.status], st.attributes or {}
        if state == "failed":
            raise Conflict(f"job {job_id} failed: {_error_body(st.error)['message']}", field="id",
                           code="job_failed")
        if state == "cancelled":
            raise Conflict(f"job {job_id} was cancelled; it has no result", field="id", code="job_cancelled")
        if state != "done":
            raise Conflict(f"job {job_id} is {state}; poll /v1/jobs/{job_id} until its state is 'done'",
                           field="id", code="job_not_finished")
        if attrs.get("kind") == "training":
            return st.output
        frames = [EncodedFrame(f["fields"], f["png"], tuple(f.get("size", (0, 0))))
                  for step in self._client.list_workflow_steps(job_id) if step["function_name"] == "geotween.fill_part"
                  for f in step["output"]]
        return fill_answer(frames, attrs["model"], attrs["version"], attrs.get("tau"), attrs.get("format", "png"))

    # -- changes ------------------------------------------------------------------------------
    def submit(self, kind: str, spec: dict, *, total: int, model: str | None = None,
               version: int | None = None, tau: float | None = None) -> dict:
        """Queue a job; Unavailable when `queue_limit` jobs are already queued or running."""
        self._purge()
        with self._lock:  # one process's submits do not race each other past the limit
            active = self.active()
            if active >= self.queue_limit:
                raise Unavailable(f"the job queue is full ({active} jobs queued or running, job_queue="
                                  f"{self.queue_limit}); retry later", code="job_queue_full")
            job_id = secrets.token_hex(16)
            attrs = {"kind": kind, "model": model, "version": version, "tau": tau, "done": 0, "total": int(total),
                     "format": spec.get("format", "png")}
            self._client.enqueue({"queue_name": QUEUE, "workflow_name": WORKFLOWS[kind], "workflow_id": job_id,
                                  "app_version": VERSION, "attributes": attrs}, spec)
        return self.get(job_id)

    def cancel(self, job_id: str) -> dict:
        """Cancel a queued job at once, a running one at its next step (a training within a second)."""
        st = self._status(job_id)
        if _STATE[st.status] in ("done", "failed"):
            raise Conflict(f"job {job_id} already {_STATE[st.status]}; nothing to cancel", field="id",
                           code="job_finished")
        self._client.cancel_workflow(job_id)
        return self.get(job_id)

    def _purge(self) -> None:
        """Delete finished jobs past retention, and the oldest beyond `keep` (at most once a second)."""
        now = self.clock()
        if now - self._purged < 1.0:
            return
        self._purged = now
        finished = self._client.list_workflows(status=_FINISHED, name=_NAMES, load_input=False,
                                               load_output=False)
        finished.sort(key=lambda st: st.completed_at or st.updated_at or 0)
        cutoff = (now - self.retention_s) * 1000
        old = [st for st in finished if (st.completed_at or st.updated_at or 0) < cutoff]
        extra = finished[:max(0, len(finished) - self.keep)]
        ids = sorted({st.workflow_id for st in old + extra})
        if ids:
            self._client.delete_workflows(ids)
            for job_id in ids:
                shutil.rmtree(self.work_root / job_id, ignore_errors=True)


def _error_body(error: BaseException | None) -> dict:
    if isinstance(error, JobFailed):
        return json.loads(str(error))
    return describe(error if isinstance(error, Exception) else RuntimeError("the job failed")).body()["error"]
