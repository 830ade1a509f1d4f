"""Jobs: the bounded pool, the in-memory job manager, fill jobs and training jobs over HTTP."""
import shutil
import threading
import time

import pytest
import torch
from fastapi.testclient import TestClient
from tiny_scenes import tiny_demo_scene

from geotween.models.scene import save_scene
from geotween.service.api import create_app
from geotween.service.errors import Conflict, NotFound, Unavailable
from geotween.service.jobs import InferencePool, JobManager
from geotween.service.registry import Registry
from geotween.service.settings import Settings

KEY = "jobs-key-0123456789abcdef"




def P(az, el):
    return {"lamp_azimuth": float(az), "lamp_elevation": float(el)}


def wait_for(predicate, timeout: float = 20.0, step: float = 0.02):
    deadline = time.monotonic() + timeout
    while time.monotonic() < deadline:
        value = predicate()
        if value:
            return value
        time.sleep(step)
    raise AssertionError(f"condition not met within {timeout} s")


@pytest.fixture
def pool():
    p = InferencePool(2)
    yield p
    p.shutdown()


@pytest.fixture
def manager(pool):
    jm = JobManager(pool, queue_limit=3, workers=1, retention_s=60.0, keep=8)
    yield jm
    jm.shutdown()


# -- pool and manager ---------------------------------------------------------------------------
def test_pool_bounds_concurrency_and_uses_inference_mode(pool):
    live, peak, lock = [0], [0], threading.Lock()

    def task():
        with lock:
            live[0] += 1
            peak[0] = max(peak[0], live[0])
        time.sleep(0.05)
        with lock:
            live[0] -= 1
        return threading.current_thread().name, torch.is_inference_mode_enabled()

    results = [f.result(5) for f in [pool.submit(task) for _ in range(6)]]
    assert peak[0] == 2  # never more than the configured workers
    assert all(name.startswith("geotween-infer") and inference for name, inference in results)
    assert pool.call(torch.is_inference_mode_enabled, inference=False) is False  # training needs autograd
    assert pool.pending == 0
    with pytest.raises(ValueError, match="workers"):
        InferencePool(0)


def test_job_reports_progress_then_completes(manager):
    gate, reached = threading.Event(), threading.Event()

    def work(ctx):
        ctx.progress(1, 3)
        reached.set()
        gate.wait(5)
        ctx.progress(2)
        return ctx.compute(lambda: "done on the pool")

    job = manager.submit("fill", work, total=3)
    assert reached.wait(5)
    status = manager.get(job.id).to_dict()
    assert (status["state"], status["progress"]) == ("running", {"done": 1, "total": 3})
    with pytest.raises(Conflict) as info:
        manager.result(job.id)
    assert info.value.code == "job_not_finished" and info.value.status == 409
    gate.set()
    wait_for(lambda: manager.get(job.id).state == "done")
    assert manager.result(job.id) == "done on the pool"
    assert manager.get(job.id).to_dict()["progress"] == {"done": 3, "total": 3}
    assert manager.get(job.id).to_dict()["result"] == f"/v1/jobs/{job.id}/result"


def test_running_job_is_cancelled_at_its_next_progress_report(manager):
    started = threading.Event()

    def work(ctx):
        for i in range(1000):
            ctx.progress(i, 1000)
            started.set()
            time.sleep(0.005)
        return "finished anyway"

    job = manager.submit("fill", work, total=1000)
    assert started.wait(5)
    manager.cancel(job.id)
    wait_for(lambda: manager.get(job.id).state == "cancelled")
    assert manager.get(job.id).done < 1000
    with pytest.raises(Conflict) as info:
        manager.result(job.id)
    assert info.value.code == "job_cancelled"


