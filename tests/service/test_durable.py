"""Durable jobs through restarts and kills: an embedded `serve` restarted keeps its queued and finished
jobs; `kill -9` of a worker in the middle of a fill, many times, loses and doubles no frame; a training
killed mid-way resumes from its checkpoint and registers once."""
import os
import shutil
import signal
import subprocess
import sys
import time
from pathlib import Path

import numpy as np
import pytest
import torch
from api_helpers import wait_for
from fastapi.testclient import TestClient
from tiny_scenes import tiny_demo_scene

from geotween.models.scene import save_scene
from geotween.models.train import Checkpoint, TrainConfig, default_model_config, train
from geotween.service.api import create_app
from geotween.service.durable import JobStore, publish_once
from geotween.service.imaging import png_base64
from geotween.service.registry import Registry
from geotween.service.settings import Settings

ROOT = Path(__file__).resolve().parents[2]
KEY = "durable-key-0123456789abcdef"
KILLS = 20
MIN_KILLS = 8  # kills that must have fallen mid-fill, however fast the machine takes its steps


def P(az, el):
    return {"lamp_azimuth": float(az), "lamp_elevation": float(el)}


@pytest.fixture
def registry(tmp_path, service_bundle):
    reg = Registry.open(tmp_path / "registry")
    reg.publish("tile", lambda f: shutil.copytree(service_bundle, f, dirs_exist_ok=True))
    return reg


def _settings(reg: Registry, **extra) -> Settings:
    return Settings(registry=reg.root, api_keys=[KEY], max_fill_sync=4, **extra)


def _finished(c, job_id: str, timeout: float = 60.0) -> dict:
    return wait_for(lambda: (d := c.get(f"/v1/jobs/{job_id}").json())["state"] in ("done", "failed") and d,
                    timeout)


def test_an_embedded_serve_restarted_keeps_queued_and_finished_jobs(registry):
    targets = [P(a, 45) for a in range(0, 360, 30)]  # 12 targets, three chunks of 4
    with TestClient(create_app(_settings(registry))) as c:
        done_id = c.post("/v1/models/tile/fill", json={"targets": targets, "as_job": True}).json()["id"]
        first = c.get(_finished(c, done_id)["result"]).json()
    with TestClient(create_app(_settings(registry, run_jobs=False))) as c:  # queues, runs nothing
        assert c.get(f"/v1/jobs/{done_id}/result").json() == first  # finished: still there, same frames
        queued_id = c.post("/v1/models/tile/fill", json={"targets": targets[:5], "as_job": True}).json()["id"]
        time.sleep(1.0)
        assert c.get(f"/v1/jobs/{queued_id}").json()["state"] == "queued"
    with TestClient(create_app(_settings(registry))) as c:  # the restarted serve takes the queued job
        job = _finished(c, queued_id)
        assert job["state"] == "done" and job["progress"] == {"done": 5, "total": 5}
        again = c.get(job["result"]).json()
        assert [f["image"] for f in again["frames"]] == [f["image"] for f in first["frames"][:5]]
        assert c.get(f"/v1/jobs/{done_id}").json()["state"] == "done"


def _worker(reg: Registry, log: Path) -> subprocess.Popen:
    env = {**os.environ, "GEOTWEEN_REGISTRY": str(reg.root), "GEOTWEEN_WORKER_ID": "w1",
           "GEOTWEEN_CHECKPOINT_EVERY": "25",
           "PYTHONPATH": str(ROOT) + os.pathsep + os.environ.get("PYTHONPATH", "")}
    with open(log, "ab") as out:
        return subprocess.Popen([sys.executable, "-m", "geotween.service.cli", "--threads", "1", "worker"],
                                cwd=ROOT, env=env, stdout=out, stderr=subprocess.STDOUT)


def _kill(proc: subprocess.Popen) -> None:
    proc.send_signal(signal.SIGKILL)
    proc.wait(10)


