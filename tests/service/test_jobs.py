"""Jobs: the bounded pool, the durable job store, fill jobs and training jobs over HTTP."""
import shutil
import threading
import time

import pytest
import torch
from api_helpers import wait_for
from fastapi.testclient import TestClient
from tiny_scenes import tiny_demo_scene

from geotween.models.scene import save_scene
from geotween.service.api import create_app
from geotween.service.durable import JobStore
from geotween.service.errors import Conflict, NotFound, Unavailable
from geotween.service.jobs import InferencePool
from geotween.service.registry import Registry
from geotween.service.settings import Settings

KEY = "jobs-key-0123456789abcdef"


def P(az, el):
    return {"lamp_azimuth": float(az), "lamp_elevation": float(el)}


@pytest.fixture
def pool():
    p = InferencePool(2)
    yield p
    p.shutdown()


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


def test_work_one_piece_after_another_stays_on_the_worker_that_went_idle_last(pool):
    # torch keeps a team of intra-op threads per calling thread: a lone stream of requests that took
    # turns between workers (as ThreadPoolExecutor's idle threads do) woke a sleeping team each time
    meet = threading.Barrier(2, timeout=5)
    first = [pool.submit(lambda: (meet.wait(), threading.current_thread().name)[1]) for _ in range(2)]
    assert len({f.result(5) for f in first}) == 2  # both workers are running now
    names = [pool.call(lambda: threading.current_thread().name) for _ in range(12)]
    assert len(set(names)) == 1, names


def test_an_idle_worker_ends_while_another_is_idle_and_the_pool_grows_again():
    p = InferencePool(2, idle_s=0.2)
    try:
        for _ in range(2):  # two workers (a barrier of two passes only when both run at once), then one
            meet = threading.Barrier(2, timeout=5)
            for f in [p.submit(meet.wait) for _ in range(2)]:
                f.result(5)
            wait_for(lambda: p.threads == 1, timeout=5)
            time.sleep(0.5)  # the last idle worker stays
            assert p.threads == 1 and p.call(lambda: 7) == 7
        with pytest.raises(ValueError, match="idle_s"):
            InferencePool(2, idle_s=0.0)
    finally:
        p.shutdown()


def test_shutdown_cancels_waiting_work_lets_running_work_end_and_refuses_more():
    p = InferencePool(1)
    gate, ran = threading.Event(), []
    running = p.submit(gate.wait, 5.0)
    waiting = p.submit(ran.append, "waiting")
    stopper = threading.Thread(target=p.shutdown)
    stopper.start()
    wait_for(waiting.cancelled, timeout=5)
    gate.set()
    stopper.join(5)
    assert not stopper.is_alive() and running.result(1) is True and ran == [] and p.threads == 0
    with pytest.raises(RuntimeError, match="shut down"):
        p.submit(ran.append, "late")


@pytest.fixture
def store(tmp_path):
    now = [time.time()]  # the database stamps jobs with the wall clock; the test moves past it
    st = JobStore(f"sqlite:///{tmp_path / 'jobs.sqlite'}", work_root=tmp_path / "jobs", queue_limit=3,
                  retention_s=60.0, keep=2, clock=lambda: now[0])
    yield st, now
    st.close()


def test_queue_is_bounded_and_queued_jobs_cancel_at_once(store):
    st, _ = store  # no runtime in this process: jobs stay queued
    ids = [st.submit("fill", {"targets": []}, total=5, model="m", version=1)["id"] for _ in range(3)]
    assert all(st.get(i)["state"] == "queued" and st.get(i)["progress"] == {"done": 0, "total": 5} for i in ids)
    with pytest.raises(Unavailable) as full:
        st.submit("fill", {"targets": []}, total=1)
    assert full.value.code == "job_queue_full"
    assert st.cancel(ids[0])["state"] == "cancelled"
    assert st.counts() == {"queued": 2, "running": 0, "done": 0, "failed": 0, "cancelled": 1}
    st.submit("fill", {"targets": []}, total=1)  # a place came free
    with pytest.raises(Conflict) as early:
        st.result(ids[1])
    assert early.value.code == "job_not_finished"
    with pytest.raises(NotFound):
        st.get("0" * 32)


def test_finished_jobs_expire_after_retention_and_beyond_keep(store):
    st, now = store
    ids = []
    for _ in range(3):
        ids.append(st.submit("fill", {"targets": []}, total=1)["id"])
        st.cancel(ids[-1])
        now[0] += 2.0
    st.get(ids[-1])  # a query purges: three finished, keep=2, so the oldest is gone
    with pytest.raises(NotFound):
        st.get(ids[0])
    assert st.get(ids[1])["state"] == "cancelled"
    now[0] += 61.0
    with pytest.raises(NotFound):
        st.get(ids[2])


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
