"""Latency and throughput through a real uvicorn process on loopback, against the bare compute limit.

    python bench/latency.py BUNDLE_DIR [--seconds 5] [--requests 100] [--port 8765]

BUNDLE_DIR is a trained bundle (bench/quality.py leaves one in its --out folder). The bundle is
published into a temporary registry, `geotween serve` is started on 127.0.0.1, and:
- one client sends geodesic requests of 1, 8, 16 and 64 frames (settings ends): p50 and p99, and
  16 frames with refine false when the model refines and may skip it;
- the HTTP overhead: the 16-frame answer through HTTP and the same answer made in this process, in
  alternating blocks of --block requests (the machine's speed drifts; a block of each, back to back,
  is one pair): p50 of each side and the median of the pairs' ratios;
- 1, 4 and 8 clients in parallel, 16 frames each, for --seconds: frames per second and errors;
- the bare limit, in this process: frames per second of 16-frame answers made back to back.
"In this process" makes the same answer bytes as the service, minus HTTP: engine.between under
inference mode, the frames' PNGs (service.answers.between_answer) and the JSON body with base64 PNGs
(to_wire, as the service sends it). The JSON body is part of the answer by contract, so the bare
limit counts it too; the registry lookup, routing, request parsing and thread hand-offs are what
the ratio measures.
The service has no micro-batching: each request is decoded as one batch on the inference pool.
Traffic goes only to 127.0.0.1; every loop is bounded in count and time.
"""
from __future__ import annotations

import argparse
import json
import os
import shutil
import subprocess
import sys
import tempfile
import threading
import time
from contextlib import contextmanager
from pathlib import Path

import numpy as np
from common import ROOT, set_threads


def _ends(rng, frames: int = 16, **extra) -> dict:
    a = {"lamp_azimuth": float(rng.uniform(0, 360)), "lamp_elevation": float(rng.uniform(20, 70))}
    b = {"lamp_azimuth": float(rng.uniform(0, 360)), "lamp_elevation": float(rng.uniform(20, 70))}
    return {"start": {"params": a}, "end": {"params": b}, "frames": frames, **extra}


def answer_in_process(engine, body: dict) -> bytes:
    """The JSON answer to a between request with settings ends, made in this process as the service
    makes it, without HTTP: frames (inference mode) at the asked size, their PNGs, the JSON body."""
    import torch

    from geotween.models.engine import Endpoint
    from geotween.models.fullsize import sized
    from geotween.service.answers import between_answer, to_wire

    with torch.inference_mode():
        ans = engine.between(Endpoint(params=body["start"]["params"]), Endpoint(params=body["end"]["params"]),
                             frames=body["frames"])
        sized(engine, ans.frames, body.get("size", "full"))
        # "demo" version 1 is what `serving` publishes: the bytes equal the service's answer
        return to_wire(between_answer(ans, "demo", 1)).model_dump_json().encode()


def bare_limit(bundle: Path, n: int = 40) -> float:
    """Frames per second of 16-frame answers (answer_in_process) made back to back in this process."""
    from geotween.models.engine import Engine

    set_threads()
    engine = Engine.load(bundle)
    rng = np.random.default_rng(1)
    for _ in range(3):
        answer_in_process(engine, _ends(rng))
    t0 = time.perf_counter()
    for _ in range(n):
        answer_in_process(engine, _ends(rng))
    return n * 16 / (time.perf_counter() - t0)


def side_by_side(client, bundle: Path, *, pairs: int = 20, block: int = 10, frames: int = 16) -> dict:
    """The HTTP overhead of a `frames`-frame answer: alternating blocks of `block` requests through
    `client` (keep-alive) and `block` answers made in this process; p50 of each side over all its
    requests and the median over pairs of blocks of p50(HTTP) / p50(in process)."""
    from geotween.models.engine import Engine

    set_threads()
    engine = Engine.load(bundle)
    rng = np.random.default_rng(2)

    def http(body: dict) -> None:
        client.post("/v1/models/demo/between", json=body).raise_for_status()

    def timed(fn, count: int) -> list[float]:
        out = []
        for _ in range(count):
            body = _ends(rng, frames)
            t = time.perf_counter()
            fn(body)
            out.append((time.perf_counter() - t) * 1e3)
        return out

    timed(http, 3)
    timed(lambda b: answer_in_process(engine, b), 3)
    over_http, in_process, ratios = [], [], []
    for _ in range(pairs):
        h = timed(http, block)
        p = timed(lambda b: answer_in_process(engine, b), block)
        over_http += h
        in_process += p
        ratios.append(float(np.median(h) / np.median(p)))
    return {"frames": frames, "pairs": pairs, "block": block,
            "http_p50_ms": round(float(np.median(over_http)), 2),
            "in_process_p50_ms": round(float(np.median(in_process)), 2),
            "ratio": round(float(np.median(ratios)), 3)}