def test_kill_9_of_a_worker_in_the_middle_of_a_fill_loses_and_doubles_nothing(registry, tmp_path):
    settings = _settings(registry)
    store = JobStore(settings.jobs_database_url, work_root=settings.jobs_folder)
    targets = [P((a * 5) % 360, 25 + (a * 7) % 45) for a in range(1600)]  # 400 steps of 4 targets
    spec = {"model": "tile", "version": 1, "targets": targets, "min_confidence": 0.5, "refine": True, "chunk": 4}
    job_id = store.submit("fill", spec, total=len(targets), model="tile", version=1)["id"]
    rng = np.random.default_rng(7)
    log = tmp_path / "worker.log"
    seen = []
    try:
        for _ in range(KILLS):
            before = store.get(job_id)["progress"]["done"]
            if before >= 0.75 * len(targets):  # a fast machine: leave the last quarter to the final worker
                break
            proc = _worker(registry, log)
            # killed at a random moment once it is taking steps (start-up alone would prove nothing)
            wait_for(lambda: store.get(job_id)["progress"]["done"] > before or proc.poll() is not None, 60.0,
                     step=0.01)
            time.sleep(float(rng.uniform(0.0, 0.3)))
            _kill(proc)
            seen.append((before, store.get(job_id)["progress"]["done"]))
            if store.get(job_id)["state"] == "done":
                break
        proc = _worker(registry, log)
        job = wait_for(lambda: (d := store.get(job_id))["state"] in ("done", "failed") and d, 120.0)
        proc.send_signal(signal.SIGTERM)
        assert proc.wait(30) == 0
        assert job["state"] == "done", (job, log.read_text()[-2000:])
        frames = store.result(job_id).frames
    finally:
        if proc.poll() is None:
            _kill(proc)
        store.close()
    assert len(seen) >= MIN_KILLS and all(after < len(targets) for _, after in seen), seen  # every kill mid-fill
    assert [f.fields["index"] for f in frames] == list(range(1, len(targets) + 1))  # each once, in order
    # identical to an uninterrupted run: the synchronous route, chunk by chunk
    with TestClient(create_app(_settings(registry, run_jobs=False))) as c:
        for lo in range(0, len(targets), 20):
            sync = c.post("/v1/models/tile/fill", json={"targets": targets[lo:lo + 4]}).json()["frames"]
            got = frames[lo:lo + 4]
            assert [s["accepted"] for s in sync] == [g.fields["accepted"] for g in got]
            assert [s["image"] for s in sync] == [png_base64(g.png) for g in got]


def test_a_training_killed_mid_way_resumes_from_its_checkpoint_and_registers_once(registry, tmp_path):
    scene = tiny_demo_scene()
    scene_dir = save_scene(tmp_path / "scene", "tiny-tile", scene.space, scene.images, scene.params)
    settings = _settings(registry)
    store = JobStore(settings.jobs_database_url, work_root=settings.jobs_folder)
    spec = {"scene": str(scene_dir), "name": "trained", "resolution": 16, "steps": 400, "budget": 600.0,
            "seed": 3, "tau": 0.9}
    job_id = store.submit("training", spec, total=400, model="trained")["id"]
    checkpoint = settings.jobs_folder / job_id / "checkpoint.pt"
    log = tmp_path / "worker.log"
    proc = _worker(registry, log)
    try:
        wait_for(lambda: checkpoint.is_file() and store.get(job_id)["progress"]["done"] >= 60, 120.0)
        saved = torch.load(checkpoint, weights_only=False)["step"]
        _kill(proc)
        assert store.get(job_id)["state"] == "running" and 0 < saved < 400
        # the progress left from before the kill is marked, so the first report after it is the new worker's
        store._client.update_workflow_attributes(job_id, {"done": -1}, merge=True)
        proc = _worker(registry, log)
        # the restarted worker starts at the checkpoint, not at step 0
        first = wait_for(lambda: (d := store.get(job_id)["progress"]["done"]) != -1 and (d,), 60.0, step=0.01)[0]
        job = wait_for(lambda: (d := store.get(job_id))["state"] in ("done", "failed") and d, 240.0)
    finally:
        _kill(proc)
    try:
        assert job["state"] == "done", (job, log.read_text()[-2000:])
        assert first >= saved
        result = store.result(job_id)
    finally:
        store.close()
    assert [v.version for v in registry.versions("trained")] == [1] == [result["version"]]
    assert not (settings.jobs_folder / job_id).exists()  # checkpoints and the built bundle are gone


def test_a_resumed_training_takes_the_same_steps_as_one_never_stopped(tmp_path):
    scene = tiny_demo_scene()
    cfg = TrainConfig(steps=30, seed=5)
    mcfg = default_model_config(scene)
    whole = train(scene, mcfg, cfg, progress=None)

    class Stop(Exception):
        pass

    def stop_at_22(done, total):
        if done == 22:
            raise Stop

    ck = Checkpoint(tmp_path / "ck.pt", every=10)
    with pytest.raises(Stop):
        train(scene, mcfg, cfg, progress=None, on_step=stop_at_22, checkpoint=ck)
    assert torch.load(ck.path, weights_only=False)["step"] == 20
    resumed = train(scene, mcfg, cfg, progress=None, checkpoint=ck)
    for a, b in zip(whole.model.state_dict().values(), resumed.model.state_dict().values()):
        torch.testing.assert_close(a, b, rtol=0, atol=0)
    assert resumed.metrics["steps"] == 30


def test_a_publish_run_twice_registers_one_version(registry, service_bundle):
    first = publish_once(registry, "again", Path(service_bundle))
    second = publish_once(registry, "again", Path(service_bundle))
    assert (first.version, second.version) == (1, 1) and len(registry.versions("again")) == 1
