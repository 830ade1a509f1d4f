"""Fill throughput of jobs: one embedded `geotween serve`, then `serve` with one worker and with two.

    python bench/scale.py BUNDLE_DIR [--jobs 4] [--targets 500] [--chunk 32] [--port 8767]

BUNDLE_DIR is a trained bundle (bench/quality.py leaves one in its --out folder). The same fill,
--jobs jobs of --targets settings each (one job runs on one runner, so several let two workers share
the work), is run three ways, each over a fresh registry holding the bundle:

- embedded: one `geotween serve` on the jobs' default database (SQLite in its registry folder) that
  runs the jobs itself, with as many job slots and inference workers as the two-worker run has in all;
- one_worker: `serve` with GEOTWEEN_RUN_JOBS=false and one `geotween worker`, over PostgreSQL;
- two_workers: the same with two workers, each with its own GEOTWEEN_WORKER_ID.

Every worker has one job slot, one inference worker and one torch thread (--worker-threads), so two
of them share a 2-core machine as the embedded run does; OMP_NUM_THREADS=1 everywhere, alike. Each
run first fills one small job per job slot so that every runner has loaded the model (model loading is
start-up, not throughput); then the clock runs from the first job's submission until the last one
is seen done (asked every 0.2 s). frames/s = frames made / that span. PostgreSQL is a
throwaway cluster on 127.0.0.1 (tests/servers.py); with it the registry's index is there too, and
its bundles stay in a folder the processes of a run share (no object store). GEOTWEEN_* variables
of the calling shell are not passed on: each run's processes get exactly the settings above.
The SQLite job database records times in whole seconds, hence the clock on this side.

Printed: a JSON table with frames/s per run, which runner ran how many jobs, and the ratios two
workers / embedded (the target is >= 0.9) and two workers / one worker (what one more worker adds).
Traffic goes only to 127.0.0.1; every loop is bounded in count and time.
"""
from __future__ import annotations

import argparse
import hashlib
import importlib.util
import json
import os
import shutil
import signal
import subprocess
import sys
import tempfile
import time
from contextlib import ExitStack, contextmanager
from pathlib import Path

import numpy as np
from common import ROOT

NAME = "scale"
SEED = 11  # every run fills the same targets, so their frames can be compared
RUNS = {  # run -> (jobs' database, workers); embedded: serve runs the jobs itself
    "embedded": ("sqlite", 0),
    "one_worker": ("postgres", 1),
    "two_workers": ("postgres", 2),
}
MAX_WORKERS = max(w for _, w in RUNS.values())
WARM_ROUNDS = 3
POLL_S = 0.2  # how often the state of a job is asked; the measured span is at most this much too long


def load_servers():
    """tests/servers.py (PostgreSQL on loopback), imported by path: it is not an installed module."""
    spec = importlib.util.spec_from_file_location("geotween_test_servers", ROOT / "tests" / "servers.py")
    mod = importlib.util.module_from_spec(spec)
    spec.loader.exec_module(mod)
    return mod


def base_env() -> dict[str, str]:
    """This process's environment without GEOTWEEN_* settings (GEOTWEEN_BENCH_* stay), plus one
    thread per library pool and the repository on the import path."""
    env = {k: v for k, v in os.environ.items() if not k.startswith("GEOTWEEN_") or k.startswith("GEOTWEEN_BENCH_")}
    env.update(OMP_NUM_THREADS="1", PYTHONPATH=str(ROOT) + os.pathsep + os.environ.get("PYTHONPATH", ""))
    return env


@contextmanager
def scoped_environ(env: dict[str, str]):
    """os.environ is `env` inside the block (settings read here see what the child processes see)."""
    saved = dict(os.environ)
    os.environ.clear()
    os.environ.update(env)
    try:
        yield
    finally:
        os.environ.clear()
        os.environ.update(saved)


