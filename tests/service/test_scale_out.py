"""Past one machine: the registry's index and the jobs in PostgreSQL, bundles in an S3 object store,
two `geotween serve` replicas over them. Real servers on loopback (tests/servers.py)."""
import os
import shutil
import subprocess
import sys
import threading
import time
from pathlib import Path

import boto3
import httpx
import pytest
from servers import free_port, fresh_database, postgres, postgres_missing, s3_server
from tiny_scenes import tiny_demo_scene

from geotween.models.scene import save_scene
from geotween.service.registry import ModelNotFound, Registry, VersionNotFound
from geotween.service.store import ObjectStore, bundle_digest

ROOT = Path(__file__).resolve().parents[2]
KEY = "scale-key-0123456789abcdef"

pytestmark = pytest.mark.skipif(postgres_missing() is not None, reason=str(postgres_missing()))


@pytest.fixture(scope="module")
def servers():
    with postgres() as pg, s3_server() as (endpoint, bucket):
        yield pg, endpoint, bucket


def _registry(pg: str, endpoint: str, bucket: str, root: Path, prefix: str) -> Registry:
    store = ObjectStore(f"s3://{bucket}/{prefix}", cache=root / "cache", endpoint=endpoint)
    return Registry.open(root, index_url=pg, store=store)


def test_two_replicas_share_one_index_and_one_object_store(servers, tmp_path, service_bundle):
    pg, endpoint, bucket = servers
    url = fresh_database(pg, "registry_unit")
    a = _registry(url, endpoint, bucket, tmp_path / "a", "unit")
    b = _registry(url, endpoint, bucket, tmp_path / "b", "unit")
    gen = b.generation()
    v1 = a.publish("tile", lambda f: shutil.copytree(service_bundle, f, dirs_exist_ok=True))
    assert b.generation() == gen + 1  # b notices without a restart
    got = b.get("tile")  # fetched from the store into b's own folder
    assert (got.version, got.hash) == (1, v1.hash) and got.path.is_relative_to(tmp_path / "b")
    assert bundle_digest(got.path) == bundle_digest(Path(service_bundle))  # the same bytes, file by file
    assert [m.name for m in b.list_models()] == ["tile"]
    s3 = boto3.client("s3", endpoint_url=endpoint)
    keys = [o["Key"] for o in s3.list_objects_v2(Bucket=bucket, Prefix="unit/")["Contents"]]
    assert keys and all(k.startswith(f"unit/bundles/{got.path.name}/") for k in keys)
    # writers from two replicas at once get distinct version numbers
    done = []
    threads = [threading.Thread(target=lambda r=r: done.append(
        r.publish("tile", lambda f: shutil.copytree(service_bundle, f, dirs_exist_ok=True)).version)) for r in (a, b)]
    for t in threads:
        t.start()
    for t in threads:
        t.join(60)
    assert sorted(done) == [2, 3]
    # content-addressed: three versions, one bundle in the store; deleting two keeps it for the third
    a.delete("tile", 1)
    a.delete("tile", 2)
    with pytest.raises(VersionNotFound):
        b.get("tile", 1)
    assert s3.list_objects_v2(Bucket=bucket, Prefix="unit/").get("KeyCount", 0) == len(keys)
    b.delete("tile", 3)
    with pytest.raises(ModelNotFound):
        a.get("tile")
    assert s3.list_objects_v2(Bucket=bucket, Prefix="unit/").get("KeyCount", 0) == 0


def test_a_fetched_bundle_that_does_not_match_its_digest_is_refused(servers, tmp_path, service_bundle):
    _, endpoint, bucket = servers
    store = ObjectStore(f"s3://{bucket}/tamper", cache=tmp_path / "cache", endpoint=endpoint)
    stored = store.put(Path(service_bundle))
    s3 = boto3.client("s3", endpoint_url=endpoint)
    key = f"tamper/bundles/{stored[3:]}/manifest.json"
    s3.put_object(Bucket=bucket, Key=key, Body=b"{}")
    with pytest.raises(OSError, match="incomplete or altered"):
        store.local(stored)
    assert not (tmp_path / "cache" / stored[3:]).exists()


