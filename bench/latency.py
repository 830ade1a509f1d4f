"""Latency and throughput through a real uvicorn process on loopback, against the bare compute limit.

    python bench/latency.py BUNDLE_DIR [--seconds 10] [--port 8765]

BUNDLE_DIR is a trained bundle (bench/quality.py leaves one in its --out folder). The bundle is
published into a temporary registry, `geotween serve` is started on 127.0.0.1, and:
- one client sends 16-frame geodesic requests (settings ends): p50 and p99 latency;
- 8 clients in parallel for --seconds: frames per second and errors;
- the bare limit, in this process: engine.between + PNG encoding of 16 frames, no HTTP.
Traffic goes only to 127.0.0.1; every loop is bounded in count and time.
"""
from __future__ import annotations

import argparse
import io
import json
import os
import shutil
import subprocess
import sys
import tempfile
import threading
import time
from pathlib import Path

import numpy as np

from common import ROOT, set_threads


def _ends(rng):
    a = {"lamp_azimuth": float(rng.uniform(0, 360)), "lamp_elevation": float(rng.uniform(20, 70))}
    b = {"lamp_azimuth": float(rng.uniform(0, 360)), "lamp_elevation": float(rng.uniform(20, 70))}
    return {"start": {"params": a}, "end": {"params": b}, "frames": 16}


def bare_limit(bundle: Path, n: int = 40) -> float:
    """Frames per second of engine.between(16) + PNG encoding in this process."""
    from PIL import Image

    from models.engine import Endpoint, Engine

    set_threads()
    engine = Engine.load(bundle)
    rng = np.random.default_rng(1)
    t0 = time.perf_counter()
    for _ in range(n):
        body = _ends(rng)
        ans = engine.between(Endpoint(params=body["start"]["params"]), Endpoint(params=body["end"]["params"]), frames=16)
        for f in ans.frames:
            Image.fromarray(np.round(f.image[..., 0] * 255).astype(np.uint8)).save(io.BytesIO(), format="PNG")
    return n * 16 / (time.perf_counter() - t0)


def main() -> None:
    import httpx

    from service.registry import Registry

    p = argparse.ArgumentParser()
    p.add_argument("bundle")
    p.add_argument("--seconds", type=float, default=10.0)
    p.add_argument("--port", type=int, default=8765)
    p.add_argument("--requests", type=int, default=200)
    args = p.parse_args()
    reg_root = Path(tempfile.mkdtemp(prefix="geotween-lat-"))
    Registry.open(reg_root).publish("demo", lambda f: shutil.copytree(args.bundle, f, dirs_exist_ok=True))
    env = {**os.environ, "GEOTWEEN_REGISTRY": str(reg_root), "PYTHONPATH": str(ROOT)}
    proc = subprocess.Popen([sys.executable, "-m", "service.cli", "serve", "--host", "127.0.0.1", "--port", str(args.port)],
                            env=env, cwd=ROOT, stdout=subprocess.DEVNULL, stderr=subprocess.DEVNULL)
    url = f"http://127.0.0.1:{args.port}"
    try:
        deadline = time.time() + 120
        while time.time() < deadline:
            try:
                if httpx.get(f"{url}/readyz", timeout=2).status_code == 200:
                    break
            except httpx.HTTPError:
                time.sleep(0.5)
        rng = np.random.default_rng(0)
        with httpx.Client(base_url=url, timeout=30) as c:
            for _ in range(5):  # warm-up: model load, graph build
                c.post("/v1/models/demo/between", json=_ends(rng)).raise_for_status()
            lat = []
            for _ in range(args.requests):
                t = time.perf_counter()
                c.post("/v1/models/demo/between", json=_ends(rng)).raise_for_status()
                lat.append((time.perf_counter() - t) * 1e3)
        frames, errors, stop = [0], [0], time.time() + args.seconds
        lock = threading.Lock()

        def client(seed: int) -> None:
            r = np.random.default_rng(seed)
            with httpx.Client(base_url=url, timeout=30) as c:
                while time.time() < stop:
                    resp = c.post("/v1/models/demo/between", json=_ends(r))
                    with lock:
                        if resp.status_code == 200:
                            frames[0] += 16
                        else:
                            errors[0] += 1

        t0 = time.perf_counter()
        threads = [threading.Thread(target=client, args=(s,)) for s in range(8)]
        for t in threads:
            t.start()
        for t in threads:
            t.join()
        fps8 = frames[0] / (time.perf_counter() - t0)
    finally:
        proc.terminate()
        proc.wait(timeout=20)
        shutil.rmtree(reg_root, ignore_errors=True)
    bare = bare_limit(Path(args.bundle))
    print(json.dumps({"between16_p50_ms": round(float(np.median(lat)), 2),
                      "between16_p99_ms": round(float(np.percentile(lat, 99)), 2),
                      "clients8_frames_per_s": round(fps8, 1), "clients8_errors": errors[0],
                      "bare_frames_per_s": round(bare, 1), "ratio_to_bare": round(fps8 / bare, 3)}, indent=1))


if __name__ == "__main__":
    main()