def publish(bundle: Path, env: dict[str, str]) -> None:
    """Publish the bundle as NAME through the registry the service opens under `env`."""
    from geotween.service.deps import Services
    from geotween.service.settings import Settings

    with scoped_environ(env):
        services = Services(Settings.load(run_jobs=False))
        try:
            services.registry().publish(NAME, lambda f: shutil.copytree(bundle, f, dirs_exist_ok=True))
        finally:
            services.close()


def start(args: list[str], env: dict[str, str], log: Path) -> subprocess.Popen:
    with open(log, "ab") as out:
        return subprocess.Popen([sys.executable, "-m", "geotween.service.cli", *args], cwd=ROOT, env=env,
                                stdout=out, stderr=subprocess.STDOUT)


def stop(proc: subprocess.Popen, timeout: float = 60.0) -> None:
    """SIGTERM (a worker finishes its step, serve drains), SIGKILL after `timeout` seconds."""
    if proc.poll() is None:
        proc.send_signal(signal.SIGTERM)
        try:
            proc.wait(timeout)
        except subprocess.TimeoutExpired:
            proc.kill()
            proc.wait(10)


def wait_ready(url: str, proc: subprocess.Popen, log: Path, timeout: float = 120.0) -> None:
    import httpx

    deadline = time.monotonic() + timeout
    while time.monotonic() < deadline and proc.poll() is None:
        try:
            if httpx.get(f"{url}/readyz", timeout=2).status_code == 200:
                return
        except httpx.HTTPError:
            pass
        time.sleep(0.3)
    raise RuntimeError(f"geotween serve did not become ready on {url}: {log.read_text()[-2000:]}")


def wait_worker(proc: subprocess.Popen, log: Path, timeout: float = 120.0) -> None:
    """Until the worker says it runs jobs (service/worker.py prints it once its runtime is up)."""
    deadline = time.monotonic() + timeout
    while time.monotonic() < deadline and proc.poll() is None:
        if log.is_file() and "running jobs" in log.read_text(errors="replace"):
            return
        time.sleep(0.3)
    raise RuntimeError(f"geotween worker did not start: {log.read_text(errors='replace')[-2000:]}")


def make_targets(parameters: list[dict], n: int, rng: np.random.Generator) -> list[dict[str, float]]:
    """n settings drawn uniformly within each parameter's range (a periodic one's max is its min again)."""
    return [{p["name"]: round(float(rng.uniform(p["min"], p["max"])), 4) for p in parameters} for _ in range(n)]


def run_jobs(client, batches: list[list[dict]], timeout: float, poll: float = POLL_S) -> tuple[list[dict], float]:
    """Submit one fill job per batch and wait until all are done: their final JobOut bodies, and the
    seconds from the first submit until the last was seen done. One job is asked at a time, every
    `poll` seconds (a light load on the serve that may be running the jobs itself)."""
    t0 = time.perf_counter()
    ids = []
    for targets in batches:
        r = client.post(f"/v1/models/{NAME}/fill", json={"targets": targets, "as_job": True})
        if r.status_code != 202:
            raise RuntimeError(f"fill job refused: {r.status_code} {r.text[:300]}")
        ids.append(r.json()["id"])
    deadline, jobs = time.monotonic() + timeout, []
    while len(jobs) < len(ids):
        if time.monotonic() > deadline:
            for job_id in ids:
                client.delete(f"/v1/jobs/{job_id}")
            raise RuntimeError(f"fill jobs not done within {timeout:g} s ({len(jobs)} of {len(ids)} done)")
        body = client.get(f"/v1/jobs/{ids[len(jobs)]}").json()
        if body["state"] in ("failed", "cancelled"):
            raise RuntimeError(f"fill job {body['id']} {body['state']}: {body.get('error')}")
        if body["state"] == "done":
            jobs.append(body)  # and ask about the next one at once
        else:
            time.sleep(poll)
    return jobs, time.perf_counter() - t0