def _serve(env: dict, root: Path, log: Path) -> tuple[subprocess.Popen, str]:
    port = free_port()
    env = {**os.environ, **env, "GEOTWEEN_REGISTRY": str(root), "GEOTWEEN_API_KEYS": KEY,
           "GEOTWEEN_MAX_FILL_SYNC": "4", "PYTHONPATH": str(ROOT) + os.pathsep + os.environ.get("PYTHONPATH", "")}
    with open(log, "ab") as out:
        proc = subprocess.Popen([sys.executable, "-m", "geotween.service.cli", "--threads", "1", "serve",
                                 "--port", str(port)], cwd=ROOT, env=env, stdout=out, stderr=subprocess.STDOUT)
    url = f"http://127.0.0.1:{port}"
    deadline = time.monotonic() + 90
    while True:
        try:
            if httpx.get(f"{url}/readyz", timeout=2).status_code == 200:
                return proc, url
        except httpx.HTTPError:
            pass
        if time.monotonic() > deadline or proc.poll() is not None:
            raise AssertionError(f"serve did not become ready: {log.read_text()[-2000:]}")
        time.sleep(0.2)


def _finished(url: str, job_id: str, timeout: float = 180.0) -> dict:
    deadline = time.monotonic() + timeout
    while time.monotonic() < deadline:
        job = httpx.get(f"{url}/v1/jobs/{job_id}").json()
        if job["state"] in ("done", "failed", "cancelled"):
            return job
        time.sleep(0.2)
    raise AssertionError(f"job {job_id} did not finish in {timeout} s")


def test_two_serve_replicas_over_postgresql_and_s3(servers, tmp_path):
    pg, endpoint, bucket = servers
    env = {"GEOTWEEN_DATABASE_URL": fresh_database(pg, "replicas"), "GEOTWEEN_STORE_URL": f"s3://{bucket}/replicas",
           "GEOTWEEN_STORE_ENDPOINT": endpoint}
    scene = tiny_demo_scene()
    scene_dir = save_scene(tmp_path / "scene", "tiny-tile", scene.space, scene.images, scene.params)
    log = tmp_path / "serve.log"
    one, url1 = _serve({**env, "GEOTWEEN_WORKER_ID": "replica-1"}, tmp_path / "r1", log)
    two, url2 = _serve({**env, "GEOTWEEN_WORKER_ID": "replica-2"}, tmp_path / "r2", log)
    try:
        # a version trained and published through one replica ...
        body = {"scene": str(scene_dir), "name": "shared", "steps": 10, "resolution": 16, "seed": 1}
        job = httpx.post(f"{url1}/v1/trainings", json=body, headers={"X-API-Key": KEY}).json()
        done = _finished(url2, job["id"])  # ... its job is visible from the other
        assert done["state"] == "done", (done, log.read_text()[-3000:])
        # ... and served by the other, without a restart
        between = {"start": {"params": {"lamp_azimuth": 10.0, "lamp_elevation": 30.0}},
                   "end": {"params": {"lamp_azimuth": 100.0, "lamp_elevation": 60.0}}, "frames": 2}
        answer = httpx.post(f"{url2}/v1/models/shared/between", json=between, timeout=60)
        assert answer.status_code == 200 and answer.json()["version"] == 1
        # a fill job queued on one replica, its result read from the other: the same frames
        targets = [{"lamp_azimuth": float(a), "lamp_elevation": 45.0} for a in range(0, 360, 40)]
        fill = httpx.post(f"{url2}/v1/models/shared/fill", json={"targets": targets}, timeout=60).json()
        assert _finished(url1, fill["id"])["state"] == "done"
        frames = httpx.get(f"{url1}/v1/jobs/{fill['id']}/result", timeout=60).json()["frames"]
        sync = httpx.post(f"{url1}/v1/models/shared/fill", json={"targets": targets[:4]}, timeout=60).json()
        assert [f["image"] for f in frames[:4]] == [f["image"] for f in sync["frames"]]
        # deleted through one: gone from both
        gone = httpx.delete(f"{url2}/v1/models/shared/1", headers={"X-API-Key": KEY})
        assert gone.status_code in (200, 204), gone.text
        for url in (url1, url2):
            r = httpx.post(f"{url}/v1/models/shared/between", json=between, timeout=60)
            assert r.status_code == 404, r.text
    finally:
        for proc in (one, two):
            proc.terminate()
            proc.wait(60)