@contextmanager
def serving(bundles: dict[str, Path], port: int, env_extra: dict | None = None):
    """A `geotween serve` process on 127.0.0.1:port over a temporary registry holding `bundles`;
    yields (url, process)."""
    import httpx

    from geotween.service.registry import Registry

    reg_root = Path(tempfile.mkdtemp(prefix="geotween-bench-reg-"))
    reg = Registry.open(reg_root)
    for name, path in bundles.items():
        reg.publish(name, lambda f, p=path: shutil.copytree(p, f, dirs_exist_ok=True))
    env = {**os.environ, "GEOTWEEN_REGISTRY": str(reg_root), "PYTHONPATH": str(ROOT), **(env_extra or {})}
    proc = subprocess.Popen([sys.executable, "-m", "geotween.service.cli", "serve", "--host", "127.0.0.1", "--port", str(port)],
                            env=env, cwd=ROOT, stdout=subprocess.DEVNULL, stderr=subprocess.DEVNULL)
    url = f"http://127.0.0.1:{port}"
    try:
        deadline = time.time() + 120
        while True:
            try:
                if httpx.get(f"{url}/readyz", timeout=2).status_code == 200:
                    break
            except httpx.HTTPError:
                pass
            if time.time() > deadline or proc.poll() is not None:
                raise RuntimeError(f"geotween serve did not become ready on {url}")
            time.sleep(0.3)
        yield url, proc
    finally:
        proc.terminate()
        proc.wait(timeout=20)
        shutil.rmtree(reg_root, ignore_errors=True)


def measure(bundle: Path, *, port: int = 8765, requests: int = 100, seconds: float = 5.0,
            frame_counts=(1, 8, 16, 64), clients=(1, 4, 8), pairs: int = 20, block: int = 10) -> dict:
    import httpx

    out: dict = {"latency": {}, "throughput": {}, "micro_batching": False}
    with serving({"demo": bundle}, port) as (url, _):
        rng = np.random.default_rng(0)
        with httpx.Client(base_url=url, timeout=30) as c:
            for _ in range(5):  # warm-up: model load, graph build
                c.post("/v1/models/demo/between", json=_ends(rng)).raise_for_status()
            runs = [(str(frames), frames, {}) for frames in frame_counts]
            if c.get("/v1/models/demo").json()["refine"].get("skippable"):
                runs.append(("16 without detail transfer", 16, {"refine": False}))
            for label, frames, extra in runs:
                lat = []
                for _ in range(requests):
                    body = _ends(rng, frames, **extra)
                    t = time.perf_counter()
                    c.post("/v1/models/demo/between", json=body).raise_for_status()
                    lat.append((time.perf_counter() - t) * 1e3)
                out["latency"][label] = {"p50_ms": round(float(np.median(lat)), 2),
                                         "p99_ms": round(float(np.percentile(lat, 99)), 2)}
            # before the parallel clients: a lone stream of requests, as the latencies above
            out["http_overhead"] = side_by_side(c, Path(bundle), pairs=pairs, block=block)
        for n_clients in clients:
            frames, errors, stop = [0], [0], time.time() + seconds
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
            threads = [threading.Thread(target=client, args=(100 + s,)) for s in range(n_clients)]
            for t in threads:
                t.start()
            for t in threads:
                t.join()
            out["throughput"][str(n_clients)] = {"frames_per_s": round(frames[0] / (time.perf_counter() - t0), 1),
                                                 "errors": errors[0]}
    bare = bare_limit(Path(bundle))
    out["bare_frames_per_s"] = round(bare, 1)
    for v in out["throughput"].values():
        v["ratio_to_bare"] = round(v["frames_per_s"] / bare, 3)
    return out


def main() -> None:
    p = argparse.ArgumentParser()
    p.add_argument("bundle")
    p.add_argument("--seconds", type=float, default=5.0)
    p.add_argument("--port", type=int, default=8765)
    p.add_argument("--requests", type=int, default=100)
    p.add_argument("--pairs", type=int, default=20, help="pairs of blocks in the HTTP overhead measurement")
    p.add_argument("--block", type=int, default=10, help="requests per block in the HTTP overhead measurement")
    args = p.parse_args()
    print(json.dumps(measure(Path(args.bundle), port=args.port, requests=args.requests, seconds=args.seconds,
                             pairs=args.pairs, block=args.block), indent=1))


if __name__ == "__main__":
    main()