def runners(database_url: str, job_ids: list[str]) -> dict[str, int]:
    """How many of the jobs each runner (worker id) ran, as the jobs' database records it."""
    from dbos import DBOSClient

    client = DBOSClient(system_database_url=database_url, application_name="geotween")
    try:
        out: dict[str, int] = {}
        for st in client.list_workflows(workflow_ids=job_ids, load_input=False, load_output=False):
            out[st.executor_id] = out.get(st.executor_id, 0) + 1
        return dict(sorted(out.items()))
    finally:
        client.destroy()


def measure_run(bundle: Path, work: Path, *, workers: int, database_url: str | None, port: int, jobs: int,
                targets: int, chunk: int, worker_threads: int, timeout: float) -> dict:
    """One run: publish, start serve (and workers), warm every job slot, time the fill, stop all."""
    import httpx

    work.mkdir(parents=True)
    slots = workers if workers else MAX_WORKERS  # job slots in all: the embedded serve gets the workers' total
    env = {**base_env(), "GEOTWEEN_REGISTRY": str(work / "registry"), "GEOTWEEN_MAX_FILL_SYNC": str(chunk),
           "GEOTWEEN_JOB_QUEUE": str(max(16, jobs + slots))}
    if database_url:
        env["GEOTWEEN_DATABASE_URL"] = database_url
    per_runner = {"GEOTWEEN_JOB_WORKERS": "1" if workers else str(slots),
                  "GEOTWEEN_INFERENCE_WORKERS": "1" if workers else str(slots)}
    publish(bundle, env)
    db = database_url or f"sqlite:///{work / 'registry' / 'jobs.sqlite'}"  # the default: service/settings.py
    url = f"http://127.0.0.1:{port}"
    with ExitStack() as stack:
        # no drain on stop: nothing balances load here, and each run would wait drain_seconds for nothing
        serve_env = {**env, **per_runner, "GEOTWEEN_RUN_JOBS": "false" if workers else "true",
                     "GEOTWEEN_DRAIN_SECONDS": "0"}
        serve_log = work / "serve.log"
        serve = start(["--threads", str(worker_threads), "serve", "--host", "127.0.0.1", "--port", str(port)],
                      serve_env, serve_log)
        stack.callback(stop, serve)
        for w in range(1, workers + 1):
            log = work / f"worker-{w}.log"
            proc = start(["--threads", str(worker_threads), "worker"],
                         {**env, **per_runner, "GEOTWEEN_WORKER_ID": f"scale-{w}"}, log)
            stack.callback(stop, proc)
            wait_worker(proc, log)
        wait_ready(url, serve, serve_log)
        with httpx.Client(base_url=url, timeout=30) as client:
            parameters = client.get(f"/v1/models/{NAME}").json()["parameters"]
            warm_rng = np.random.default_rng(SEED + 1)
            # warm-up: one two-chunk job per job slot; a busy worker takes no second job, so each should
            # get one; again (at most WARM_ROUNDS times) while some worker has run none
            warmed: dict[str, int] = {}
            for _ in range(WARM_ROUNDS):
                warm, _ = run_jobs(client, [make_targets(parameters, 2 * chunk, warm_rng) for _ in range(slots)],
                                   timeout)
                for runner, n in runners(db, [j["id"] for j in warm]).items():
                    warmed[runner] = warmed.get(runner, 0) + n
                if len(warmed) >= max(1, workers):
                    break
            rng = np.random.default_rng(SEED)
            fill = [make_targets(parameters, targets, rng) for _ in range(jobs)]
            done, seconds = run_jobs(client, fill, timeout)
            frames, rejected, digest = 0, 0, hashlib.sha256()
            for job in done:
                answer = client.get(job["result"]).json()
                frames += len(answer["frames"])
                rejected += sum(not f["accepted"] for f in answer["frames"])
                for f in answer["frames"]:
                    digest.update(f["image"].encode())
    if frames != jobs * targets:
        raise RuntimeError(f"{frames} frames came back for {jobs * targets} targets")
    return {"database": "postgresql" if database_url else "sqlite", "workers": workers,
            "job_workers": int(per_runner["GEOTWEEN_JOB_WORKERS"]),
            "inference_workers": int(per_runner["GEOTWEEN_INFERENCE_WORKERS"]), "threads": worker_threads,
            "frames": frames, "rejected": rejected, "seconds": round(seconds, 2),
            "frames_per_s": round(frames / seconds, 1),
            "warm_up_runners": warmed,
            "jobs_per_runner": runners(db, [j["id"] for j in done]), "frames_sha256": digest.hexdigest()}