def test_queued_job_is_cancelled_before_it_runs_and_the_queue_is_bounded(manager):
    gate, ran = threading.Event(), []
    first = manager.submit("fill", lambda ctx: gate.wait(5), total=1)
    second = manager.submit("fill", lambda ctx: ran.append("second"), total=1)
    third = manager.submit("fill", lambda ctx: ran.append("third"), total=1)
    with pytest.raises(Unavailable) as info:  # queue_limit = 3 queued or running
        manager.submit("fill", lambda ctx: None, total=1)
    assert info.value.status == 503 and info.value.code == "job_queue_full"
    assert manager.cancel(second.id).state == "cancelled"
    gate.set()
    wait_for(lambda: manager.get(third.id).state == "done")
    assert ran == ["third"] and manager.get(first.id).state == "done"
    with pytest.raises(Conflict) as info:
        manager.cancel(first.id)
    assert info.value.code == "job_finished"


def test_failures_are_reported_with_the_error_shape(manager):
    bad = manager.submit("fill", lambda ctx: float("x"), total=1)  # ValueError: bad input, 422
    boom = manager.submit("fill", lambda ctx: 1 / 0, total=1)      # a bug: 500, details hidden
    wait_for(lambda: manager.get(boom.id).state == "failed")
    err = manager.get(bad.id).to_dict()["error"]
    assert manager.get(bad.id).state == "failed" and err["code"] == "invalid" and "float" in err["message"]
    assert manager.get(boom.id).to_dict()["error"]["code"] == "internal"
    assert "division" not in manager.get(boom.id).to_dict()["error"]["message"]
    with pytest.raises(Conflict) as info:
        manager.result(bad.id)
    assert info.value.code == "job_failed"


def test_finished_jobs_expire_after_retention_and_beyond_keep(pool):
    now = [1000.0]
    jm = JobManager(pool, queue_limit=10, workers=1, retention_s=60.0, keep=2, clock=lambda: now[0])
    try:
        jobs = [jm.submit("fill", lambda ctx: i, total=1) for i in range(3)]
        wait_for(lambda: all(jm.get(j.id).state == "done" for j in jobs[-1:]) and jm.active() == 0)
        with pytest.raises(NotFound):  # keep = 2: the oldest finished job went first
            jm.get(jobs[0].id)
        assert jm.get(jobs[2].id).state == "done"
        now[0] += 61.0
        with pytest.raises(NotFound) as info:
            jm.get(jobs[2].id)
        assert info.value.code == "job_not_found" and "lost on restart" in info.value.message
    finally:
        jm.shutdown()


# -- over HTTP ----------------------------------------------------------------------------------
@pytest.fixture(scope="module")
def served(tmp_path_factory, service_bundle):
    root = tmp_path_factory.mktemp("registry")
    reg = Registry.open(root)
    reg.publish("tile", lambda f: shutil.copytree(service_bundle, f, dirs_exist_ok=True))
    scene = tiny_demo_scene()
    scene_dir = save_scene(tmp_path_factory.mktemp("scene"), "tiny-tile", scene.space, scene.images, scene.params)
    app = create_app(Settings(registry=root, api_keys=[KEY], max_fill_sync=4, max_fill_targets=4096))
    with TestClient(app) as c:
        yield c, reg, scene_dir


def poll(c, job_id, until=("done", "failed", "cancelled"), timeout=60.0):
    seen = []

    def check():
        d = c.get(f"/v1/jobs/{job_id}").json()
        seen.append((d["state"], d["progress"]["done"], d["progress"]["total"]))
        return d if d["state"] in until else None

    return wait_for(check, timeout=timeout), seen


def test_fill_job_progress_result_and_zip(served):
    c, _, _ = served
    targets = [P(a, e) for a in range(0, 360, 36) for e in (25, 65)]  # 20 targets in chunks of 4
    r = c.post("/v1/models/tile/fill", json={"targets": targets, "min_confidence": 0.2})
    assert r.status_code == 202
    job, seen = poll(c, r.json()["id"])
    assert job["state"] == "done" and job["progress"] == {"done": 20, "total": 20}
    done = [d for _, d, _ in seen]
    assert done == sorted(done) and all(t == 20 for *_, t in seen)
    result = c.get(job["result"]).json()
    assert [f["index"] for f in result["frames"]] == list(range(1, 21))
    assert [f["target"] for f in result["frames"]] == targets
    # the job answers exactly what the synchronous route answers, chunk by chunk
    sync = c.post("/v1/models/tile/fill", json={"targets": targets[4:8], "min_confidence": 0.2}).json()
    for a, b in zip(result["frames"][4:8], sync["frames"]):
        assert (a["image"], a["accepted"], a["params"]) == (b["image"], b["accepted"], b["params"])
    z = c.get(job["result"], headers={"Accept": "application/zip"})
    assert z.status_code == 200 and z.headers["content-type"] == "application/zip"


def test_fill_job_can_be_cancelled(served):
    c, _, _ = served
    targets = [P(a % 360, 45) for a in range(4096)]  # 1024 chunks: far longer than the cancel takes
    r = c.post("/v1/models/tile/fill", json={"targets": targets})
    job_id = r.json()["id"]
    assert c.delete(f"/v1/jobs/{job_id}").status_code == 200
    job, _ = poll(c, job_id)
    assert job["state"] == "cancelled" and job["progress"]["done"] < 4096
    res = c.get(f"/v1/jobs/{job_id}/result")
    assert res.status_code == 409 and res.json()["error"]["code"] == "job_cancelled"
    assert c.delete(f"/v1/jobs/{job_id}").json()["state"] == "cancelled"  # cancelling twice is harmless


def test_training_job_registers_a_version_that_between_then_uses(served):
    c, reg, scene_dir = served
    before = reg.get("tile").version
    body = {"scene": str(scene_dir), "name": "tile", "steps": 10, "resolution": 16, "seed": 1}
    r = c.post("/v1/trainings", json=body, headers={"X-API-Key": KEY})
    assert r.status_code == 202, r.text
    job, seen = poll(c, r.json()["id"], timeout=180.0)
    assert job["state"] == "done", job
    assert job["progress"]["done"] == job["progress"]["total"] == 10
    result = c.get(job["result"]).json()
    assert result["model"] == "tile" and result["version"] == before + 1 == job["version"]
    assert reg.get("tile").version == before + 1
    # the same app, no restart: the new version is the one served
    between = {"start": {"params": P(10, 30)}, "end": {"params": P(100, 60)}, "frames": 2}
    assert c.post("/v1/models/tile/between", json=between).json()["version"] == before + 1
    assert c.get("/v1/models/tile").json()["latest_version"] == before + 1


def test_training_job_cancel_needs_a_key_and_leaves_the_registry_alone(served):
    c, reg, scene_dir = served
    generation = reg.generation()
    body = {"scene": str(scene_dir), "name": "tile", "steps": 5000, "resolution": 16}
    job_id = c.post("/v1/trainings", json=body, headers={"Authorization": f"Bearer {KEY}"}).json()["id"]
    wait_for(lambda: c.get(f"/v1/jobs/{job_id}").json()["progress"]["done"] > 0, timeout=60.0)
    refused = c.delete(f"/v1/jobs/{job_id}")
    assert refused.status_code == 401 and refused.json()["error"]["code"] == "missing_api_key"
    assert c.delete(f"/v1/jobs/{job_id}", headers={"X-API-Key": KEY}).status_code == 200
    job, _ = poll(c, job_id)
    assert job["state"] == "cancelled" and job["progress"]["done"] < 5000
    assert reg.generation() == generation
    assert not any((reg.root / "staging").iterdir())


def test_training_limits_are_checked_before_queuing(served):
    c, reg, scene_dir = served
    r = c.post("/v1/trainings", json={"scene": str(scene_dir), "name": "tile", "steps": 10 ** 7},
               headers={"X-API-Key": KEY})
    assert r.status_code == 422 and r.json()["error"]["field"] == "steps"
    r = c.post("/v1/trainings", json={"scene": "relative/path", "name": "tile"}, headers={"X-API-Key": KEY})
    assert r.status_code == 422 and r.json()["error"]["code"] == "invalid_scene"
    r = c.post("/v1/trainings", json={"scene": str(scene_dir), "name": "tile", "resolution": 20},
               headers={"X-API-Key": KEY})
    assert r.status_code == 422 and r.json()["error"]["field"] == "resolution"
    assert c.app.state.services.jobs.counts()["queued"] == 0