def measure(bundle: Path, *, port: int = 8767, jobs: int = 4, targets: int = 500, chunk: int = 32,
            worker_threads: int = 1, timeout: float = 1800.0, work: Path | None = None) -> dict:
    """The three runs of the module docstring, and their ratios."""
    for key, value, low in (("jobs", jobs, 1), ("targets", targets, 1), ("chunk", chunk, 1),
                            ("worker_threads", worker_threads, 1)):
        if value < low:
            raise ValueError(f"{key}: {value} is not allowed; expected an integer >= {low}")
    servers = load_servers()
    missing = servers.postgres_missing()
    if missing:
        raise RuntimeError(f"bench/scale.py needs PostgreSQL: {missing}")
    root = Path(work) if work else Path(tempfile.mkdtemp(prefix="geotween-scale-"))
    out: dict = {"jobs": jobs, "targets_per_job": targets, "chunk": chunk, "cores": os.cpu_count(), "runs": {}}
    opts = dict(port=port, jobs=jobs, targets=targets, chunk=chunk, worker_threads=worker_threads, timeout=timeout)
    try:
        with servers.postgres() as pg:
            for run, (database, workers) in RUNS.items():
                url = servers.fresh_database(pg, f"scale_{run}") if database == "postgres" else None
                t = time.perf_counter()
                out["runs"][run] = measure_run(Path(bundle), root / run, workers=workers, database_url=url, **opts)
                print(f"bench/scale.py: {run} {out['runs'][run]['frames_per_s']} frames/s "
                      f"({time.perf_counter() - t:.0f} s with start-up)", file=sys.stderr, flush=True)
    except BaseException:
        print(f"bench/scale.py: failed; the processes' logs are kept in {root}", file=sys.stderr, flush=True)
        raise
    shutil.rmtree(root, ignore_errors=True)
    runs = out["runs"]
    out["two_workers_to_embedded"] = round(runs["two_workers"]["frames_per_s"] / runs["embedded"]["frames_per_s"], 3)
    out["two_workers_to_one_worker"] = round(runs["two_workers"]["frames_per_s"]
                                             / runs["one_worker"]["frames_per_s"], 3)
    out["same_frames_every_run"] = len({r["frames_sha256"] for r in runs.values()}) == 1
    return out


def main() -> None:
    p = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    p.add_argument("bundle")
    p.add_argument("--jobs", type=int, default=4, help="fill jobs per run (one runs on one worker)")
    p.add_argument("--targets", type=int, default=500, help="targets per job")
    p.add_argument("--chunk", type=int, default=32, help="targets per job step (GEOTWEEN_MAX_FILL_SYNC)")
    p.add_argument("--worker-threads", type=int, default=1, help="torch threads of each process")
    p.add_argument("--port", type=int, default=8767)
    p.add_argument("--timeout", type=float, default=1800.0, help="seconds each batch of jobs may take")
    args = p.parse_args()
    print(json.dumps(measure(Path(args.bundle), port=args.port, jobs=args.jobs, targets=args.targets,
                             chunk=args.chunk, worker_threads=args.worker_threads, timeout=args.timeout), indent=1))


if __name__ == "__main__":
    main()
